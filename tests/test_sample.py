"""Checks of the generated demo delivery (sample/generate.py) and its ground truth."""

from __future__ import annotations

import csv
import datetime as dt
import fnmatch
import hashlib
import io
import re
import tomllib
import unicodedata
import zipfile
from collections import Counter
from pathlib import Path

import openpyxl
import pandas as pd
import pytest

from linker import load_config, run_pipeline
from sample import generate

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample"
DEMO_CONFIG = ROOT / "configs" / "sample.toml"
IDENTITY = ("reg_no", "given_name", "family_name", "full_name", "birth_date", "age")
EVENTS = ("intake_date", "placement_date", "release_date", "location", "status")


def fold(text) -> str:
    """Header folding as docs/config.md states it: case, accents, punctuation, spaces; '#' = 'no'."""
    text = unicodedata.normalize("NFKD", str(text).replace("#", "no"))
    text = "".join(ch for ch in text if not unicodedata.combining(ch)).lower()
    return re.sub(r"[^0-9a-z]", "", text)


def config_headers(cfg: dict) -> list[str]:
    """Every header name a config lists (slots, fields, roster columns, slot columns and values)."""
    names = []
    for slot in cfg["slots"].values():
        for lst in slot["columns"].values():
            names += lst
    for lst in cfg["fields"].values():
        names += lst
    for lst in cfg["roster"]["columns"].values():
        names += lst
    for rule in cfg.get("sheets", []):
        if "slot_column" in rule:
            names.append(rule["slot_column"])
            names += list(rule["slot_values"])
    return names


def file_hashes(folder: Path) -> dict[str, str]:
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def read_rows(path: Path, sheet: str) -> list[list]:
    """Rows of a sheet (xlsx) or of a CSV file, from row 1, values as read."""
    if path.suffix == ".csv":
        data = path.read_bytes()
        if data.startswith(b"\xef\xbb\xbf"):
            text = data[3:].decode("utf-8")
        else:
            try:
                text = data.decode("utf-8")
            except UnicodeDecodeError:
                text = data.decode("cp1252")
        return list(csv.reader(io.StringIO(text, newline="")))
    wb = openpyxl.load_workbook(path, read_only=True)
    rows = [list(r) for r in wb[sheet].iter_rows(values_only=True)]
    wb.close()
    return rows


class Vocab:
    """Folded header -> (owner, field) from a config; owner is a slot, 'generic' or 'event'."""

    def __init__(self, cfg: dict):
        self.cfg = cfg
        self.map: dict[str, tuple[str, str]] = {}
        for slot, body in cfg["slots"].items():
            for fld, lst in body["columns"].items():
                for n in lst:
                    self.map[fold(n)] = (slot, fld)
        for fld, lst in cfg["fields"].items():
            for n in lst:
                self.map.setdefault(fold(n), ("event" if fld in EVENTS else "generic", fld))

    def rule(self, source_file: str, sheet: str) -> dict:
        """The first matching sheet rule naming a slot or slot column (or {})."""
        name = source_file.rsplit("/", 1)[-1]
        for rule in self.cfg.get("sheets", []):
            if (fnmatch.fnmatch(name, rule["file"]) or fnmatch.fnmatch(source_file, rule["file"])) and \
                    fnmatch.fnmatch(sheet, rule.get("sheet", "*")) and ("slot" in rule or "slot_column" in rule):
                return rule
        return {}


def blank(v) -> bool:
    return v is None or str(v).strip() == ""


def slot_cells(vocab: Vocab, rule: dict, header: list, row: list) -> dict[str, list]:
    """Identity values per slot on a row, using the config's vocabulary and sheet rule."""
    out: dict[str, list] = {}
    slot_col = fold(rule["slot_column"]) if "slot_column" in rule else None
    row_slot = rule.get("slot")
    if slot_col:
        idx = [fold(h) for h in header].index(slot_col)
        row_slot = rule["slot_values"].get(str(row[idx]).strip().lower())
    for c, h in enumerate(header):
        owner, fld = vocab.map.get(fold(h), ("", ""))
        if fld not in IDENTITY or c >= len(row):
            continue
        slot = row_slot if owner == "generic" else owner
        if slot:
            out.setdefault(slot, []).append(row[c])
    return out


def check_truth_exact(out_dir: Path, config_path: Path):
    """Every truth row names a slot with person data, and every such slot is in the truth."""
    cfg = tomllib.loads(config_path.read_text(encoding="utf-8"))
    vocab = Vocab(cfg)
    delivery = (config_path.parent / cfg["delivery"]["folder"]).resolve()
    with open(out_dir / "truth" / "records.csv", encoding="utf-8", newline="") as fh:
        truth = list(csv.DictReader(fh))
    assert len(truth) > 500
    expected = {(t["source_file"], t["sheet"], int(t["row"]), t["slot"]) for t in truth}
    assert len(expected) == len(truth), "truth lists a person slot twice"
    found = set()
    sheets = sorted({(t["source_file"], t["sheet"]) for t in truth})
    for source_file, sheet in sheets:
        rows = read_rows(delivery / source_file, sheet)
        scores = [sum(fold(v) in vocab.map for v in r if not blank(v)) for r in rows[:30]]
        h = scores.index(max(scores))
        header = rows[h]
        assert max(scores) >= 3, f"{source_file}/{sheet}: no header row"
        rule = vocab.rule(source_file, sheet)
        for i in range(h + 1, len(rows)):
            row = list(rows[i])
            if all(blank(v) for v in row) or [fold(v) for v in row] == [fold(v) for v in header]:
                continue
            if fold(next(v for v in row if not blank(v))).startswith("total"):
                continue
            for slot, values in slot_cells(vocab, rule, header, row).items():
                if any(not blank(v) for v in values):
                    found.add((source_file, sheet, i + 1, slot))
    missing = sorted(expected - found)
    extra = sorted(found - expected)
    assert not missing, f"truth rows without person data in the file, e.g. {missing[:3]}"
    assert not extra, f"person slots in the files that truth does not list, e.g. {extra[:3]}"


def test_regeneration_is_byte_identical(tmp_path):
    """Two runs with the same seed write byte-identical files, equal to the committed sample."""
    a, b = tmp_path / "a", tmp_path / "b"
    generate.write_delivery(a)
    generate.write_delivery(b)
    ha, hb = file_hashes(a), file_hashes(b)
    assert len(ha) >= 13 and ha == hb
    assert "truth/injected.csv" in ha and "truth/relations.csv" in ha
    # the committed sample is what the generator writes (xlsx compared member by member,
    # so a different zlib build cannot make this fail)
    for rel in ha:
        mine, committed = a / rel, SAMPLE / rel
        assert committed.is_file(), f"sample/{rel} is not committed; run python sample/generate.py"
        if rel.endswith(".xlsx"):
            za, zc = zipfile.ZipFile(mine), zipfile.ZipFile(committed)
            assert za.namelist() == zc.namelist(), rel
            for name in za.namelist():
                assert za.read(name) == zc.read(name), f"sample/{rel} member {name} is stale"
        else:
            assert mine.read_bytes() == committed.read_bytes(), f"sample/{rel} is stale"


def test_other_seed_changes_the_delivery(tmp_path):
    """The seed is really used: another seed gives other truth."""
    generate.write_delivery(tmp_path / "x", seed=1, n_families=40)
    generate.write_delivery(tmp_path / "y", seed=2, n_families=40)
    assert (tmp_path / "x/truth/persons.csv").read_bytes() != (tmp_path / "y/truth/persons.csv").read_bytes()


def test_committed_truth_points_at_person_cells():
    """Every truth row of the committed sample is a row/slot with non-empty person cells, and vice versa."""
    check_truth_exact(SAMPLE, DEMO_CONFIG)


def test_alternate_truth_points_at_person_cells(tmp_path):
    """The alternate delivery, read with its own alternate.toml, matches its truth exactly."""
    generate.write_delivery(tmp_path, n_families=80, vocabulary="alternate")
    check_truth_exact(tmp_path, tmp_path / "alternate.toml")


def test_luhn_reference_value():
    """Luhn check digit of 7992739871 is 3 (REFERENCES.md section 8; Wikipedia text, read-2)."""
    assert generate.luhn_check_digit("7992739871") == "3"
    assert generate.luhn_valid("79927398713")
    assert not generate.luhn_valid("79927398712")


def test_persons_register_numbers_are_valid_luhn():
    """True register numbers: 8 digits, unique, Luhn-valid, many with a leading zero."""
    with open(SAMPLE / "truth" / "persons.csv", encoding="utf-8", newline="") as fh:
        persons = list(csv.DictReader(fh))
    regs = [p["reg_no"] for p in persons]
    assert len(regs) > 1000
    assert all(len(r) == 8 and r.isdigit() for r in regs)
    assert len(set(regs)) == len(regs)
    assert all(generate.luhn_valid(r) for r in regs)
    assert sum(r.startswith("0") for r in regs) / len(regs) > 0.3


def test_scenario_shape():
    """2-5 records per person, parents 15+ years older than their children, twins and namesakes exist."""
    def load(name):
        with open(SAMPLE / "truth" / name, encoding="utf-8", newline="") as fh:
            return list(csv.DictReader(fh))
    persons = {p["person_id"]: p for p in load("persons.csv")}
    per_person = Counter(t["person_id"] for t in load("records.csv"))
    assert set(per_person) == set(persons)
    assert min(per_person.values()) == 2 and max(per_person.values()) == 5
    rel = load("relations.csv")
    assert len(rel) > len([p for p in persons.values() if p["role"] == "child"])
    for r in rel:
        child = dt.date.fromisoformat(persons[r["child_person_id"]]["birth_date"])
        adult = dt.date.fromisoformat(persons[r["parent_person_id"]]["birth_date"])
        assert (child - adult).days >= 15 * 365
    kids = [p for p in persons.values() if p["role"] == "child"]
    by_family_dob = Counter((p["family_id"], p["birth_date"]) for p in kids)
    assert any(n >= 2 for n in by_family_dob.values()), "no twins"
    names = {}
    for p in persons.values():
        names.setdefault((p["given_name"], p["family_name"], p["birth_date"][:4]), set()).add(p["family_id"])
    assert sum(len(f) >= 2 for f in names.values()) >= 5, "too few namesakes across families"
    roster = load("roster.csv")
    status = Counter(r["status"] for r in roster)
    assert status["roster only"] >= 3 and status["not on roster"] >= 10 and status["listed"] > 900


def test_csv_encodings():
    """The tracing file is cp1252 (not UTF-8) and keeps accents; the station files carry a UTF-8 BOM."""
    data = (SAMPLE / "delivery" / "family_tracing_2026.csv").read_bytes()
    with pytest.raises(UnicodeDecodeError):
        data.decode("utf-8")
    assert "é" in data.decode("cp1252") or "ñ" in data.decode("cp1252")
    stations = sorted((SAMPLE / "delivery" / "stations").glob("*.csv"))
    assert len(stations) == 2
    assert all(p.read_bytes().startswith(b"\xef\xbb\xbf") for p in stations)


def test_alternate_vocabulary_shares_no_header_with_demo_config(tmp_path):
    """No folded header name of alternate.toml is one configs/sample.toml lists."""
    generate.write_delivery(tmp_path, n_families=20, vocabulary="alternate")
    demo = {fold(n) for n in config_headers(tomllib.loads(DEMO_CONFIG.read_text(encoding="utf-8")))}
    alt_cfg = tomllib.loads((tmp_path / "alternate.toml").read_text(encoding="utf-8"))
    alt = {fold(n) for n in config_headers(alt_cfg)}
    assert len(demo) > 50 and len(alt) > 50
    assert demo.isdisjoint(alt), sorted(demo & alt)
    # and the alternate files really use those headers: no header cell folds to a demo name
    used = set()
    for path in sorted((tmp_path / "delivery").rglob("*")):
        if path.suffix == ".csv":
            sheets = [read_rows(path, "")]
        elif path.suffix == ".xlsx":
            wb = openpyxl.load_workbook(path, read_only=True)
            names = wb.sheetnames
            wb.close()
            sheets = [read_rows(path, name) for name in names]
        else:
            continue
        for rows in sheets:
            if not rows:
                continue
            scores = [sum(fold(v) in alt for v in r if not blank(v)) for r in rows[:30]]
            used |= {fold(v) for v in rows[scores.index(max(scores))] if not blank(v)}
    assert len(used & alt) >= 40
    assert not (used & demo), sorted(used & demo)


def delivery_rows(delivery: Path) -> dict[tuple[str, str], list[list]]:
    """(source_file, sheet) -> rows, for every sheet of every xlsx/csv file, read without linker."""
    out = {}
    for path in sorted(delivery.rglob("*")):
        rel = path.relative_to(delivery).as_posix()
        if path.suffix == ".csv":
            out[rel, path.stem] = read_rows(path, "")
        elif path.suffix == ".xlsx":
            wb = openpyxl.load_workbook(path, read_only=True)
            names = wb.sheetnames
            wb.close()
            for name in names:
                out[rel, name] = read_rows(path, name)
    return out


def accounting_problems(sheets: dict, ledger: pd.DataFrame, records: pd.DataFrame) -> list[str]:
    """Where a run fails to account for the input rows, counted here with openpyxl / csv.

    Every spreadsheet row (1 .. last row, blank ones included) has exactly one
    ledger line, a sheet without any value has one "empty sheet" line, every
    "record" line has exactly the records it announces, and records come only
    from "record" lines.
    """
    problems = []
    row_no = pd.to_numeric(ledger["row"], errors="coerce")
    numbered, sheet_level = ledger[row_no.notna()].assign(row=row_no.dropna().astype(int)), ledger[row_no.isna()]
    per_row = records.groupby(["source_file", "sheet", "row"])["slot"].agg(sorted).to_dict()
    for (source_file, sheet), rows in sheets.items():
        where = f"{source_file}/{sheet}"
        lines = numbered[(numbered["source_file"] == source_file) & (numbered["sheet"] == sheet)]
        marks = sheet_level[(sheet_level["source_file"] == source_file) & (sheet_level["sheet"] == sheet)]
        has_data = any(not blank(v) for r in rows for v in r)
        if not has_data:
            if list(marks["outcome"]) != ["empty sheet"]:
                problems.append(f"{where}: no data but ledger says {list(marks['outcome'])}")
            if not set(lines["reason"]) <= {"blank row"}:
                problems.append(f"{where}: empty sheet with non-blank ledger rows")
            continue
        if len(marks):
            problems.append(f"{where}: sheet-level ledger line on a sheet with data")
        counted = Counter(lines["row"])
        missing = [r for r in range(1, len(rows) + 1) if counted[r] == 0]
        twice = sorted(r for r, n in counted.items() if n > 1)
        beyond = sorted(r for r in counted if not 1 <= r <= len(rows))
        for label, bad in (("rows without a ledger line", missing), ("rows ledgered twice", twice),
                           ("ledger rows the file does not have", beyond)):
            if bad:
                problems.append(f"{where}: {label}: {bad[:5]}")
        for line in lines.itertuples(index=False):
            if not 1 <= line.row <= len(rows):
                continue
            is_blank = all(blank(v) for v in rows[line.row - 1])
            if is_blank != (line.reason == "blank row"):
                problems.append(f"{where} row {line.row}: blank={is_blank} but ledger reason {line.reason!r}")
            slots = per_row.get((source_file, sheet, line.row), [])
            if line.outcome == "record":
                named = line.reason.removeprefix("persons: ").split(", ")
                if slots != sorted(named) or len(slots) != line.records or not slots:
                    problems.append(f"{where} row {line.row}: ledger names {named} ({line.records}), "
                                    f"records have {slots}")
            elif slots or line.records:
                problems.append(f"{where} row {line.row}: {line.outcome!r} row with records {slots}")
    stray = sorted({(f, s) for f, s, _ in per_row} - set(sheets))
    if stray:
        problems.append(f"records from sheets the delivery does not have: {stray[:3]}")
    if len(records) != ledger["records"].sum() or not records["record_id"].is_unique:
        problems.append(f"{len(records)} records but the ledger announces {ledger['records'].sum()}")
    return problems


@pytest.fixture(scope="module")
def demo_run():
    return run_pipeline(load_config(DEMO_CONFIG))


def test_every_row_of_the_sample_delivery_is_accounted_for(demo_run):
    """All rows of every file and sheet (counted with openpyxl / csv) are in the ledger once, records match."""
    res = demo_run
    sheets = delivery_rows(SAMPLE / "delivery")
    assert len({f for f, _ in sheets}) == 7 and len(sheets) >= 20
    assert accounting_problems(sheets, res.ledger, res.records) == []
    assert res.info["counts"]["input_rows"] == sum(len(rows) for rows in sheets.values())
    # every truth person-record comes from a "record" row and is among its records
    truth = pd.read_csv(SAMPLE / "truth" / "records.csv", dtype={"row": int}, keep_default_na=False)
    key = ["source_file", "sheet", "row", "slot"]
    assert set(map(tuple, truth[key].values)) <= set(map(tuple, res.records[key].values))
    # the check is live: a dropped, doubled or record-less ledger line is reported
    led = res.ledger
    first_record = led.index[led["outcome"] == "record"][0]
    broken = {
        "dropped row": (led.drop(index=first_record), res.records),
        "row twice": (pd.concat([led, led.iloc[[5]]]), res.records),
        "lost record": (led, res.records.iloc[1:]),
        "records from a skipped row": (led.assign(outcome=led["outcome"].mask(
            led.index == first_record, "skipped")), res.records),
    }
    for name, (ledger, records) in broken.items():
        assert accounting_problems(sheets, ledger, records), name


def test_alternate_vocabulary_delivery_is_recovered_with_its_own_config(tmp_path):
    """The alternate delivery, read only with its generated alternate.toml: >= 99% of truth, <= 1% spurious."""
    generate.write_delivery(tmp_path, vocabulary="alternate")
    res = run_pipeline(load_config(tmp_path / "alternate.toml"))
    truth = pd.read_csv(tmp_path / "truth" / "records.csv", dtype={"row": int}, keep_default_na=False)
    key = ["source_file", "sheet", "row", "slot"]
    expected = set(map(tuple, truth[key].values))
    got = set(map(tuple, res.records[key].values))
    assert len(expected) == len(truth) > 3000
    assert len(expected & got) / len(expected) >= 0.99
    assert len(got - expected) / len(expected) <= 0.01
    assert accounting_problems(delivery_rows(tmp_path / "delivery"), res.ledger, res.records) == []


# ---------------------------------------------------------------------------
# Labelled injections (truth/injected.csv) and relation evidence
# ---------------------------------------------------------------------------
INJECTED_COLUMNS = ["rule", "source_file", "sheet", "row", "slot", "person_id", "field", "written", "true_value"]
KEY = ["source_file", "sheet", "row", "slot"]


def load_truth(name: str) -> pd.DataFrame:
    return pd.read_csv(SAMPLE / "truth" / name, dtype=str, keep_default_na=False)


def test_injected_lines_point_at_person_cells():
    """Every injected line is a person-record of the truth (same person), each rule has >= 15 lines."""
    inj = load_truth("injected.csv")
    assert list(inj.columns) == INJECTED_COLUMNS
    records = load_truth("records.csv")
    joined = inj.merge(records, on=KEY, how="left", suffixes=("", "_truth"), validate="many_to_one")
    assert (joined["person_id_truth"] == joined["person_id"]).all(), joined[joined["person_id_truth"] != joined["person_id"]]
    assert set(inj["rule"]) == set(generate.RULES)
    counts = inj["rule"].value_counts()
    assert (counts >= 15).all(), counts.to_dict()
    assert not inj.duplicated(["rule"] + KEY).any()
    # sorted: rule order of the spec, then file, sheet, numeric row, slot
    order = inj.assign(r=inj["rule"].map(generate.RULES.index), n=inj["row"].astype(int))
    assert order.equals(order.sort_values(["r", "source_file", "sheet", "n", "slot"], kind="mergesort"))


def test_injections_do_not_change_the_messiness(tmp_path):
    """Rendering with and without the injections gives the same defects (the planner only uses clean cells)."""
    dry = generate.Delivery(tmp_path, "demo", 5, 60, dry=True)
    dry.render()
    plan, lines = generate.InjectionPlanner(dry, 5).run()
    assert plan and lines
    again = generate.Delivery(tmp_path, "demo", 5, 60, plan=plan, dry=True)
    again.render()
    assert again.w_main.defects == dry.w_main.defects
    assert list((tmp_path).iterdir()) == []          # dry renders write nothing
    # and the plan really changes what is written
    changed = [k for k in plan if k[3] and again.seen[k] != dry.seen[k]]
    assert changed


def years(a: str, b: str) -> float:
    return (dt.date.fromisoformat(b) - dt.date.fromisoformat(a)).days / 365.25


def test_injections_show_in_the_ingested_records(demo_run):
    """Read by the pipeline, every injected record shows the impossibility its rule names."""
    cutoff = tomllib.loads(DEMO_CONFIG.read_text(encoding="utf-8"))["rules"]["cutoff_date"]
    recs = demo_run.records.astype(str).assign(row=lambda r: r["row"].astype(str))
    persons = load_truth("persons.csv").set_index("person_id")
    inj = load_truth("injected.csv").merge(recs, on=KEY, how="left", validate="many_to_one", indicator=True)
    assert (inj["_merge"] == "both").all()
    inj["true_dob"] = inj["person_id"].map(persons["birth_date"])
    by_row = recs.set_index(["source_file", "sheet", "row", "slot"])

    def partner(r, slot):
        return by_row.loc[(r["source_file"], r["sheet"], r["row"], slot)]

    problems = []
    for r in inj.to_dict("records"):
        rule, events = r["rule"], [r[f] for f in ("intake_date", "placement_date", "release_date") if r[f]]
        if rule == "self_parent":
            ok = r["reg_no"] != "" and partner(r, "child")["reg_no"] == partner(r, "parent")["reg_no"]
        elif rule == "parent_too_young":
            c, p = partner(r, "child")["birth_date"], partner(r, "parent")["birth_date"]
            ok = bool(c and p) and 9 < years(p, c) < 12
        elif rule == "release_before_intake":
            ok = bool(r["release_date"] and r["intake_date"]) and r["release_date"] < r["intake_date"]
        elif rule == "event_after_cutoff":
            ok = any(e > cutoff for e in events) and r[r["field"]] == r["written"]
        elif rule == "event_before_birth":
            ok = r[r["field"]] == r["written"] < r["true_dob"]
        elif rule == "sex_conflict":
            ok = r["sex"] != "" and r["sex"] != persons.loc[r["person_id"], "sex"] == r["true_value"]
        elif rule == "birth_date_conflict":
            ok = r["birth_date"] == r["written"] and r["birth_date"] not in ("", r["true_dob"])
        elif rule == "age_conflict":
            ok = r["birth_date_min"] != "" and not r["birth_date_min"] <= r["true_dob"] <= r["birth_date_max"]
        elif rule == "too_many_parents":
            ok = r["slot"] in ("child", "parent") and "recorded as parent of" in r["written"]
        else:   # shared_reg_no: a valid number that is another person's
            owner = persons.index[persons["reg_no"] == r["reg_no"]]
            ok = r["reg_no_status"] == "valid" and len(owner) == 1 and owner[0] != r["person_id"]
        if not ok:
            problems.append((rule, r["source_file"], r["sheet"], r["row"], r["slot"]))
    assert problems == []


def test_too_many_parents_attach_unrelated_adults():
    """The labelled rows name an adult who is not the child's parent, giving the child 3+ parents."""
    inj = load_truth("injected.csv")
    records = load_truth("records.csv")
    true = set(map(tuple, load_truth("relations.csv")[["child_person_id", "parent_person_id"]].values))
    rows = records.pivot_table(index=["source_file", "sheet", "row"], columns="slot", values="person_id",
                               aggfunc="first").dropna(subset=["child", "parent"])
    claimed = rows.groupby("child")["parent"].nunique()
    extra = inj[inj["rule"] == "too_many_parents"]
    extra_rows = rows.loc[[tuple(k) for k in extra[["source_file", "sheet", "row"]].drop_duplicates().values]]
    assert len(extra_rows) >= 15
    assert not any((c, p) in true for c, p in extra_rows[["child", "parent"]].values)
    assert (claimed[extra_rows["child"].unique()] >= 3).all()
    assert (claimed.drop(extra_rows["child"].unique()) <= 1).all()   # nobody else has more than one


def test_relation_evidence_matches_the_delivery():
    """evidence = row / case / named / none, first applicable, as the delivery shows it."""
    rel = load_truth("relations.csv")
    assert list(rel.columns) == ["child_person_id", "parent_person_id", "evidence"]
    assert set(rel["evidence"]) <= {"row", "case", "named", "none"}
    counts = rel["evidence"].value_counts()
    assert all(counts.get(e, 0) > 10 for e in ("row", "case", "named", "none")), counts.to_dict()
    records = load_truth("records.csv")
    persons = load_truth("persons.csv").set_index("person_id")
    rows = records.pivot_table(index=["source_file", "sheet", "row"], columns="slot", values="person_id",
                               aggfunc="first").dropna(subset=["child", "parent"])
    on_row = set(map(tuple, rows[["child", "parent"]].values))
    # Case ID per tracing line, read from the CSV itself
    tracing = read_rows(SAMPLE / "delivery" / "family_tracing_2026.csv", "")
    case_col = [fold(h) for h in tracing[0]].index("caseid")
    mine = records[records["source_file"] == "family_tracing_2026.csv"]
    cases: dict[str, set] = {}
    for pid, row in zip(mine["person_id"], mine["row"].astype(int)):
        cases.setdefault(pid, set()).add(tracing[row - 1][case_col])
    # "Children named" per legal-aid line, read from the workbook
    named: dict[str, str] = {}
    legal = records[records["source_file"] == "legal_aid_intake_2026.xlsx"]
    for sheet in sorted(set(legal["sheet"])):
        cells = read_rows(SAMPLE / "delivery" / "legal_aid_intake_2026.xlsx", sheet)
        col = [fold(h) for h in cells[3]].index("childrennamed")
        for pid, row in zip(legal.loc[legal["sheet"] == sheet, "person_id"],
                            legal.loc[legal["sheet"] == sheet, "row"].astype(int)):
            named[pid] = named.get(pid, "") + ", " + str(cells[row - 1][col] or "")
    for c, a, e in rel.itertuples(index=False):
        both_cases = bool(cases.get(c, set()) & cases.get(a, set()))
        first_given = persons.loc[c, "given_name"].split()[0]
        assert (e == "row") == ((c, a) in on_row), (c, a, e)
        if e != "row":
            assert (e == "case") == both_cases, (c, a, e)
        if e == "named":
            assert first_given in [x.strip() for x in named.get(a, "").split(",")], (c, a)


# ---------------------------------------------------------------------------
# Production 2: the next week's re-export of the same people (sample/generate.py --production 2)
# ---------------------------------------------------------------------------
@pytest.fixture(scope="module")
def production2(tmp_path_factory):
    out = tmp_path_factory.mktemp("production2")
    return out, generate.write_production2(out)


def load_csv(path: Path) -> pd.DataFrame:
    return pd.read_csv(path, dtype=str, keep_default_na=False)


def test_production2_is_deterministic(production2, tmp_path):
    """Two writes give byte-identical files; the config is configs/sample.toml pointed at the folder."""
    out, summary = production2
    again = generate.write_production2(tmp_path)
    assert again == summary
    assert file_hashes(tmp_path) == file_hashes(out)
    cfg = tomllib.loads((out / "production2.toml").read_text(encoding="utf-8"))
    demo = tomllib.loads(DEMO_CONFIG.read_text(encoding="utf-8"))
    assert cfg["delivery"]["folder"] == "delivery" and cfg["roster"]["file"] == "roster/class_list.xlsx"
    assert {k: v for k, v in cfg.items() if k not in ("delivery", "roster")} == \
        {k: v for k, v in demo.items() if k not in ("delivery", "roster")}
    with pytest.raises(ValueError):
        generate.write_production2(SAMPLE)           # never over the committed sample


def test_production2_truth_points_at_person_cells(production2):
    """records.csv matches the files exactly; changes.csv and injected.csv point at its records."""
    out, summary = production2
    check_truth_exact(out, out / generate.PRODUCTION2_CONFIG)
    records = load_csv(out / "truth" / "records.csv")
    changes = load_csv(out / "truth" / "changes.csv")
    assert list(changes.columns) == generate.CHANGE_COLUMNS
    assert set(changes["change"]) == set(generate.CHANGES)
    now = changes.merge(records, on=KEY, how="left", suffixes=("", "_truth"))
    listed = now["change"] != "dropped"
    assert (now.loc[listed, "person_id_truth"] == now.loc[listed, "person_id"]).all()
    before = changes.rename(columns={"source_file": "s", "sheet": "t", "row": "u"}).rename(
        columns={f"previous_{k}": k for k in ("source_file", "sheet", "row")}).merge(
        load_truth("records.csv"), on=KEY, how="left", suffixes=("", "_truth"))
    had = before["change"] != "added"
    assert (before.loc[had, "person_id_truth"] == before.loc[had, "person_id"]).all()
    # the labelled injections are kept, at their new places
    inj = load_csv(out / "truth" / "injected.csv").merge(records, on=KEY, how="left", suffixes=("", "_truth"))
    assert len(inj) == len(load_truth("injected.csv"))
    assert (inj["person_id_truth"] == inj["person_id"]).all()
    # same people, each still with 2-5 records
    assert (out / "truth" / "persons.csv").read_bytes() == (SAMPLE / "truth" / "persons.csv").read_bytes()
    assert records["person_id"].value_counts().between(2, 5).all()


def test_production2_changes_what_it_says(production2):
    """~10% of the defects written right, a few rows new and dropped, rows shuffled, sheets reordered,
    the tracing export renamed, and every other row exactly as production 1 has it."""
    out, summary = production2
    changes = load_csv(out / "truth" / "changes.csv")
    counts = changes["change"].value_counts()
    assert 0.09 <= counts["corrected"] / len(load_truth("defects.csv")) <= 0.11
    assert counts["added"] >= 10 and counts["dropped"] >= 10
    assert summary["defects_corrected"] == counts["corrected"] and summary["rows_added"] >= 10
    old, new = delivery_rows(SAMPLE / "delivery"), delivery_rows(out / "delivery")
    renamed = {"family_tracing_2026.csv": ("family_tracing_2026-11-08.csv", "family_tracing_2026-11-08")}
    assert {renamed.get(f, (f, s)) for f, s in old} == set(new)
    for path in sorted((SAMPLE / "delivery").rglob("*.xlsx")):
        rel = path.relative_to(SAMPLE / "delivery")
        before, after = openpyxl.load_workbook(path, read_only=True), openpyxl.load_workbook(out / "delivery" / rel,
                                                                                           read_only=True)
        if len(before.sheetnames) > 1:
            assert sorted(after.sheetnames) == sorted(before.sheetnames) != after.sheetnames, rel
        before.close()
        after.close()
    # rows: production 1 without its dropped and corrected rows == production 2 without its new and
    # corrected rows, as multisets of cell values per sheet; and most rows have moved
    p1_out = changes[changes["change"] != "added"]
    p2_out = changes[changes["change"] != "dropped"]
    gone = {(f, s, int(r)) for f, s, r in p1_out[["previous_source_file", "previous_sheet", "previous_row"]].values}
    came = {(f, s, int(r)) for f, s, r in p2_out[["source_file", "sheet", "row"]].values}
    truth1, truth2 = load_truth("records.csv"), load_csv(out / "truth" / "records.csv")
    rows1 = {(f, s, int(r)) for f, s, r in truth1[["source_file", "sheet", "row"]].values}
    rows2 = {(f, s, int(r)) for f, s, r in truth2[["source_file", "sheet", "row"]].values}
    stayed = 0
    for (f, s), cells in old.items():
        f2, s2 = renamed.get(f, (f, s))
        kept1 = Counter(tuple(cells[r - 1]) for r in range(1, len(cells) + 1)
                        if (f, s, r) in rows1 and (f, s, r) not in gone)
        kept2 = Counter(tuple(new[f2, s2][r - 1]) for r in range(1, len(new[f2, s2]) + 1)
                        if (f2, s2, r) in rows2 and (f2, s2, r) not in came)
        assert kept1 == kept2, (f, s)
        stayed += sum(1 for r in range(1, min(len(cells), len(new[f2, s2])) + 1)
                      if (f, s, r) in rows1 and cells[r - 1] == new[f2, s2][r - 1])
    assert stayed < 0.1 * len(rows1)


def test_production2_is_read_with_every_row_accounted_for(production2):
    """The pipeline reads production 2 with its config: all rows ledgered, truth = records, fixes read right."""
    out, _ = production2
    res = run_pipeline(load_config(out / generate.PRODUCTION2_CONFIG))
    assert accounting_problems(delivery_rows(out / "delivery"), res.ledger, res.records) == []
    truth = pd.read_csv(out / "truth" / "records.csv", dtype={"row": int}, keep_default_na=False)
    assert set(map(tuple, truth[KEY].values)) == set(map(tuple, res.records[KEY].values))
    # a corrected cell reads as the person's true value
    from linker.normalize import normalize_name
    persons = load_truth("persons.csv").set_index("person_id")
    recs = res.records.astype(str).set_index(KEY)
    fixed = load_csv(out / "truth" / "changes.csv").query("change == 'corrected'")
    wrong = []
    for c in fixed.itertuples(index=False):
        rec, p = recs.loc[(c.source_file, c.sheet, c.row, c.slot)], persons.loc[c.person_id]
        if c.field == "reg_no":
            ok = rec["reg_no"] == p["reg_no"]
        elif c.field == "birth_date":
            ok = rec["birth_date"] == p["birth_date"]
        elif c.field == "sex":
            ok = rec["sex"] == p["sex"]
        else:
            ok = rec["name_key"] == normalize_name(p["given_name"], p["family_name"]).name_key
        if not ok:
            wrong.append((c.source_file, c.sheet, c.row, c.slot, c.field))
    assert len(fixed) > 200 and wrong == []
