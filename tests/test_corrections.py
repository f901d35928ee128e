"""Corrections file: reading and checking it, applying it at normalization, on the demo sample."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import openpyxl
import pandas as pd
import pytest

from linker import LinkerError, load_config
from linker.corrections import (APPLIED_COLUMNS, CORRECTION_COLUMNS, UNAPPLIED_COLUMNS, CorrectionsError,
                                apply_corrections, read_corrections)
from linker.fingerprint import record_fingerprints
from linker.pipeline import ingest_delivery
from linker.records import normalize_records
from linker.schema import RECORD_COLUMNS

ROOT = Path(__file__).resolve().parents[1]
HEADER = "source_file,sheet,row,slot,fingerprint,field,corrected_value,reason,who\n"


def write(path: Path, text: str, encoding: str = "utf-8") -> Path:
    path.write_bytes(text.encode(encoding))
    return path


# ---------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------
def test_read_provenance_and_fingerprint_lines(tmp_path):
    """Both ways of naming a record; line numbers count the header as 1; blank lines skipped."""
    path = write(tmp_path / "fix.csv", HEADER +
                 "custody.xlsx, Quarry Gate ,007,child,,Birth_Date,21/02/2015,typo confirmed,J. Arden\n"
                 ",,,,,,,,\n"
                 ",,,,F0123456789abcdef,sex,,code belongs to the parent,K. Osei\n")
    got = read_corrections(path)
    assert list(got.columns) == list(CORRECTION_COLUMNS)
    assert got["line"].tolist() == [2, 4]
    first, second = got.iloc[0], got.iloc[1]
    assert (first["sheet"], first["row"], first["field"]) == ("Quarry Gate", "7", "birth_date")
    assert first["fingerprint"] == "" and second["source_file"] == ""
    assert second["fingerprint"] == "F0123456789abcdef" and second["corrected_value"] == ""
    quoted = write(tmp_path / "quoted.csv", '"fingerprint","field","corrected_value","reason","who"\n'
                                            '"f0123456789ABCDEF","sex","M","checked",""\n')
    assert read_corrections(quoted).loc[0, "fingerprint"] == "F0123456789abcdef"


def test_read_only_provenance_columns_semicolons_and_cp1252(tmp_path):
    """A spreadsheet export: no fingerprint column, ';' between cells, cp1252 text."""
    path = write(tmp_path / "fix.csv",
                 "Source_File;Sheet;Row;Slot;Field;Corrected_Value;Reason;Who\n"
                 "t.csv;t;3;parent;given_name;José;spelling checked with the clinic; it was Jose;M. Núñez\n"
                 .replace("; it was", ", it was"), encoding="cp1252")
    got = read_corrections(path)
    assert got.loc[0, "corrected_value"] == "José" and got.loc[0, "who"] == "M. Núñez"
    assert got.loc[0, "reason"] == "spelling checked with the clinic, it was Jose"
    assert got.loc[0, "fingerprint"] == ""


def test_exact_repeats_are_read_once(tmp_path):
    path = write(tmp_path / "fix.csv", HEADER + "a.csv,a,2,child,,sex,F,checked,A\n"
                 "a.csv,a,2,child,,sex,F,checked again,B\n")
    got = read_corrections(path)
    assert got["line"].tolist() == [2] and got.loc[0, "reason"] == "checked"


@pytest.mark.parametrize("text, line, column, words", [
    ("source_file,sheet,row,slot,field,corrected_value,who\n", 1, None, "missing column(s): reason"),
    ("field,corrected_value,reason,who\n", 1, None, "fingerprint"),
    ("source_file,sheet,row,slot,field,corrected_value,reason,who,remark\n", 1, "remark", "unknown column"),
    (HEADER + "a.csv,a,2,child,,birthdate,2015-02-21,x,y\n", 2, "field", "unknown field 'birthdate'"),
    (HEADER + "a.csv,a,2,child,,sex,,,K. Osei\n", 2, "reason", "needs a reason"),
    (HEADER + "a.csv,a,2,child,,sex,F,x,y\n\na.csv,a,2,child,,sex,M,x,y\n", 4, "corrected_value", "line 2"),
    (HEADER + "a.csv,a,2,child,F0123456789abcdef,sex,F,x,y\n", 2, "fingerprint", "not both"),
    (HEADER + "a.csv,a,,child,,sex,F,x,y\n", 2, "row", "needs source_file"),
    (HEADER + "a.csv,a,two,child,,sex,F,x,y\n", 2, "row", "row number"),
    (HEADER + ",,,,F0123,sex,F,x,y\n", 2, "fingerprint", "16 hex digits"),
    (HEADER + ",,,,F0123456789abcdeg,sex,F,x,y\n", 2, "fingerprint", "16 hex digits"),
    (HEADER + "a.csv,a,2,child,,sex,F,x,y,extra\n", 2, None, "10 cells"),
    ("", 1, None, "empty"),
])
def test_read_errors_name_file_line_and_column(tmp_path, text, line, column, words):
    """Each problem is a CorrectionsError (a LinkerError) naming the file, its line and column."""
    path = write(tmp_path / "fix.csv", text)
    with pytest.raises(CorrectionsError) as info:
        read_corrections(path)
    err = info.value
    assert isinstance(err, LinkerError)
    assert (err.line, err.column) == (line, column)
    message = str(err)
    assert message.startswith(f"{path}, line {line}") and words in message
    if column:
        assert f"column {column!r}" in message


def test_unreadable_file_is_named(tmp_path):
    with pytest.raises(CorrectionsError, match="cannot open"):
        read_corrections(tmp_path / "absent.csv")


# ---------------------------------------------------------------------------
# Applying, on a small delivery
# ---------------------------------------------------------------------------
def _small_delivery(project):
    root, write_config = project
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "Quarry Gate"
    ws.append(["Child first name", "Child last name", "Child DOB", "Child Reg No", "Child sex",
               "Parent name", "Parent Reg No", "Intake date"])
    ws.append(["Ana", "Ferro", "31/02/2015", "HR-0412-3385", "F", "FERRO, Lidia", 6103451,
               dt.date(2026, 5, 1)])                                                    # row 2
    ws.append(["Tomas", "Ferro", "04/03/2017", "HR-0412-3385", "M", "VELL, Marta", "HR-0412-3385",
               dt.date(2026, 5, 2)])                                                    # row 3
    ws.append(["Ana", "Ferro", "31/02/2015", "HR-0412-3385", "F", "", "", dt.date(2026, 6, 1)])  # row 4
    wb.save(root / "delivery" / "custody.xlsx")
    cfg = load_config(write_config())
    raw = ingest_delivery(cfg)[0]
    return root, cfg, raw, normalize_records(raw, cfg)


def _lines(root: Path, body: str) -> pd.DataFrame:
    return read_corrections(write(root / "corrections.csv", HEADER + body))


def _rec(records: pd.DataFrame, row: int, slot: str) -> pd.Series:
    hit = records[(records["row"] == row) & (records["slot"] == slot)]
    assert len(hit) == 1
    return hit.iloc[0]


def test_provenance_correction_replaces_the_cell_and_keeps_the_delivered_value(project):
    root, cfg, raw, base = _small_delivery(project)
    assert _rec(base, 2, "child")["birth_date"] == ""              # 31/02 is no date
    fix = _lines(root, "custody.xlsx,Quarry Gate,2,child,,birth_date,21/02/2015,"
                       "typo confirmed by the office,J. Arden\n")
    res = apply_corrections(raw, fix, cfg)
    rec = _rec(res.records, 2, "child")
    assert rec["birth_date"] == "2015-02-21" and rec["birth_year"] == 2015
    assert rec["birth_date_raw"] == "31/02/2015"
    assert rec["corrections"] == ("birth_date: '31/02/2015' -> '21/02/2015' "
                                  "(typo confirmed by the office; J. Arden)")
    assert "birth_date" not in rec["notes"]                       # the impossible-date note is gone
    assert list(res.records.columns) == list(RECORD_COLUMNS)
    assert res.records.dtypes.equals(base.dtypes)
    # nothing else changed: every other record and every other column of this one
    others = res.records["record_id"] != rec["record_id"]
    pd.testing.assert_frame_equal(res.records[others], base[others])
    assert list(res.applied.columns) == list(APPLIED_COLUMNS)
    line = res.applied.iloc[0]
    assert (line["line"], line["record_id"], line["delivered_value"]) == (2, rec["record_id"], "31/02/2015")
    assert line["fingerprint"] == record_fingerprints(base)[base["record_id"] == rec["record_id"]].iloc[0]
    assert res.unapplied.empty and res.warnings == []
    # the normalize stage hook gives the same table
    pd.testing.assert_frame_equal(normalize_records(raw, cfg, corrections=fix), res.records)
    assert (base["corrections"] == "").all()


def test_fingerprint_correction_applies_to_every_record_with_that_fingerprint(project):
    root, cfg, raw, base = _small_delivery(project)
    fps = record_fingerprints(base)
    twin = fps[(base["row"] == 2) & (base["slot"] == "child")].iloc[0]
    assert (fps == twin).sum() == 2                                # rows 2 and 4 show the same child
    res = apply_corrections(raw, _lines(root, f",,,,{twin},birth_date,2015-02-21,office,\n"), cfg)
    fixed = res.records[res.records["corrections"] != ""]
    assert sorted(fixed["row"]) == [2, 4]
    assert (fixed["birth_date"] == "2015-02-21").all()
    assert (fixed["corrections"] == "birth_date: '31/02/2015' -> '2015-02-21' (office)").all()
    assert len(res.applied) == 2


def test_unmatched_corrections_are_returned_not_ignored(project):
    root, cfg, raw, base = _small_delivery(project)
    fix = _lines(root, "custody.xlsx,Quarry Gate,99,child,,sex,F,x,y\n"
                       ",,,,F0000000000000000,sex,M,x,y\n"
                       "custody.xlsx,Quarry Gate,3,child,,sex,F,x,y\n")
    res = apply_corrections(raw, fix, cfg, records=base, source="corrections.csv")
    assert list(res.unapplied.columns) == list(UNAPPLIED_COLUMNS)
    assert res.unapplied["line"].tolist() == [2, 3]
    assert res.unapplied["problem"].tolist() == ["no record at this source_file, sheet, row and slot",
                                                 "no record has this fingerprint"]
    assert res.warnings == [
        "corrections.csv, line 2: the correction of sex was not applied: no record at this source_file, "
        "sheet, row and slot",
        "corrections.csv, line 3: the correction of sex was not applied: no record has this fingerprint"]
    assert _rec(res.records, 3, "child")["sex"] == "F"             # line 4 still applies


def test_correcting_a_borrowed_number_clears_the_shared_flag_of_the_row(project):
    """Row 3 shows the parent's number for the child; the fix reaches the parent's record too."""
    root, cfg, raw, base = _small_delivery(project)
    assert _rec(base, 3, "child")["reg_no_shared"] and _rec(base, 3, "parent")["reg_no_shared"]
    res = apply_corrections(raw, _lines(root, "custody.xlsx,Quarry Gate,3,child,,reg_no,HR-0000-0000,"
                                              "number checked in the register,A. Lind\n"), cfg)
    child, parent = _rec(res.records, 3, "child"), _rec(res.records, 3, "parent")
    assert child["reg_no_raw"] == "HR-0412-3385" and child["reg_no_status"] == "invalid"
    assert not child["reg_no_shared"] and not parent["reg_no_shared"]
    assert "another person" not in parent["notes"] and parent["corrections"] == ""


def test_name_corrections_must_target_the_cell_the_name_comes_from(project):
    """The parent's name comes from a full-name cell: given_name is refused, full_name applies."""
    root, cfg, raw, base = _small_delivery(project)
    fix = _lines(root, "custody.xlsx,Quarry Gate,2,parent,,given_name,Lydia,x,y\n"
                       "custody.xlsx,Quarry Gate,2,child,,full_name,Anna Ferro,x,y\n"
                       "custody.xlsx,Quarry Gate,3,parent,,full_name,\"VELL SORO, Marta\",x,y\n")
    res = apply_corrections(raw, fix, cfg)
    assert res.unapplied["line"].tolist() == [2, 3]
    assert "correct full_name instead" in res.unapplied.loc[0, "problem"]
    assert "correct given_name or family_name instead" in res.unapplied.loc[1, "problem"]
    parent = _rec(res.records, 3, "parent")
    assert parent["family_name"] == "VELL SORO" and parent["full_name_raw"] == "VELL, Marta"


def test_blanking_a_cell_and_correcting_an_event_field_of_one_slot(project):
    root, cfg, raw, base = _small_delivery(project)
    fix = _lines(root, "custody.xlsx,Quarry Gate,2,child,,sex,,the code was the parent's,K. Osei\n"
                       "custody.xlsx,Quarry Gate,2,child,,intake_date,2026-05-03,log book,K. Osei\n")
    res = apply_corrections(raw, fix, cfg)
    child, parent = _rec(res.records, 2, "child"), _rec(res.records, 2, "parent")
    assert child["sex"] == "" and child["sex_raw"] == "F"
    assert child["intake_date"] == "2026-05-03" and parent["intake_date"] == "2026-05-01"
    assert child["corrections"] == ("sex: 'F' -> '' (the code was the parent's; K. Osei) | "
                                    "intake_date: '2026-05-01' -> '2026-05-03' (log book; K. Osei)")


def test_corrected_date_is_read_with_the_order_of_its_sheet(project):
    """'03/04/2017' alone is ambiguous; the sheet's other values show day first (31/02), so no note."""
    root, cfg, raw, base = _small_delivery(project)
    res = apply_corrections(raw, _lines(root, "custody.xlsx,Quarry Gate,3,child,,birth_date,03/04/2017,"
                                              "x,y\n"), cfg)
    rec = _rec(res.records, 3, "child")
    assert rec["birth_date"] == "2017-04-03" and "ambiguous" not in rec["notes"]


def test_two_ways_to_one_cell(project):
    """A fingerprint line and a provenance line for one cell: one value applies once, two raise."""
    root, cfg, raw, base = _small_delivery(project)
    fp = record_fingerprints(base)[(base["row"] == 3) & (base["slot"] == "child")].iloc[0]
    same = _lines(root, f",,,,{fp},sex,F,x,y\ncustody.xlsx,Quarry Gate,3,child,,sex,F,x,y\n")
    res = apply_corrections(raw, same, cfg)
    assert res.applied["line"].tolist() == [2] and _rec(res.records, 3, "child")["corrections"].count("sex") == 1
    clash = _lines(root, f",,,,{fp},sex,F,x,y\ncustody.xlsx,Quarry Gate,3,child,,sex,U,x,y\n")
    with pytest.raises(CorrectionsError, match="line 2 name the same record") as info:
        apply_corrections(raw, clash, cfg)
    assert info.value.line == 3 and str(info.value).startswith(str(root / "corrections.csv"))


def test_no_corrections_change_nothing(project):
    root, cfg, raw, base = _small_delivery(project)
    none = read_corrections(write(root / "c.csv", HEADER))
    assert none.empty
    res = apply_corrections(raw, none, cfg)
    pd.testing.assert_frame_equal(res.records, base)
    pd.testing.assert_frame_equal(normalize_records(raw, cfg, corrections=none), base)
    assert res.applied.empty and res.unapplied.empty


# ---------------------------------------------------------------------------
# On the demo sample
# ---------------------------------------------------------------------------
def test_correcting_a_known_defect_of_the_demo_sample(tmp_path):
    """A birth date written day-and-month swapped (truth/defects.csv), corrected by provenance."""
    defects = pd.read_csv(ROOT / "sample" / "truth" / "defects.csv", dtype=str, keep_default_na=False)
    d = defects[(defects["kind"] == "day and month swapped")
                & (defects["source_file"] == "family_tracing_2026.csv")].iloc[0]
    true = dt.date.fromisoformat(d["true_value"])
    cfg = load_config(ROOT / "configs" / "sample.toml")
    raw = ingest_delivery(cfg)[0]
    base = normalize_records(raw, cfg)
    key = ["source_file", "sheet", "row", "slot"]
    where = (base[key].astype(str) == [d["source_file"], d["sheet"], d["row"], d["slot"]]).all(axis=1)
    before = base[where].iloc[0]
    assert before["birth_date"] == d["written"]                     # the defect as delivered
    written = f"{true.day:02d}/{true.month:02d}/{true.year}"         # the file writes dd/mm/yyyy
    fix = read_corrections(write(tmp_path / "c.csv", HEADER +
                                 f"{d['source_file']},{d['sheet']},{d['row']},{d['slot']},,birth_date,"
                                 f"{written},day and month swapped at intake,T. Reyes\n"))
    res = apply_corrections(raw, fix, cfg, records=base)
    after = res.records[where].iloc[0]
    assert after["birth_date"] == d["true_value"]
    assert after["birth_date_raw"] == before["birth_date_raw"] != written
    assert after["corrections"] == (f"birth_date: {before['birth_date_raw']!r} -> {written!r} "
                                    "(day and month swapped at intake; T. Reyes)")
    assert (res.records["corrections"] != "").sum() == 1 and res.unapplied.empty
