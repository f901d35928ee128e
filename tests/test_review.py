"""The review workbook: which pairs, their order, the protected sheet, and reading decisions back."""

from __future__ import annotations

import zipfile
from pathlib import Path

import openpyxl
import pandas as pd
import pytest

from linker.errors import LinkerError
from linker.fingerprint import pair_key, record_fingerprints
from linker.review import (
    CHECK,
    DECISION_LABELS,
    PAIRS_TITLE,
    README_TITLE,
    ReviewError,
    read_review,
    review_lines,
    review_pairs,
    write_review,
)
from linker.schema import FINDING_COLUMNS

ROOT = Path(__file__).resolve().parents[1]


# ---------------------------------------------------------------------------
# A small constructed case (fictional Northern March style values, no real persons)
# ---------------------------------------------------------------------------
def record(record_id, entity_id, slot, given, family, birth, source_file, sheet, row, **extra):
    base = {"record_id": record_id, "entity_id": entity_id, "source_file": source_file, "sheet": sheet,
            "row": str(row), "slot": slot, "reg_no": "", "given_name": given, "family_name": family,
            "birth_date": birth, "birth_date_min": "", "birth_date_max": "", "sex": ""}
    base.update(extra)
    return base


@pytest.fixture
def records():
    return pd.DataFrame([
        record("R1", "E1", "child", "ALDA", "VORNET", "2019-04-03", "omc_placements_2026.xlsx",
               "Placements", 10),
        record("R2", "E1", "child", "ALDA", "VORNET", "", "nmha/nmha_custody_log_2026.xlsx", "Log", 4,
               birth_date_min="2018-11-02", birth_date_max="2019-11-01"),
        record("R3", "E2", "parent", "MIRA", "KASTEL", "1990-01-05", "family_tracing_2026.csv",
               "family_tracing_2026", 7),
        record("R4", "E3", "parent", "MIRA", "KASTELL", "1990-01-05", "legal_aid_intake_2026.xlsx",
               "Intake", 3),
        record("R5", "E3", "parent", "=CMD()", "KASTELL", "1990-05-01", "legal_aid_intake_2026.xlsx",
               "+Intake", 5),
        record("R6", "E3", "parent", "BERO", "KASTEL", "1988-07-07", "legal_aid_intake_2026.xlsx",
               "Intake", 8),
        record("R7", "E4", "child", "BERO", "KASTEL", "2018-07-07", "omc_placements_2026.xlsx",
               "Placements", 12),
    ])


def pair(a, b, decision, probability, given=("exact", 6.0), birth=("exact", 5.0)):
    return {"record_a": a, "record_b": b, "decision": decision, "probability": probability,
            "weight": round(given[1] + birth[1] - 10.0, 4),
            "given_name_level": given[0], "given_name_weight": given[1],
            "birth_date_level": birth[0], "birth_date_weight": birth[1],
            "prior_weight": -10.0, "guard_weight": 0.0, "rules": "name_window"}


@pytest.fixture
def pairs():
    return pd.DataFrame([
        pair("R1", "R2", "link", 0.98, birth=("age_consistent", 1.5)),   # error finding on R1, children
        pair("R3", "R4", "review", 0.55, given=("exact", 6.0)),         # parents, entity sizes 1 + 3
        pair("R4", "R5", "link", 0.95, given=("different", -4.0)),      # warning finding on R5, sizes 3 + 3
        pair("R3", "R6", "review", 0.30, given=("different", -4.0)),    # sizes 1 + 3, farther from 0.5
        pair("R6", "R7", "review", 0.45, birth=("one_component", 2.0)),  # a child record
        pair("R4", "R6", "link", 0.97),                                 # linked, no finding: not shown
        pair("R2", "R3", "non-link", 0.01),                             # not shown
    ])


def finding(rule, severity, entity_id, record_id, source_file, sheet, row, slot, detail):
    return dict(zip(FINDING_COLUMNS,
                    (rule, severity, entity_id, record_id, source_file, sheet, str(row), slot, detail)))


@pytest.fixture
def findings():
    return pd.DataFrame([
        finding("release_before_intake", "error", "E1", "R1", "omc_placements_2026.xlsx", "Placements", 10,
                "child", "release 2026-01-03 before intake 2026-02-10"),
        finding("sex_conflict", "warning", "E3", "R5", "legal_aid_intake_2026.xlsx", "+Intake", 5,
                "parent", "sex F here, M elsewhere"),
    ])


def pid(records, a, b):
    fp = dict(zip(records["record_id"], record_fingerprints(records)))
    return pair_key(fp[a], fp[b])


ORDER = [("R1", "R2"), ("R6", "R7"), ("R4", "R5"), ("R3", "R4"), ("R3", "R6")]


# ---------------------------------------------------------------------------
# Which pairs, in which order
# ---------------------------------------------------------------------------
def test_review_pairs_and_links_touching_findings_most_consequential_first(records, pairs, findings):
    table = review_pairs(records, pairs, findings)
    # error finding (R1-R2), then a child (R6-R7), then entity sizes 6 (R4-R5) over 4,
    # then probability nearer 0.5 (0.55 before 0.30)
    assert list(zip(table["record_a"], table["record_b"])) == ORDER
    assert table["rank"].tolist() == [1, 2, 3, 4, 5]
    assert table["linker_decision"].tolist() == ["link", "review", "link", "review", "review"]
    assert table["pair_id"].tolist() == [pid(records, a, b) for a, b in ORDER]
    assert table["error_finding"].tolist() == [True, False, False, False, False]
    assert table["child"].tolist() == [True, True, False, False, False]
    assert table["entity_size"].tolist() == [4, 4, 6, 4, 4]
    assert table.loc[0, "findings"] == "A: release_before_intake (error)"
    assert table.loc[2, "findings"] == "B: sex_conflict (warning)"
    assert (table["decision"] == "").all() and (table["note"] == "").all()


def test_order_does_not_depend_on_input_order(records, pairs, findings):
    a = review_pairs(records, pairs, findings)
    b = review_pairs(records.iloc[::-1], pairs.iloc[::-1], findings.iloc[::-1])
    pd.testing.assert_frame_equal(a, b)


def test_earlier_decisions_prefilled_and_undecided_first(records, pairs, findings):
    k = pid(records, "R3", "R4")
    decisions = pd.DataFrame([
        {"pair_id": k, "decision": "same", "reviewer": "clerk 1", "decided_at": "2026-11-01T09:00:00",
         "note": "first look"},
        {"pair_id": k, "decision": "different", "reviewer": "clerk 2", "decided_at": "2026-11-02T10:00:00",
         "note": "birth registers differ"},
    ])
    table = review_pairs(records, pairs, findings, decisions)
    assert list(zip(table["record_a"], table["record_b"])) == [o for o in ORDER if o != ("R3", "R4")] + [
        ("R3", "R4")]
    last = table.iloc[-1]
    assert (last["decision"], last["reviewer"], last["note"]) == ("different", "clerk 2",
                                                                   "birth registers differ")
    assert (table["decision"].iloc[:-1] == "").all()


def test_earlier_decision_outside_the_vocabulary_is_refused(records, pairs, findings):
    bad = pd.DataFrame([{"pair_id": "K0", "decision": "maybe", "reviewer": "", "decided_at": "", "note": ""}])
    with pytest.raises(ReviewError, match="maybe"):
        review_pairs(records, pairs, findings, bad)


@pytest.mark.parametrize("which", ["no pairs table", "only non-links"])
def test_no_pairs_gives_an_empty_table_and_a_workbook(records, pairs, findings, tmp_path, which):
    given = pd.DataFrame() if which == "no pairs table" else pairs[pairs["decision"] == "non-link"]
    table = review_pairs(records, given, findings)
    assert table.empty and {"pair_id", "rank", "decision", "note"} <= set(table.columns)
    path = write_review(table, records, tmp_path / "review.xlsx")
    assert openpyxl.load_workbook(path)[PAIRS_TITLE].max_row == 1
    assert read_review(path).empty


def test_lines_side_by_side_with_provenance(records, pairs, findings):
    lines = review_lines(review_pairs(records, pairs, findings), records)
    assert list(lines.columns) == [
        "pair_id", "rank", "probability", "weight", "linker decision", "checks on these records",
        "lines with this pair_id",
        "given name A", "given name B", "given name level", "given name weight",
        "birth date A", "birth date B", "birth date level", "birth date weight",
        "file A", "sheet A", "row A", "slot A", "file B", "sheet B", "row B", "slot B",
        "record A", "record B", "earlier decision", "earlier decision by", "earlier decision at",
        "decision", "note"]
    first = lines.iloc[0]
    assert first["birth date A"] == "2019-04-03"
    assert first["birth date B"] == "between 2018-11-02 and 2019-11-01 (from age)"
    assert first["birth date level"] == "age consistent"
    assert (first["file B"], first["sheet B"], first["row B"], first["slot B"]) == (
        "nmha/nmha_custody_log_2026.xlsx", "Log", 4, "child")
    assert first["linker decision"] == "linked"


# ---------------------------------------------------------------------------
# The workbook
# ---------------------------------------------------------------------------
@pytest.fixture
def book_path(records, pairs, findings, tmp_path):
    return write_review(review_pairs(records, pairs, findings), records, tmp_path / "review.xlsx")


def heads(ws):
    return [c.value for c in ws[1]]


def col(ws, name):
    return heads(ws).index(name) + 1


def test_workbook_lines_order_and_read_me(book_path, records):
    book = openpyxl.load_workbook(book_path)
    assert book.sheetnames == [README_TITLE, PAIRS_TITLE]
    ws = book[PAIRS_TITLE]
    assert heads(ws)[-3:] == ["decision", "note", CHECK]
    assert ws.max_row == 1 + len(ORDER)
    got = [(ws.cell(r, col(ws, "record A")).value, ws.cell(r, col(ws, "record B")).value)
           for r in range(2, ws.max_row + 1)]
    assert got == ORDER
    assert [ws.cell(r, col(ws, "pair_id")).value for r in range(2, ws.max_row + 1)] == [
        pid(records, a, b) for a, b in ORDER]
    text = " ".join(str(c.value) for c in book[README_TITLE]["A"])
    assert "qualified staff" in text
    assert "a lead to be verified, not a determination" in text
    assert "sensitive personal information" in text


def test_decision_dropdown_protection_and_layout(book_path):
    ws = openpyxl.load_workbook(book_path)[PAIRS_TITLE]
    n = ws.max_row
    dec, note, check = col(ws, "decision"), col(ws, "note"), col(ws, CHECK)
    letter = openpyxl.utils.get_column_letter
    validations = ws.data_validations.dataValidation
    assert len(validations) == 1
    dv = validations[0]
    assert dv.type == "list"
    assert dv.formula1 == '"same person,different people,not sure"'
    assert str(dv.sqref) == f"{letter(dec)}2:{letter(dec)}{n}"
    assert ws.protection.sheet is True
    # In sheetProtection a true attribute forbids the action, false allows it (from memory of the
    # OOXML sheetProtection element, as openpyxl exposes it).
    assert ws.protection.autoFilter is False and ws.protection.sort is False
    unlocked = {(c.row, c.column) for row in ws.iter_rows() for c in row if not c.protection.locked}
    assert unlocked == {(r, c) for r in range(2, n + 1) for c in (dec, note)}
    assert ws.column_dimensions[letter(check)].hidden is True
    assert ws.freeze_panes == "C2"
    assert ws.auto_filter.ref == f"A1:{letter(check)}{n}"


def test_formula_like_values_are_text(book_path):
    ws = openpyxl.load_workbook(book_path)[PAIRS_TITLE]
    values = [c.value for row in ws.iter_rows(min_row=2) for c in row]
    assert "'=CMD()" in values and "'+Intake" in values
    assert not any(isinstance(v, str) and v[:1] in "=+@" for v in values)
    with zipfile.ZipFile(book_path) as z:
        sheet_xml = b"".join(z.read(n) for n in z.namelist() if n.startswith("xl/worksheets/"))
    assert b"<f>" not in sheet_xml and b"<f " not in sheet_xml


def test_same_input_same_bytes(records, pairs, findings, tmp_path):
    a = write_review(review_pairs(records, pairs, findings), records, tmp_path / "a.xlsx")
    b = write_review(review_pairs(records.iloc[::-1], pairs.iloc[::-1], findings), records,
                     tmp_path / "b.xlsx")
    assert a.read_bytes() == b.read_bytes()
    assert not list(tmp_path.glob(".*.tmp"))          # atomic write leaves no temp file


# ---------------------------------------------------------------------------
# Reading decisions back
# ---------------------------------------------------------------------------
def fill(path, values: dict[int, dict], sheet=PAIRS_TITLE):
    """Put values into the workbook by sheet row and column heading, as a reviewer would."""
    book = openpyxl.load_workbook(path)
    ws = book[sheet]
    for row, cells in values.items():
        for name, value in cells.items():
            ws.cell(row, col(ws, name)).value = value
    book.save(path)
    return path


def test_read_back_decisions(book_path, records):
    fill(book_path, {2: {"decision": "same person", "note": "checked the intake files"},
                     4: {"decision": "not sure"},
                     5: {"decision": "different people", "note": "=looks odd"}})
    got = read_review(book_path, known_pair_ids=[pid(records, a, b) for a, b in ORDER])
    assert list(got.columns) == ["pair_id", "decision", "note", "row", "prefilled", "record_a", "record_b"]
    assert got["pair_id"].tolist() == [pid(records, *ORDER[i]) for i in (0, 2, 3)]
    assert got["decision"].tolist() == ["same", "unsure", "different"]
    assert got["note"].tolist() == ["checked the intake files", "", "=looks odd"]
    assert got["row"].tolist() == [2, 4, 5]
    assert not got["prefilled"].any()


def test_read_back_after_sorting_the_sheet(book_path, records):
    book = openpyxl.load_workbook(book_path)
    ws = book[PAIRS_TITLE]
    rows = [[c.value for c in row] for row in ws.iter_rows(min_row=2)]
    for r, values in enumerate(reversed(rows), start=2):       # as a sort would leave them
        for c, v in enumerate(values, start=1):
            ws.cell(r, c).value = v
    ws.cell(2, col(ws, "decision")).value = "different people"   # the old last line
    book.save(book_path)
    got = read_review(book_path)
    assert got["pair_id"].tolist() == [pid(records, *ORDER[-1])]
    assert got["row"].tolist() == [2]


def test_prefilled_decisions_are_marked(records, pairs, findings, tmp_path):
    k = pid(records, "R3", "R4")
    decisions = pd.DataFrame([{"pair_id": k, "decision": "different", "reviewer": "clerk 2",
                               "decided_at": "2026-11-02T10:00:00", "note": "birth registers differ"}])
    path = write_review(review_pairs(records, pairs, findings, decisions), records, tmp_path / "r.xlsx")
    ws = openpyxl.load_workbook(path)[PAIRS_TITLE]
    assert ws.cell(6, col(ws, "decision")).value == "different people"
    assert ws.cell(6, col(ws, "earlier decision by")).value == "clerk 2"
    got = read_review(path)
    assert (got["pair_id"].tolist(), got["prefilled"].tolist()) == ([k], [True])
    fill(path, {6: {"note": "birth registers differ; checked again"}})
    assert read_review(path)["prefilled"].tolist() == [False]


def test_lines_of_one_pair_id(records, pairs, findings, tmp_path):
    # R8 has R3's compared values: R8-R4 has the same pair_id as R3-R4
    twin = records[records["record_id"] == "R3"].assign(record_id="R8", entity_id="E5", row="9")
    recs = pd.concat([records, twin], ignore_index=True)
    more = pd.concat([pairs, pd.DataFrame([pair("R4", "R8", "review", 0.55)])], ignore_index=True)
    table = review_pairs(recs, more, findings)
    k = pid(recs, "R3", "R4")
    assert (table["pair_id"] == k).sum() == 2
    assert table.loc[table["pair_id"] == k, "pair_lines"].tolist() == [2, 2]
    path = write_review(table, recs, tmp_path / "r.xlsx")
    rows = (table.index[table["pair_id"] == k] + 2).tolist()
    fill(path, {rows[0]: {"decision": "same person", "note": "one register"},
                rows[1]: {"decision": "same person", "note": "same mother"}})
    got = read_review(path)
    assert got.drop(columns=["record_a", "record_b"]).to_dict("records") == [{"pair_id": k, "decision": "same", "note": "one register | same mother",
                                       "row": rows[0], "prefilled": False}]
    fill(path, {rows[1]: {"decision": "different people"}})
    with pytest.raises(ReviewError) as err:
        read_review(path)
    assert (err.value.sheet, err.value.row, err.value.column) == (PAIRS_TITLE, rows[1], "decision")
    assert f"row {rows[0]}" in str(err.value)


# ---------------------------------------------------------------------------
# Errors: all or nothing, each naming workbook, sheet, row and column
# ---------------------------------------------------------------------------
def refused(path, **kw) -> ReviewError:
    with pytest.raises(ReviewError) as err:
        read_review(path, **kw)
    assert isinstance(err.value, LinkerError) and err.value.exit_code == 3
    assert str(path) in str(err.value)
    return err.value


def test_not_a_workbook(tmp_path):
    text = tmp_path / "review.xlsx"
    text.write_text("pair_id,decision\n", encoding="utf-8")
    assert "not an .xlsx" in refused(text).problem
    broken = tmp_path / "broken.xlsx"
    broken.write_bytes(b"PK\x03\x04" + b"\x00" * 40)
    assert "not a readable" in refused(broken).problem
    assert "no such file" in refused(tmp_path / "missing.xlsx").problem


def test_pairs_sheet_missing(book_path):
    book = openpyxl.load_workbook(book_path)
    book[PAIRS_TITLE].title = "pairs (old)"
    book.save(book_path)
    err = refused(book_path)
    assert err.sheet == PAIRS_TITLE and "sheet missing" in err.problem


def test_check_column_removed(book_path):
    book = openpyxl.load_workbook(book_path)
    ws = book[PAIRS_TITLE]
    ws.delete_cols(col(ws, CHECK))
    book.save(book_path)
    err = refused(book_path)
    assert (err.sheet, err.row, err.column) == (PAIRS_TITLE, 1, CHECK)


def test_decision_outside_the_list(book_path):
    fill(book_path, {3: {"decision": "yes"}})
    err = refused(book_path)
    assert (err.sheet, err.row, err.column) == (PAIRS_TITLE, 3, "decision")
    assert "'yes'" in str(err)


def test_edited_locked_value(book_path):
    fill(book_path, {2: {"decision": "same person"}, 4: {"given name A": "ALDO"}})
    err = refused(book_path)
    assert (err.sheet, err.row, err.column) == (PAIRS_TITLE, 4, "given name A")
    fill(book_path, {4: {"given name A": "MIRA"}, 5: {"probability": 0.5}})   # undone; another edit
    err = refused(book_path)
    assert (err.row, err.column) == (5, "probability")


def test_unknown_pair_id(book_path, records):
    fill(book_path, {2: {"decision": "same person"}, 3: {"decision": "not sure"}})
    known = [pid(records, a, b) for a, b in ORDER[1:]]
    err = refused(book_path, known_pair_ids=known)
    assert (err.sheet, err.row, err.column) == (PAIRS_TITLE, 2, "pair_id")
    assert len(read_review(book_path, known_pair_ids=known + [pid(records, *ORDER[0])])) == 2


def test_note_without_decision(book_path):
    fill(book_path, {3: {"note": "ask the registry"}})
    err = refused(book_path)
    assert (err.row, err.column) == (3, "note")


def test_every_problem_is_listed_and_nothing_returned(book_path):
    fill(book_path, {2: {"decision": "same person"}, 3: {"decision": "perhaps"},
                     5: {"record B": "R9", "decision": "not sure"}})
    err = refused(book_path)
    assert [(p["row"], p["column"]) for p in err.problems] == [(3, "decision"), (5, "record B")]
    assert "2 problems" in str(err) and "row 3" in str(err) and "row 5" in str(err)


# ---------------------------------------------------------------------------
# The demo delivery
# ---------------------------------------------------------------------------
@pytest.fixture(scope="module")
def demo():
    from linker import load_config, run_pipeline

    return run_pipeline(load_config(ROOT / "configs" / "sample.toml"))


def test_demo_review_workbook(demo, tmp_path):
    pairs, findings = demo.extra["pairs.csv"], demo.extra["findings.csv"]
    table = review_pairs(demo.records, pairs, findings)
    touched = set(findings["record_id"])
    links = pairs[(pairs["decision"] == "link")
                  & (pairs["record_a"].isin(touched) | pairs["record_b"].isin(touched))]
    n_review = int((pairs["decision"] == "review").sum())
    assert n_review > 0 and len(links) > 0
    assert len(table) == n_review + len(links)
    path = write_review(table, demo.records, tmp_path / "review.xlsx")
    ws = openpyxl.load_workbook(path, read_only=True)[PAIRS_TITLE]
    assert ws.max_row == len(table) + 1
    assert read_review(path, known_pair_ids=table["pair_id"]).empty
    fill(path, {2: {"decision": DECISION_LABELS["unsure"], "note": "look at both files"}})
    got = read_review(path, known_pair_ids=table["pair_id"])
    assert got[["pair_id", "decision"]].values.tolist() == [[table.loc[0, "pair_id"], "unsure"]]
