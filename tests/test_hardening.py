"""Hardening of a whole run: formula injection, owner-only outputs, no personal data in logs,
byte-identical reruns.  The demo delivery is invented data (sample/)."""

from __future__ import annotations

import csv
import io
import json
import re
import shutil
import stat
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import pandas as pd
import pytest
from openpyxl import load_workbook

from linker.cli import main
from linker.io import safe_cell

from conftest import ROOT

SAMPLE = ROOT / "configs" / "sample.toml"
# Cells a spreadsheet would run as a formula or a command (OWASP, "CSV Injection": cells starting
# with =, +, -, @, a tab or a carriage return).
HOSTILE = ["=HYPERLINK(\"http://x.invalid\",\"open\")", "+1+1", "-2+3", "@SUM(A1:A2)", "\tTAB", "\rCR",
           "=cmd|' /C calc'!A0"]
NUMBER = re.compile(r"[-+]?\d+(\.\d+)?([eE][-+]?\d+)?")


def _run(out: Path, *extra: str) -> tuple[int, str, str]:
    err, std = io.StringIO(), io.StringIO()
    with redirect_stderr(err), redirect_stdout(std):
        code = main(["run", str(SAMPLE), "--out", str(out), *extra])
    return code, std.getvalue(), err.getvalue()


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory):
    base = tmp_path_factory.mktemp("runs")
    first = _run(base / "a")
    second = _run(base / "b")
    return base / "a", base / "b", first, second


def test_two_runs_are_byte_identical_but_for_the_run_timestamps(two_runs):
    a, b, first, second = two_runs
    assert first[0] == second[0] == 0
    names = sorted(p.name for p in a.iterdir())
    assert names == sorted(p.name for p in b.iterdir()) and len(names) > 15
    for name in names:
        if name == "run.json":
            continue
        assert (a / name).read_bytes() == (b / name).read_bytes(), name
    ja, jb = (json.loads((d / "run.json").read_text()) for d in (a, b))
    assert {"started", "finished"} <= set(ja)
    assert _without_clock(ja) == _without_clock(jb)


def _without_clock(info):
    """run.json without what the clock decides: start and finish times, stage timings."""
    if isinstance(info, dict):
        return {k: _without_clock(v) for k, v in info.items() if k not in ("started", "finished", "timings")}
    return info


def test_outputs_are_owner_only_by_default(two_runs):
    a = two_runs[0]
    for path in a.iterdir():
        mode = stat.S_IMODE(path.stat().st_mode)
        assert mode & 0o077 == 0, f"{path.name} is readable by others: {oct(mode)}"


def test_a_new_project_store_is_owner_only(tmp_path):
    from linker.store import open_store

    with open_store(tmp_path / "project" / "store.sqlite"):
        pass
    assert stat.S_IMODE((tmp_path / "project" / "store.sqlite").stat().st_mode) == 0o600


def test_an_option_lets_the_group_read_the_outputs(tmp_path):
    code, _, _ = _run(tmp_path / "g", "--group-readable", "--quiet")
    assert code == 0
    modes = {stat.S_IMODE(p.stat().st_mode) for p in (tmp_path / "g").iterdir()}
    assert modes == {0o640}


def test_no_name_or_registration_number_reaches_the_log(two_runs):
    """Progress lines, warnings and the summary name counts and files, never a person."""
    _, _, first, _ = two_runs
    log = first[1] + first[2]
    assert "person-records" in log                     # the log was captured
    persons = pd.read_csv(ROOT / "sample" / "truth" / "persons.csv", dtype=str, keep_default_na=False)
    raw = pd.read_csv(ROOT / "sample" / "truth" / "defects.csv", dtype=str, keep_default_na=False)
    words = set()
    for col in ("given_name", "family_name"):
        for name in persons[col]:
            words |= {w for w in name.replace("-", " ").split() if len(w) >= 4}
    numbers = set(persons["reg_no"]) | {w for w in raw["written"] if sum(ch.isdigit() for ch in w) >= 6}
    text = log.lower()
    leaked = sorted(w for w in words if f" {w.lower()} " in f" {text} ")
    assert not leaked, f"names in the log: {leaked[:5]}"
    assert not [n for n in numbers if n and n in log], "registration numbers in the log"


def test_every_hostile_cell_is_neutralized_in_csv_and_xlsx_outputs(tmp_path):
    """A delivery whose cells start with formula characters: no output cell starts with one."""
    delivery = tmp_path / "delivery"
    shutil.copytree(ROOT / "sample" / "delivery", delivery)
    rows = [["Member Type", "Case ID", "Reg No", "First Name", "Last Name", "DOB", "Sex", "Location", "Status"]]
    for k, bad in enumerate(HOSTILE):
        rows.append(["child", f"X{k}", f"{4000000 + k}", bad, bad, "2015-01-0" + str(k + 1), "F", bad, bad])
    with open(delivery / "family_tracing_extra.csv", "w", newline="", encoding="utf-8") as fh:
        csv.writer(fh).writerows(rows)
    text = (SAMPLE.read_text(encoding="utf-8")
            .replace('folder = "../sample/delivery"', f'folder = "{delivery.as_posix()}"')
            .replace('file = "../sample/roster/class_list.xlsx"',
                     f'file = "{(ROOT / "sample" / "roster" / "class_list.xlsx").as_posix()}"'))
    cfg = tmp_path / "hostile.toml"
    cfg.write_text(text, encoding="utf-8")
    out = tmp_path / "out"
    err, std = io.StringIO(), io.StringIO()
    with redirect_stderr(err), redirect_stdout(std):
        assert main(["run", str(cfg), "--out", str(out)]) == 0
    starts = ("=", "+", "-", "@", "\t", "\r")
    seen_hostile = 0
    for path in sorted(out.glob("*.csv")):
        with open(path, newline="", encoding="utf-8") as fh:
            for row in csv.reader(fh):
                for cell in row:
                    # a plain number (a negative match weight) is a value, not a formula
                    assert not cell.startswith(starts) or NUMBER.fullmatch(cell), f"{path.name}: {cell!r}"
                    seen_hostile += any(h.strip() in cell for h in HOSTILE if len(h.strip()) > 3)
    for path in sorted(out.glob("*.xlsx")):
        book = load_workbook(path)
        for sheet in book.worksheets:
            for row in sheet.iter_rows(values_only=True):
                for cell in row:
                    if isinstance(cell, str):
                        assert not cell.startswith(starts), f"{path.name}/{sheet.title}: {cell!r}"
    assert seen_hostile >= len(HOSTILE)   # the hostile text did reach the outputs, neutralized
    ledger = pd.read_csv(out / "ledger.csv", dtype=str, keep_default_na=False)
    extra = ledger[ledger["source_file"] == "family_tracing_extra.csv"]
    assert (extra["outcome"] == "record").sum() == len(HOSTILE)


def test_safe_cell_prefixes_exactly_the_owasp_characters():
    # OWASP "CSV Injection": =, +, -, @, tab (0x09), carriage return (0x0D)
    for bad in HOSTILE:
        assert safe_cell(bad) == "'" + bad
    for fine in ("Ana", "12", "", " =x", "a=b"):
        assert safe_cell(fine) == fine
    assert safe_cell(-3) == -3
