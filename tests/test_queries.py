"""The agency query workbook: sheets, titles, formula safety, deterministic bytes."""

from __future__ import annotations

import re
import zipfile

import openpyxl
import pandas as pd
import pytest

from linker.queries import (
    ANSWER_COLUMNS,
    FIXED_STAMP,
    INDEX_COLUMNS,
    INDEX_TITLE,
    QUERY_COLUMNS,
    README_TITLE,
    query_sheets,
    sheet_titles,
    write_queries,
)
from linker.schema import FINDING_COLUMNS

RULES = pd.DataFrame({
    "rule": ["self_parent", "release_before_intake", "sex_conflict"],
    "severity": ["error", "error", "warning"],
    "explanation": ["a person is shown as their own parent",
                    "a release date lies before the intake date",
                    "one person is shown with more than one sex"],
})


def record(record_id, source_file, sheet, row, slot, **raw):
    base = {"record_id": record_id, "source_file": source_file, "sheet": sheet,
            "row": str(row), "slot": slot, "reg_no": "", "given_name": "", "family_name": ""}
    base.update({f"{k}_raw": v for k, v in raw.items()})
    return base


def finding(rule, severity, entity_id, record_id, source_file, sheet, row, slot, detail):
    return dict(zip(FINDING_COLUMNS,
                    (rule, severity, entity_id, record_id, source_file, sheet, str(row), slot, detail)))


@pytest.fixture
def records():
    # Fictional values (Northern March scenario style), no real persons.
    return pd.DataFrame([
        record("R1", "omc_placements_2026.xlsx", "Placements", 10, "child",
               reg_no="HR-1234-5678", given_name="Alda", family_name="Vornet",
               birth_date="03/04/2019", sex="F", intake_date="10/02/2026", release_date="03/01/2026"),
        record("R2", "omc_placements_2026.xlsx", "Placements", 9, "child",
               reg_no="HR 2222 3333", given_name="Bero", family_name="Kastel", sex="M"),
        record("R3", "nmha/nmha_custody_log_2026.xlsx", "Log", 4, "parent",
               full_name="KASTEL, Mira", sex="female"),
        record("R4", "nmha/nmha_releases_2026.xlsx", "Releases", 7, "child",
               reg_no="HR-2222-3333", full_name="KASTEL, Bero", sex="F"),
    ])


@pytest.fixture
def findings():
    return pd.DataFrame([
        finding("sex_conflict", "warning", "E2", "R4", "nmha/nmha_releases_2026.xlsx", "Releases", 7,
                "child", "sex M in omc_placements_2026.xlsx row 9, F here"),
        finding("sex_conflict", "warning", "E2", "R2", "omc_placements_2026.xlsx", "Placements", 9,
                "child", "sex M here, F in nmha/nmha_releases_2026.xlsx row 7"),
        finding("release_before_intake", "error", "E1", "R1", "omc_placements_2026.xlsx", "Placements",
                10, "child", "release 2026-01-03 before intake 2026-02-10"),
        finding("self_parent", "error", "E3", "R3", "nmha/nmha_custody_log_2026.xlsx", "Log", 4,
                "parent", "child and parent show the same reg no"),
    ])


def query_titles(sheets):
    return [t for t in sheets if t not in (README_TITLE, INDEX_TITLE)]


# ---------------------------------------------------------------------------
# Sheets
# ---------------------------------------------------------------------------
def test_one_sheet_per_file_with_the_right_lines(findings, records):
    sheets = query_sheets(findings, records, RULES)
    assert list(sheets)[:2] == [README_TITLE, INDEX_TITLE]
    assert query_titles(sheets) == ["nmha_custody_log_2026", "nmha_releases_2026", "omc_placements_2026"]
    for title in query_titles(sheets):
        assert tuple(sheets[title].columns) == QUERY_COLUMNS

    omc = sheets["omc_placements_2026"]
    # Row 9 before row 10 (numeric order), numbers continue from the earlier sheets.
    assert omc["row"].tolist() == [9, 10]
    assert omc["query"].tolist() == ["Q0003", "Q0004"]
    line = omc.iloc[1]
    assert line["rule"] == "release_before_intake"
    assert line["what was checked"] == "a release date lies before the intake date"
    assert line["severity"] == "error"
    assert (line["file"], line["sheet"], line["person on row"]) == (
        "omc_placements_2026.xlsx", "Placements", "child")
    assert line["reg no as delivered"] == "HR-1234-5678"
    assert line["birth date as delivered"] == "03/04/2019"
    assert line["release date as delivered"] == "03/01/2026"
    assert line["intake date as delivered"] == "10/02/2026"
    assert line["detail"] == "release 2026-01-03 before intake 2026-02-10"
    assert line["record id"] == "R1"
    assert all(line[c] == "" for c in ANSWER_COLUMNS)

    custody = sheets["nmha_custody_log_2026"].iloc[0]
    assert custody["full name as delivered"] == "KASTEL, Mira"
    assert custody["sex as delivered"] == "female"
    assert custody["query"] == "Q0001"


def test_index_maps_titles_to_full_source_files(findings, records):
    index = query_sheets(findings, records, RULES)[INDEX_TITLE]
    assert tuple(index.columns) == INDEX_COLUMNS
    got = dict(zip(index["sheet"], index["source file"]))
    assert got == {"nmha_custody_log_2026": "nmha/nmha_custody_log_2026.xlsx",
                   "nmha_releases_2026": "nmha/nmha_releases_2026.xlsx",
                   "omc_placements_2026": "omc_placements_2026.xlsx"}
    omc = index[index["sheet"] == "omc_placements_2026"].iloc[0]
    assert (omc["queries"], omc["errors"], omc["warnings"]) == (2, 1, 1)


def test_group_by_folder_puts_a_folder_on_one_sheet(findings, records):
    sheets = query_sheets(findings, records, RULES, group_by="folder")
    assert query_titles(sheets) == ["nmha", "omc_placements_2026"]
    assert sheets["nmha"]["file"].tolist() == ["nmha/nmha_custody_log_2026.xlsx",
                                               "nmha/nmha_releases_2026.xlsx"]
    index = sheets[INDEX_TITLE]
    assert index[index["sheet"] == "nmha"]["source file"].tolist() == [
        "nmha/nmha_custody_log_2026.xlsx", "nmha/nmha_releases_2026.xlsx"]


def test_group_by_must_be_known(findings, records):
    with pytest.raises(ValueError, match="group_by"):
        query_sheets(findings, records, RULES, group_by="agency")


def test_input_order_does_not_change_the_sheets(findings, records):
    a = query_sheets(findings, records, RULES)
    b = query_sheets(findings.iloc[::-1], records.iloc[::-1], RULES)
    assert list(a) == list(b)
    for title in a:
        pd.testing.assert_frame_equal(a[title], b[title])


def test_finding_without_record_keeps_its_line(findings, records):
    sheets = query_sheets(findings, records[records["record_id"] != "R1"], RULES)
    line = sheets["omc_placements_2026"].iloc[1]
    assert line["record id"] == "R1"
    assert line["reg no as delivered"] == ""
    assert line["row"] == 10


def test_rule_missing_from_the_table_still_gets_words(findings, records):
    extra = findings.assign(rule="new_rule")
    sheets = query_sheets(extra, records, RULES)
    assert set(sheets["omc_placements_2026"]["what was checked"]) == {"check: new rule"}


# ---------------------------------------------------------------------------
# Sheet titles
# ---------------------------------------------------------------------------
# Excel's limits (from memory of Excel's documented rules): <= 31 characters,
# none of []:*?/\, no apostrophe at either end, unique ignoring case.
def legal_title(title):
    return (0 < len(title) <= 31 and not re.search(r"[\[\]:*?/\\]", title)
            and not title.startswith("'") and not title.endswith("'"))


def test_titles_legal_unique_and_deterministic():
    groups = [
        "a/very_long_file_name_of_the_northern_march_holding_authority_2026.xlsx",
        "b/very_long_file_name_of_the_northern_march_holding_authority_2026.xlsx",
        "x/custody.xlsx", "y/CUSTODY.csv", "custody.xlsx",
        "odd[1]:name*?.csv", "'quoted'.xlsx", "index.csv", "Read Me.xlsx", "History.xlsx",
        "plain.csv",
    ]
    titles = sheet_titles(groups, "file")
    assert set(titles) == set(groups)
    assert all(legal_title(t) for t in titles.values()), titles
    folded = [t.casefold() for t in titles.values()]
    assert len(set(folded)) == len(folded)
    assert not {"index", "read me", "history"} & set(folded)
    assert titles["plain.csv"] == "plain"
    # Colliding names all carry a hash of their full name: none takes the plain title by sort order.
    assert all(titles[g].casefold().startswith("custody~") for g in groups[2:5])
    # Deterministic, independent of order and of the other files present.
    assert sheet_titles(groups[::-1], "file") == titles
    assert sheet_titles(groups[:2], "file") == {g: titles[g] for g in groups[:2]}


def test_folder_and_top_level_file_of_the_same_name_get_separate_sheets():
    sheets = query_sheets(
        pd.DataFrame([finding("sex_conflict", "warning", "E1", "R1", "nmha/a.xlsx", "S", 2, "child", "d"),
                      finding("sex_conflict", "warning", "E1", "R2", "nmha.csv", "nmha", 3, "child", "d")]),
        pd.DataFrame(), RULES, group_by="folder")
    titles = query_titles(sheets)
    assert len(titles) == 2 and len({t.casefold() for t in titles}) == 2
    assert all(legal_title(t) for t in titles)


# ---------------------------------------------------------------------------
# The written workbook
# ---------------------------------------------------------------------------
def write(sheets, path):
    write_queries(sheets, path)
    return openpyxl.load_workbook(path)


def test_formula_like_text_is_stored_as_text(findings, records, tmp_path):
    # Formula starts as in OWASP's CSV-injection advice (common practice), plus an error literal.
    nasty = ["=1+1", "+41 cmd", "-2+3", "@SUM(A1)", "\t=1", "\r=1", "#N/A"]
    recs = records.copy()
    findings = findings.copy()
    columns = ["reg_no_raw", "given_name_raw"]
    for n, value in enumerate(nasty):
        recs.loc[n % len(recs), columns[n // len(recs)]] = value
    findings.loc[:, "detail"] = "=HYPERLINK(\"http://example.invalid\")"
    book = write(query_sheets(findings, recs, RULES), tmp_path / "queries.xlsx")
    seen = []
    for ws in book.worksheets:
        for row in ws.iter_rows():
            for cell in row:
                assert cell.data_type != "f", (ws.title, cell.coordinate, cell.value)
                assert cell.data_type != "e", (ws.title, cell.coordinate, cell.value)
                if isinstance(cell.value, str):
                    assert cell.data_type == "s"
                    seen.append(cell.value)
    assert "'=1+1" in seen and "'+41 cmd" in seen and "'-2+3" in seen and "'@SUM(A1)" in seen
    # A carriage return is stored as a line feed (XML would read it back as one anyway).
    assert "'\t=1" in seen and "'\n=1" in seen and "#N/A" in seen
    assert '\'=HYPERLINK("http://example.invalid")' in seen


def test_control_characters_do_not_break_the_write(findings, records, tmp_path):
    recs = records.assign(given_name_raw="Al\x01da")
    book = write(query_sheets(findings, recs, RULES), tmp_path / "q.xlsx")
    values = [c.value for ws in book.worksheets for row in ws.iter_rows() for c in row]
    assert "Al\ufffdda" in values


def test_two_writes_are_byte_identical(findings, records, tmp_path):
    sheets = query_sheets(findings, records, RULES)
    a, b = tmp_path / "a.xlsx", tmp_path / "b" / "queries.xlsx"
    write_queries(sheets, a)
    write_queries(sheets, b)
    assert a.read_bytes() == b.read_bytes()
    with zipfile.ZipFile(a) as z:
        assert {i.date_time for i in z.infolist()} == {FIXED_STAMP.timetuple()[:6]}
        core = z.read("docProps/core.xml").decode()
    stamp = FIXED_STAMP.strftime("%Y-%m-%dT%H:%M:%SZ")
    assert re.search(rf"<dcterms:created[^>]*>{stamp}</dcterms:created>", core)
    assert re.search(rf"<dcterms:modified[^>]*>{stamp}</dcterms:modified>", core)


def test_write_is_atomic_and_replaces(findings, records, tmp_path):
    path = tmp_path / "queries.xlsx"
    path.write_bytes(b"old")
    write_queries(query_sheets(findings, records, RULES), path)
    assert path.read_bytes()[:4] == b"PK\x03\x04"
    assert [p.name for p in tmp_path.iterdir()] == ["queries.xlsx"]     # no temp file left


def test_layout_header_frozen_answer_columns_marked(findings, records, tmp_path):
    book = write(query_sheets(findings, records, RULES), tmp_path / "q.xlsx")
    assert book.sheetnames[:2] == [README_TITLE, INDEX_TITLE]
    ws = book["omc_placements_2026"]
    header = [c.value for c in ws[1]]
    assert tuple(header) == QUERY_COLUMNS
    assert all(c.font.bold for c in ws[1])
    assert ws.freeze_panes == "B2"
    answer_cols = [i for i, h in enumerate(header) if h in ANSWER_COLUMNS]
    other = header.index("detail")
    for r in (1, 2, 3):
        for i in answer_cols:
            assert ws.cell(row=r, column=i + 1).fill.fgColor.rgb.endswith("FFF2CC")
        if r > 1:
            assert ws.cell(row=r, column=other + 1).fill.fill_type is None
    assert ws["A2"].value == "Q0003"
    assert ws.cell(row=2, column=header.index("row") + 1).value == 9
    widths = [ws.column_dimensions[c].width for c in "ABCDEFG"]
    assert all(8 <= w <= 60 for w in widths)
    assert ws.column_dimensions["D"].width > ws.column_dimensions["A"].width


def test_read_me_sheet_says_what_it_is_and_warns(findings, records, tmp_path):
    book = write(query_sheets(findings, records, RULES), tmp_path / "q.xlsx")
    text = " ".join(str(c.value) for row in book[README_TITLE].iter_rows() for c in row).lower()
    assert "not determinations" in text
    assert "sensitive personal information" in text
    assert "protective orders" in text and "privacy law" in text
    assert "'answer'" in text and "'corrected value'" in text
    assert "4 queries" in text


def test_empty_findings_still_write_read_me_and_index(tmp_path):
    empty = pd.DataFrame(columns=list(FINDING_COLUMNS))
    sheets = query_sheets(empty, pd.DataFrame(), RULES)
    assert list(sheets) == [README_TITLE, INDEX_TITLE]
    book = write(sheets, tmp_path / "q.xlsx")
    assert book.sheetnames == [README_TITLE, INDEX_TITLE]
    index = [[c.value for c in row] for row in book[INDEX_TITLE].iter_rows()]
    assert index[0] == list(INDEX_COLUMNS)
    assert len(index) == 2 and "no queries" in index[1][1]
    readme = " ".join(str(c.value) for row in book[README_TITLE].iter_rows() for c in row)
    assert "There are no queries" in readme and "sensitive personal information" in readme
