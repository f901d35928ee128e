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
