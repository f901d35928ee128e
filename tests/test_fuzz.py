"""Fuzzed ingest: mutated workbooks and CSV files (hypothesis + openpyxl) end in a clear error or in
ledger lines, never in a traceback or a lost row.  All cell contents are generated, none real."""

from __future__ import annotations

import datetime as dt
import io
import zipfile
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from openpyxl import Workbook

from linker import load_config
from linker.cli import main
from linker.errors import InputError
from linker.ingest import ingest_file
from linker.io import read_file
from linker.records import normalize_records

from conftest import ROOT

CFG = load_config(ROOT / "configs" / "sample.toml")
HEADERS = ["Child Reg No", "Child First Name", "Child Last Name", "Child DOB", "Child Sex", "Child Age",
           "Parent Reg No", "Parent Name", "Parent DOB", "Intake Date", "Release Date", "Location", "Status",
           "Member Type", "Case ID", "Notes", "TOTAL", "", "Reg No", "Name"]
ERRORS = ["#REF!", "#N/A", "#VALUE!", "#DIV/0!", "#NAME?", "#NULL!", "#NUM!"]
N_EXAMPLES = 520
seen = {"examples": 0, "errors": 0, "records": 0}

text = st.one_of(st.text(max_size=12), st.sampled_from(ERRORS + ["=SUM(A1:A3)", "+1", "@x", "N/A", "unknown",
                                                                  "12/31/2020", "2020-02-30", "HR-1234-567",
                                                                  "1.2E+07", " ", "\t", "Ünïcödé ñame"]),
                 st.text(min_size=300, max_size=2000).map(lambda s: s or "x" * 300))
cell = st.one_of(st.none(), text, st.integers(-10**15, 10**15), st.floats(allow_nan=True, allow_infinity=True),
                 st.booleans(), st.dates(dt.date(1800, 1, 1), dt.date(2200, 1, 1)),
                 st.datetimes(dt.datetime(1900, 3, 1), dt.datetime(2100, 1, 1)))


@st.composite
def sheet_rows(draw):
    width = draw(st.integers(0, 8))
    rows = [draw(st.lists(cell, max_size=3)) for _ in range(draw(st.integers(0, 2)))]          # titles
    if width:
        rows.append(draw(st.lists(st.sampled_from(HEADERS), min_size=width, max_size=width)))    # a header
    rows += [draw(st.lists(cell, max_size=width + 2)) for _ in range(draw(st.integers(0, 12)))]
    return rows


@st.composite
def workbook_bytes(draw):
    book = Workbook()
    book.remove(book.active)
    for k in range(draw(st.integers(1, 3))):
        sheet = book.create_sheet(draw(st.sampled_from(["Sheet", "Quarry Gate", "2026-Q3", "x" * 29])) + str(k))
        for row in draw(sheet_rows()):
            sheet.append([_storable(v) for v in row])
        if draw(st.booleans()) and sheet.max_row >= 2 and sheet.max_column >= 2:
            sheet.merge_cells(start_row=1, start_column=1, end_row=2, end_column=2)
        if draw(st.booleans()):
            sheet.cell(row=sheet.max_row + 1, column=1, value="=1/0")        # a formula with no cached value
    buf = io.BytesIO()
    book.save(buf)
    data = buf.getvalue()
    how = draw(st.sampled_from(["whole", "whole", "whole", "truncated", "flipped", "encrypted", "empty", "csv"]))
    if how == "truncated":
        data = data[: draw(st.integers(0, max(len(data) - 1, 0)))]
    elif how == "flipped":
        at = draw(st.integers(0, len(data) - 1))
        data = data[:at] + bytes([data[at] ^ 0xFF]) + data[at + 1:]
    elif how == "encrypted":
        data = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + data[8:]
    elif how == "empty":
        data = b""
    elif how == "csv":
        rows = draw(sheet_rows())
        raw = "\n".join(",".join(_csv_text(v) for v in r) for r in rows)
        data = raw.encode(draw(st.sampled_from(["utf-8", "utf-8-sig", "cp1252", "utf-16"])), errors="replace")
        return "csv", data
    return "xlsx", data


def _storable(v):
    if isinstance(v, str):
        # openpyxl refuses control characters other than tab/newline/carriage return in cells
        v = "".join(ch for ch in v if ch >= " " or ch in "\t\n\r")
        return v[:32767]
    if isinstance(v, float) and (v != v or v in (float("inf"), float("-inf"))):
        return None
    return v


def _csv_text(v) -> str:
    s = "" if v is None else str(v)
    return '"' + s.replace('"', '""') + '"' if any(c in s for c in ',"\n\r') else s


def _ingest(tmp: Path, kind: str, data: bytes) -> None:
    path = tmp / f"fuzzed.{kind}"
    path.write_bytes(data)
    try:
        read = read_file(path, tmp)
    except InputError as err:
        assert "fuzzed" in str(err)                      # the message names the file
        seen["errors"] += 1
        return
    for res, sheet in zip(ingest_file(CFG, read), read.sheets):
        # nothing lost: one ledger line per row as read, and the records the ledger promises
        if not sheet.rows:                                # an empty sheet: one sheet-level line
            assert res.ledger["outcome"].tolist() == ["empty sheet"]
            continue
        rows = res.ledger.loc[res.ledger["row"].astype(str) != "", "row"]   # besides a sheet-level line
        assert sorted(rows.astype(int)) == list(range(1, len(sheet.rows) + 1)), (sheet.name, len(sheet.rows))
        assert int(res.ledger["records"].sum()) == len(res.records)
        if len(res.records):
            out = normalize_records(res.records, CFG)
            assert len(out) == len(res.records)
            seen["records"] += len(out)


@settings(max_examples=N_EXAMPLES, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large, HealthCheck.large_base_example,
                                 HealthCheck.function_scoped_fixture])
@given(sample=workbook_bytes())
def test_mutated_files_end_in_an_error_or_the_ledger(tmp_path, sample):
    seen["examples"] += 1
    _ingest(tmp_path, *sample)


def test_the_fuzz_run_was_large_and_varied():
    """Runs after the fuzz test (file order): it tried enough inputs of both outcomes."""
    assert seen["examples"] >= 500
    assert seen["errors"] > 20 and seen["records"] > 100


def test_a_broken_file_in_a_delivery_is_a_clean_error_through_the_cli(tmp_path):
    folder = tmp_path / "delivery"
    folder.mkdir()
    (folder / "broken.xlsx").write_bytes(b"PK\x03\x04 not really a workbook")
    cfg_text = (ROOT / "configs" / "sample.toml").read_text(encoding="utf-8")
    cfg_text = cfg_text.replace('folder = "../sample/delivery"', f'folder = "{folder.as_posix()}"')
    cfg_text = cfg_text.replace('file = "../sample/roster/class_list.xlsx"',
                                f'file = "{(ROOT / "sample" / "roster" / "class_list.xlsx").as_posix()}"')
    cfg = tmp_path / "c.toml"
    cfg.write_text(cfg_text, encoding="utf-8")
    err = io.StringIO()
    with redirect_stderr(err), redirect_stdout(io.StringIO()):
        code = main(["run", str(cfg), "--out", str(tmp_path / "out")])
    assert code != 0
    assert "broken.xlsx" in err.getvalue() and "Traceback" not in err.getvalue()
    assert "internal error" not in err.getvalue()


def test_a_zip_that_inflates_out_of_proportion_is_refused(tmp_path):
    """A workbook-shaped archive whose members inflate far beyond its own size (a 'zip bomb')."""
    path = tmp_path / "bomb.xlsx"
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as z:
        z.writestr("[Content_Types].xml", "<Types/>")
        z.writestr("xl/worksheets/sheet1.xml", b"0" * (300 * 1024 * 1024))
    with pytest.raises(InputError) as err:
        read_file(path, tmp_path)
    assert "bomb.xlsx" in str(err.value) and "limit" in str(err.value)


@pytest.mark.parametrize("kind", ["xlsx", "csv"])
def test_an_oversized_sheet_is_refused_with_the_limit_named(tmp_path, kind):
    from linker.io import ReadLimits

    path = tmp_path / f"big.{kind}"
    rows = [["Reg No", "Name"]] + [[str(10_000_000 + i), f"Person {i}"] for i in range(60)]
    if kind == "xlsx":
        book = Workbook()
        for r in rows:
            book.active.append(r)
        book.save(path)
    else:
        path.write_text("\n".join(",".join(r) for r in rows), encoding="utf-8")
    small = ReadLimits(max_sheet_rows=50)
    with pytest.raises(InputError) as err:
        read_file(path, tmp_path, small)
    assert f"big.{kind}" in str(err.value) and "61 rows" in str(err.value) and "limit of 50 rows" in str(err.value)
    assert len(read_file(path, tmp_path).sheets[0].rows) == 61      # under the default limits it reads
