"""Ingest: header detection, row classification, two-person rows, ledger, bad files."""

from __future__ import annotations

import datetime as dt

import openpyxl
import pandas as pd
import pytest

from linker import InputError, load_config, run_pipeline, write_outputs
from linker.cli import main
from linker.ingest import column_letter


def _custody_workbook(path):
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "Quarry Gate"
    ws.append(["Holding log, Quarry Gate station"])                       # 1 title
    ws.append(["Prepared for the monitor; figures provisional"])          # 2 notes
    ws.append([])                                                          # 3 blank
    ws.append(["Child first name", "Child last name", "Child DOB", "Child Reg No",
               "Parent name", "Parent Reg No", "Intake date", "Officer remarks"])  # 4 header
    ws.append(["Ana", "Ferro", dt.date(2019, 3, 4), "HR-0412-3385", "FERRO, Lidia",
               4123385, dt.date(2026, 5, 1), "quiet"])                    # 5 two persons
    ws.append(["Tomas", "Ferro", "04/03/2017", "", "", "", "2026-05-01", ""])  # 6 child only
    ws.append([])                                                          # 7 blank
    ws.append(["Child first name", "Child last name", "Child DOB", "Child Reg No",
               "Parent name", "Parent Reg No", "Intake date", "Officer remarks"])  # 8 repeat
    ws.append(["", "", "", "", "VELL, Marta", "NM 0412 3385", "", ""])   # 9 parent only
    ws.append(["Total", "", "", "", "", "", "", "3"])                     # 10 total
    wb.create_sheet("Empty")
    wb.save(path)


def test_rows_classified_and_every_row_ledgered(project):
    """Every row of a messy sheet gets one ledger line; persons become records with provenance."""
    root, write = project
    _custody_workbook(root / "delivery" / "custody.xlsx")
    res = run_pipeline(load_config(write()))
    led = res.ledger[res.ledger["sheet"] == "Quarry Gate"].set_index("row")
    assert list(led.index) == list(range(1, 11))
    assert led.loc[1, "reason"].startswith("above the header")
    assert led.loc[3, "reason"] == "blank row"
    assert led.loc[4, "outcome"] == "header"
    assert led.loc[5, "records"] == 2 and led.loc[6, "records"] == 1
    assert led.loc[8, "reason"] == "repeated header row"
    assert led.loc[10, "reason"] == "total row"
    empty = res.ledger[res.ledger["sheet"] == "Empty"]
    assert list(empty["outcome"]) == ["empty sheet"]
    recs = res.records.set_index(["row", "slot"])
    assert len(recs) == 4
    assert recs.loc[(5, "child"), "reg_no"] == "04123385"
    assert recs.loc[(5, "parent"), "reg_no"] == "04123385"        # numeric cell, zero restored
    assert recs.loc[(5, "parent"), "family_name"] == "FERRO"
    assert recs.loc[(5, "parent"), "given_name"] == "LIDIA"
    assert recs.loc[(5, "child"), "birth_date"] == "2019-03-04"
    assert recs.loc[(5, "child"), "intake_date"] == "2026-05-01"  # event field reaches both
    assert recs.loc[(5, "parent"), "intake_date"] == "2026-05-01"
    assert recs.loc[(5, "child"), "extras"] == '{"Officer remarks": "quiet"}'
    assert recs.loc[(9, "parent"), "source_file"] == "custody.xlsx"
    assert (res.records["reg_no_shared"] == res.records["row"].eq(5)).all()
    assert len(res.claims) == 1
    cols = res.columns.set_index("header")
    assert cols.loc["Officer remarks", "mapped_to"] == "extra"
    assert cols.loc["Child DOB", "mapped_to"] == "child.birth_date"


def test_member_type_column_decides_slot(project):
    """A one-person-per-row CSV with generic headers: a column's value decides the slot."""
    root, write = project
    text = ("Family,Member Type,Name,DOB,Reg. No.,Sex\r\n"
            "F1,Child,Núñez Ana,04/03/2019,04123385,F\r\n"
            "F1,Parent,Núñez Lidia,1/12/1990,,f\r\n"
            "F1,Cousin,Núñez Pia,1/1/2000,,f\r\n")
    (root / "delivery" / "tracing.csv").write_bytes(text.encode("cp1252"))
    cfg = load_config(write('\n[[sheets]]\nfile = "tracing*"\nslot_column = "member type"\n'
                            'slot_values = { child = "child", parent = "parent" }\n'
                            '\n[names]\nfull_name_order = "family_first"\n'))
    res = run_pipeline(cfg)
    assert res.files.loc[0, "encoding"] == "cp1252"
    recs = res.records.set_index("row")
    assert recs.loc[2, "slot"] == "child" and recs.loc[3, "slot"] == "parent"
    assert recs.loc[2, "family_name"] == "NUNEZ" and recs.loc[2, "given_name"] == "ANA"
    assert recs.loc[2, "birth_date"] == "2019-03-04"   # 1/12/1990 proves day-first
    led = res.ledger.set_index("row")
    assert "Cousin" in led.loc[4, "reason"] and led.loc[4, "outcome"] == "skipped"
    assert sheet_rows_covered(res.ledger, "tracing.csv", "tracing", 4)


def test_generic_person_headers_without_rule_are_reported(project):
    """Generic person headers on a sheet no rule describes are kept as extras and reported."""
    root, write = project
    (root / "delivery" / "x.csv").write_text("Name,DOB,Station\nAna Vell,2019-03-04,Saltreach\n",
                                             encoding="utf-8-sig")
    res = run_pipeline(load_config(write()))
    assert res.files.loc[0, "encoding"] == "utf-8-sig"
    assert res.records.empty
    note = res.columns.set_index("header").loc["Name", "note"]
    assert "no sheet rule" in note
    assert res.ledger.set_index("row").loc[2, "outcome"] == "skipped"


def sheet_rows_covered(ledger, source_file, sheet, n_rows):
    rows = ledger[(ledger["source_file"] == source_file) & (ledger["sheet"] == sheet)]["row"]
    return sorted(rows.tolist()) == list(range(1, n_rows + 1))


@pytest.mark.parametrize("content, reason", [
    (b"this is not a zip file at all", "not a valid .xlsx"),
    (b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + b"\0" * 600, "password-protected"),
    (b"PK\x03\x04broken archive", "cannot be read"),
])
def test_unreadable_workbook_is_an_error_naming_the_file(project, content, reason, capsys):
    """A corrupt or protected workbook stops the run with its name, exit 3, and no outputs."""
    root, write = project
    _custody_workbook(root / "delivery" / "good.xlsx")
    (root / "delivery" / "bad.xlsx").write_bytes(content)
    cfg_path = write()
    with pytest.raises(InputError, match=reason) as info:
        run_pipeline(load_config(cfg_path))
    assert "bad.xlsx" in str(info.value)
    out = root / "out"
    assert main(["run", str(cfg_path), "--out", str(out), "--quiet"]) == 3
    err = capsys.readouterr().err
    assert "bad.xlsx" in err and "Traceback" not in err
    assert not out.exists()


def test_skip_unreadable_lists_the_file_in_the_ledger(project):
    """With the skip option a bad file becomes a ledger line and the rest is read."""
    root, write = project
    _custody_workbook(root / "delivery" / "good.xlsx")
    (root / "delivery" / "bad.xlsx").write_bytes(b"garbage")
    res = run_pipeline(load_config(write()), skip_unreadable=True)
    line = res.ledger[res.ledger["source_file"] == "bad.xlsx"]
    assert list(line["outcome"]) == ["file skipped"]
    assert len(res.records) == 4
    assert res.files.set_index("source_file").loc["bad.xlsx", "status"].startswith("skipped")


def test_outputs_written(project):
    """The run writes its tables; records.csv carries the provenance columns."""
    root, write = project
    _custody_workbook(root / "delivery" / "custody.xlsx")
    res = run_pipeline(load_config(write()))
    written = write_outputs(res, root / "out")
    names = {p.name for p in written}
    assert {"records.csv", "ledger.csv", "files.csv", "run.json", "claims.csv"} <= names
    recs = pd.read_csv(root / "out" / "records.csv", dtype=str, keep_default_na=False)
    assert list(recs.columns[:6]) == ["record_id", "entity_id", "row_key", "source_file", "sheet", "row"]
    assert recs["record_id"].is_unique


def test_column_letters():
    """Column indexes read as spreadsheet letters (common practice: A..Z, AA..)."""
    assert [column_letter(i) for i in (0, 25, 26, 701, 702)] == ["A", "Z", "AA", "ZZ", "AAA"]


def _totals_workbook(path):
    """A log whose total rows carry their label in the first cell or in a name column."""
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "Log"
    ws.append(["Station", "Child first name", "Child last name", "Child age", "Child Reg No",
               "Parent name", "Officer remarks"])                                   # 1 header
    ws.append(["Quarry Gate", "Ana", "Ferro", 7, "HR-0412-3385", "FERRO, Lidia",
               "total of 2 siblings"])                                              # 2 persons
    ws.append(["Quarry Gate", "Total", "", 57, "", "", ""])                         # 3
    ws.append(["Quarry Gate", "", "TOTAL", "", 57, "", ""])                         # 4
    ws.append(["Linden Ford", "Total children", "", 12, "", "", ""])               # 5
    ws.append(["Linden Ford", "", "", "", 69, "Grand total", ""])                   # 6
    ws.append(["Total: 57", "", "", "", "", "", ""])                                # 7
    ws.append(["", "Totals", "", 57, "", "", ""])                                   # 8
    ws.append(["Saltreach", "Sub-total", "", 5, "", "", ""])                        # 9
    ws.append(["Saltreach", "", "Totaux", 3, "", "", ""])                           # 10
    ws.append(["Saltreach", "", "", "", "", "GRAND TOTAL: 69", ""])                 # 11
    ws.append(["Saltreach", "Pia", "Totaro", 4, "", "", ""])                        # 12 a person
    wb.save(path)


def test_total_rows_with_counts_make_no_records(project):
    """Total rows (label in the first cell or a name column, a count elsewhere) are ledgered, not persons."""
    root, write = project
    _totals_workbook(root / "delivery" / "log.xlsx")
    res = run_pipeline(load_config(write()))
    assert sheet_rows_covered(res.ledger, "log.xlsx", "Log", 12)
    led = res.ledger.set_index("row")
    totals = [3, 4, 5, 6, 7, 8, 9, 10, 11]
    assert list(led.loc[totals, "reason"]) == ["total row"] * len(totals)
    assert (led.loc[totals, "outcome"] == "skipped").all()
    assert (led.loc[totals, "records"] == 0).all()
    assert sorted(set(res.records["row"])) == [2, 12]           # remarks saying "total" do not matter
    assert led.loc[2, "records"] == 2 and led.loc[12, "records"] == 1
    assert res.records.set_index("row").loc[12, "family_name"] == "TOTARO"


# ---------------------------------------------------------------------------
# ingest_sheet works column-wise; these tests hold it to the per-row rules
# ---------------------------------------------------------------------------
_RULE_CONFIG = """
[delivery]
folder = "."
[identifier]
digits = 8
[dates]
as_of = "2026-11-01"
[slots.child.columns]
reg_no = ["child reg no"]
given_name = ["child first name"]
family_name = ["child last name"]
age = ["child age"]
[slots.parent.columns]
reg_no = ["parent reg no"]
full_name = ["parent name"]
[fields]
reg_no = ["reg no"]
full_name = ["name"]
sex = ["sex"]
intake_date = ["intake date"]
location = ["station"]
[[relations]]
child = "child"
parent = "parent"
"""
_RULES = ["", '[[sheets]]\nfile = "*"\nslot_column = "member type"\n'
              'slot_values = { child = "child", parent = "parent", kid = "child" }\n',
          '[[sheets]]\nfile = "*"\nslot = "parent"\n']
_HEADERS = ["Child first name", "Child last name", "Child age", "Child Reg No", "Parent name", "Parent Reg No",
            "Intake date", "Station", "Remarks", "Remarks", "", "column K", "Name", "Reg No", "Member Type"]
_CELLS = ["Ana", "  Ferro ", "\xa0Vell\xa0", "Total", "TOTAL: 5", "Grand total", "Sub-total", "Totaux", "Totaro",
          "T'otal", "ＴＯＴＡＬ", "Notes: none", "Source: office", "SUM", "child", "Kid", "Parent", "cousin",
          "CHILD FIRST NAME", "parent NAME", "ΟΔΟΣ", "İlke", "nul\x00in", "\x00", "", " ", "\t", "O'Brien",
          'q"uote', "line\nbreak", "04123385", "=1+2"]
_TYPED = [None, float("nan"), 7.0, 3.5, True, dt.datetime(2019, 3, 4), dt.date(2020, 1, 2), 1e16]


def _messy_sheet(rng):
    """A sheet of invented cells: title rows, a header, then blank, repeated-header, total,
    notes, ragged and typed rows."""
    width = rng.randint(1, 10)
    header = [rng.choice(_HEADERS) for _ in range(width)]
    typed = rng.random() < 0.5

    def cell():
        r = rng.random()
        return "" if r < 0.3 else rng.choice(_TYPED) if typed and r < 0.45 else rng.choice(_CELLS)

    rows = [[cell() for _ in range(rng.randint(0, width))] for _ in range(rng.randint(0, 2))] + [header]
    for _ in range(rng.randint(0, 25)):
        r = rng.random()
        rows.append([] if r < 0.05 else [x.upper() for x in header] if r < 0.1 else
                    [cell() for _ in range(width if r < 0.8 else rng.randint(0, width + 2))])
    return [tuple(r) for r in rows] if rng.random() < 0.5 else rows


def _row_by_row(cfg, source_file, sheet):
    """The per-row reading of a sheet with a header: ledger lines, records, claims."""
    import json
    from linker import ingest as ing

    settings = cfg.settings_for(source_file, sheet.name)
    rows = sheet.rows
    width = max(map(len, rows), default=0)
    texts = [[ing.cell_text(v) for v in r] + [""] * (width - len(r)) for r in rows]
    h, _ = ing.find_header(texts, ing._vocabulary(settings), settings, cfg.min_header_matches)
    header = texts[h]
    mapping, _, slot_col = ing.map_columns(header, ing._vocabulary(settings), settings)
    slots = sorted({o for o, _ in mapping.values() if o not in ("", ing.ALL_SLOTS)} |
                   (set(settings.slot_values.values()) if slot_col is not None else set()))
    label_cols = [c for c, (_, f) in mapping.items() if f in ing.IDENTITY_FIELDS] + \
        ([slot_col] if slot_col is not None else [])
    n_header = len([t for t in header if t])
    ledger = [(i + 1, "skipped", "above the header row (title or notes)" if any(texts[i]) else "blank row", 0)
              for i in range(h)] + [(h + 1, "header", "header row", 0)]
    records, claims = [], []
    for i in range(h + 1, len(rows)):
        t, rownum = texts[i], i + 1
        if not any(t):
            ledger.append((rownum, "skipped", "blank row", 0))
            continue
        if sum(1 for c, x in enumerate(t) if x and x.lower() == header[c].lower()) >= max(2, (n_header + 1) // 2):
            ledger.append((rownum, "skipped", "repeated header row", 0))
            continue
        first = next(x for x in t if x)
        if ing.fold_text(first).startswith(("TOTAL", "SUBTOTAL", "GRAND TOTAL")) or \
                any(ing.is_total_label(t[c]) for c in label_cols):
            ledger.append((rownum, "skipped", "total row", 0))
            continue
        row_slot = settings.slot_values.get(ing.fold_text(t[slot_col]).lower()) if slot_col is not None else None
        present = {row_slot if o == "" else o for c, (o, f) in mapping.items()
                   if f in ing.IDENTITY_FIELDS and t[c] and (row_slot if o == "" else o) is not None}
        if slot_col is not None and row_slot is None and any(
                t[c] for c, (o, f) in mapping.items() if o == "" and f in ing.IDENTITY_FIELDS):
            ledger.append((rownum, "skipped", f"column {column_letter(slot_col)} value {t[slot_col]!r} names no "
                                              f"configured person (known: {', '.join(sorted(settings.slot_values))})", 0))
            continue
        if not present:
            ledger.append((rownum, "skipped", ing._is_total_or_note(t), 0))
            continue
        extras = {header[c]: t[c] for c in range(width) if c not in mapping and c != slot_col and header[c] and t[c]}
        extras.update({f"column {column_letter(c)}": t[c] for c in range(width) if not header[c] and t[c]})
        made = {}
        for slot in (s for s in slots if s in present):
            rec = {"record_id": ing.stable_id(source_file, sheet.name, rownum, slot),
                   "row_key": ing.stable_id(source_file, sheet.name, rownum, prefix="W"),
                   "source_file": source_file, "sheet": sheet.name, "row": rownum,
                   "slot": slot, "extras": json.dumps(extras, ensure_ascii=False, sort_keys=True) if extras else ""}
            for c, (o, f) in mapping.items():
                if o in (ing.ALL_SLOTS, slot) or (o == "" and row_slot == slot):
                    rec[f + "_obj"] = rows[i][c] if c < len(rows[i]) else None
            records.append(rec)
            made[slot] = rec["record_id"]
        claims += [(made[a], made[b], rownum) for a, b in cfg.relations if a in made and b in made]
        ledger.append((rownum, "record", "persons: " + ", ".join(made), len(made)))
    return ledger, records, claims


def test_column_wise_ingest_follows_the_row_rules():
    """On seeded messy sheets (ragged rows, typed cells, NUL, sigma, spaces, totals, repeated
    headers) the column-wise ingest gives the lines, records and claims of the per-row rules."""
    import random
    import tomllib

    from linker.config import parse_config
    from linker.ingest import ingest_sheet
    from linker.io import SheetData

    rng = random.Random(20261202)
    cfgs = [parse_config(tomllib.loads(_RULE_CONFIG + rule)) for rule in _RULES]
    checked = {"records": 0, "claims": 0, "sheets": 0}
    for _ in range(300):
        cfg, sheet = rng.choice(cfgs), SheetData(rng.choice(["Log", "Été"]), _messy_sheet(rng))
        res = ingest_sheet(cfg, "d/x.xlsx", sheet)
        if res.columns.empty:                                   # no header found: not the path under test
            continue
        ledger, records, claims = _row_by_row(cfg, "d/x.xlsx", sheet)
        assert list(res.ledger[["row", "outcome", "reason", "records"]].itertuples(index=False, name=None)) == ledger
        expected = pd.DataFrame(records, columns=list(res.records.columns[:-3]))
        got = res.records.iloc[:, :-3]
        pd.testing.assert_frame_equal(got, expected)            # values and dtypes as a frame built from rows
        assert (got.map(lambda v: v is None) == expected.map(lambda v: v is None)).all().all()
        assert list(res.claims[["child_record_id", "parent_record_id", "row"]].itertuples(index=False,
                                                                                         name=None)) == claims
        checked["sheets"] += 1
        checked["records"] += len(records)
        checked["claims"] += len(claims)
    assert checked["sheets"] > 100 and checked["records"] > 200 and checked["claims"] > 10, checked


def test_strip_detection_knows_every_space():
    """The column-wise strip looks for exactly the characters str.strip() removes."""
    from linker.ingest import _SPACES

    spaces = "".join(chr(c) for c in range(0x110000) if chr(c).isspace())
    assert _SPACES == spaces
    assert all(ch.strip() == "" for ch in spaces)
