"""Report tables on small made-up inputs, and the HTML / workbook writers.

Expected values are worked out by hand from the constructed records below.
"""

from __future__ import annotations

import base64
import re
from html.parser import HTMLParser

import pandas as pd
import pytest
from openpyxl import load_workbook

from linker.report import (CAUTIONS, DEFAULT_AGE_EDGES, report_tables, write_report_html,
                           write_report_xlsx)

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"   # the PNG file signature (PNG specification, from memory)
STAT_TABLES = ("age_by_sex", "age_cuts", "location", "time_separated")


def _rec(entity, source, row, slot="child", sex="", birth="", intake="", placement="", release="",
         location="", lo="", hi=""):
    return {"record_id": f"R{source}{row}{slot}", "entity_id": entity, "source_file": source, "sheet": "s",
            "row": row, "slot": slot, "sex": sex, "birth_date": birth, "birth_date_min": lo,
            "birth_date_max": hi, "intake_date": intake, "placement_date": placement,
            "release_date": release, "location": location}


def _inputs():
    records = pd.DataFrame([
        # E1: one girl in three sheets of two files, age 7 on her earliest intake, 30 days separated
        _rec("E1", "a.csv", 2, sex="F", birth="2018-03-01", intake="2025-06-01", location="NORTH"),
        _rec("E1", "a.csv", 3, sex="F", birth="2018-03-01", intake="2025-05-01", location="NORTH"),
        _rec("E1", "b.xlsx", 2, sex="F", release="2025-05-31", location="SOUTH"),
        # E2: a boy, age 12 by placement date, no release date
        _rec("E2", "b.xlsx", 3, sex="M", birth="2013-01-10", placement="2025-02-01"),
        # E3: no birth date, no age: unknown age; sex unknown; release before intake
        _rec("E3", "b.xlsx", 4, intake="2025-04-01", release="2025-03-01", location="SOUTH"),
        # E4: a stated age straddling the 10 edge (aged 8 to 10 on intake): unknown band, under 14
        _rec("E4", "b.xlsx", 5, sex="M", lo="2015-01-01", hi="2016-12-31", intake="2025-12-01",
             release="2026-01-10"),
        # E5: a parent, not a child
        _rec("E5", "a.csv", 2, slot="parent", sex="F", birth="1990-01-01", location="NORTH"),
    ])
    ledger = pd.DataFrame({
        "source_file": ["a.csv"] * 3 + ["b.xlsx"] * 6 + ["c.csv"],
        "sheet": "s", "row": [1, 2, 3, 1, 2, 3, 4, 5, 6, 1],
        "outcome": ["header", "record", "record", "header", "record", "record", "record", "record",
                    "skipped", "header"],
        "reason": "", "records": [0, 2, 1, 0, 1, 1, 1, 1, 0, 0]})
    entities = pd.DataFrame({"entity_id": ["E1", "E2", "E3", "E4", "E5"]})
    relations = pd.DataFrame({"child_entity_id": ["E1"], "parent_entity_id": ["E5"]})
    findings = pd.DataFrame({"rule": ["r1", "r2", "r1"], "severity": ["error", "warning", "warning"],
                             "source_file": ["b.xlsx", "b.xlsx", "a.csv"]})
    return records, ledger, entities, relations, findings


@pytest.fixture()
def tables():
    return report_tables(*_inputs(), None)


def _row(frame, column, value):
    hit = frame[frame[column] == value]
    assert len(hit) == 1, f"{value!r} not once in {column}"
    return hit.iloc[0]


def test_totals_count_people_once_and_findings_by_severity(tables):
    t = dict(zip(tables["totals"]["count"], tables["totals"]["value"]))
    assert t == {"records": 7, "entities (people)": 5, "children": 4, "relations (child and parent)": 1,
                 "findings": 3, "findings: error": 1, "findings: warning": 2}


def test_age_by_sex_counts_a_child_in_several_sheets_once_and_keeps_unknowns(tables):
    age = tables["age_by_sex"]
    assert list(age["sex"]) == ["F", "M", "unknown", "all"]
    assert DEFAULT_AGE_EDGES == (5, 10, 14, 18)
    girl, boys, nosex, everyone = (_row(age, "sex", s) for s in ("F", "M", "unknown", "all"))
    assert (girl["5 to 9"], girl["children"]) == (1, 1)           # E1 once, not three times
    assert (boys["10 to 13"], boys["unknown"], boys["children"]) == (1, 1, 2)
    assert (nosex["unknown"], nosex["children"]) == (1, 1)
    assert everyone["children"] == 4 and everyone["unknown"] == 2
    assert (everyone["n known"], everyone["n missing"], everyone["share missing"]) == (2, 2, 0.5)
    assert boys["share missing"] == 0.5 and girl["share missing"] == 0.0


def test_age_cuts_count_under_each_edge_with_the_undecidable_apart(tables):
    cuts = tables["age_cuts"]
    assert list(cuts["age"]) == ["under 5", "under 10", "under 14", "under 18"]
    under10 = _row(cuts, "age", "under 10")
    assert (under10["children"], under10["at or over"], under10["n missing"]) == (1, 1, 2)
    under14 = _row(cuts, "age", "under 14")        # E4's range lies wholly under 14
    assert (under14["children"], under14["n missing"], under14["share missing"]) == (3, 1, 0.25)


def test_age_bands_follow_the_settings():
    tabs = report_tables(*_inputs(), {"age_edges": [10], "cuts": [8]})
    assert [c for c in tabs["age_by_sex"].columns][1:4] == ["under 10", "10 and over", "unknown"]
    assert list(tabs["age_cuts"]["age"]) == ["under 8"]


def test_location_is_each_persons_most_frequent_and_unknown_is_shown(tables):
    loc = tables["location"]
    assert list(loc["location"]) == ["NORTH", "SOUTH", "unknown"]
    assert list(loc["entities"]) == [2, 1, 2]      # E1 NORTH (2 of 3 records), E3 SOUTH, E2 and E4 unknown
    assert loc["entities"].sum() == 5
    assert set(loc["share missing"]) == {0.4} and set(loc["n missing"]) == {2}


def test_time_separated_measures_only_children_with_both_dates(tables):
    ts = tables["time_separated"]
    everyone = _row(ts, "sex", "all")
    # E1: 2025-05-01 -> 2025-05-31 = 30 days; E4: 2025-12-01 -> 2026-01-10 = 40 days;
    # E2 has no release, E3's release comes before its intake
    assert everyone["median days"] == 35.0
    assert (everyone["shortest"], everyone["longest"]) == (30.0, 40.0)
    assert (everyone["n known"], everyone["n missing"], everyone["share missing"]) == (2, 2, 0.5)
    assert everyone["release before intake"] == 1
    nosex = _row(ts, "sex", "unknown")
    assert pd.isna(nosex["median days"]) and nosex["n missing"] == 1


def test_data_quality_puts_the_worst_files_first(tables):
    dq = tables["data_quality"]
    assert list(dq["source_file"]) == ["c.csv", "b.xlsx", "a.csv"]   # no records first, then 2/4 > 1/3
    b = _row(dq, "source_file", "b.xlsx")
    assert (b["rows"], b["rows: record"], b["rows: skipped"], b["records"], b["findings"]) == (6, 4, 1, 4, 2)
    assert b["findings per 100 records"] == 50.0
    assert pd.isna(_row(dq, "source_file", "c.csv")["findings per 100 records"])
    assert dq["rows"].sum() == 10                  # every ledger row is in some file's count


def test_every_statistic_table_carries_its_missing_share(tables):
    for key in STAT_TABLES:
        assert {"n known", "n missing", "share missing"} <= set(tables[key].columns), key


class _Page(HTMLParser):
    def __init__(self):
        super().__init__()
        self.images, self.tables, self.headers, self.text, self.refs = [], 0, [], [], []
        self._in_th = False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "img":
            self.images.append(attrs.get("src", ""))
        if tag == "table":
            self.tables += 1
            self.headers.append([])
        if tag == "th":
            self._in_th = True
        for name in ("href", "src"):
            if name in attrs and tag != "img":
                self.refs.append(attrs[name])

    def handle_endtag(self, tag):
        if tag == "th":
            self._in_th = False

    def handle_data(self, data):
        self.text.append(data)
        if self._in_th:
            self.headers[-1].append(data)


def test_html_is_self_contained_with_png_charts_and_cautions(tables, tmp_path):
    tables["location"].loc[0, "location"] = "<script>alert(1)</script> & co"
    path = write_report_html(tables, tmp_path / "report.html", title="Test <report>")
    page = path.read_text(encoding="utf-8")
    parser = _Page()
    parser.feed(page)
    parser.close()
    assert parser.images, "no charts"
    for src in parser.images:
        prefix = "data:image/png;base64,"
        assert src.startswith(prefix)
        assert base64.b64decode(src[len(prefix):], validate=True).startswith(PNG_SIGNATURE)
    assert not parser.refs
    assert not re.search(r"https?:", page) and "<script" not in page and "<link" not in page
    assert "&lt;script&gt;alert(1)&lt;/script&gt; &amp; co" in page and "Test &lt;report&gt;" in page
    text = " ".join(parser.text)
    for caution in CAUTIONS:
        assert caution in text
    assert "never determinations" in text and "privacy law" in text
    assert parser.tables == len(tables)
    with_missing = [h for h in parser.headers if "share missing" in h]
    assert len(with_missing) == len(STAT_TABLES)


def test_two_writes_are_byte_identical(tables, tmp_path):
    a, b = write_report_html(tables, tmp_path / "a.html"), write_report_html(tables, tmp_path / "b.html")
    assert a.read_bytes() == b.read_bytes()
    x, y = write_report_xlsx(tables, tmp_path / "a.xlsx"), write_report_xlsx(tables, tmp_path / "b.xlsx")
    assert x.read_bytes() == y.read_bytes()


def test_workbook_holds_the_same_tables_formula_safe(tables, tmp_path):
    tables["location"].loc[0, "location"] = "=HYPERLINK(1)"
    book = load_workbook(write_report_xlsx(tables, tmp_path / "r.xlsx"))
    assert book.sheetnames == ["read me", *[k.replace("_", " ") for k in tables]]
    readme = [c.value for c in book["read me"]["B"]]
    assert all(c in readme for c in CAUTIONS)
    loc = book["location"]
    assert [c.value for c in loc[1]] == list(tables["location"].columns)
    assert loc["A2"].value == "'=HYPERLINK(1)" and loc["A2"].data_type == "s"
    assert loc["B2"].value == tables["location"].loc[0, "entities"]
    age = book["age by sex"]
    assert age.max_row == len(tables["age_by_sex"]) + 1


class _Tables(HTMLParser):
    """Every table of a page as (heading, header cells, body rows of cell text)."""

    def __init__(self):
        super().__init__()
        self.found, self.heading, self._cell, self._row, self._h2 = [], "", None, None, False

    def handle_starttag(self, tag, attrs):
        if tag == "h2":
            self._h2, self.heading = True, ""
        elif tag == "table":
            self.found.append((self.heading, [], []))
        elif tag == "tr":
            self._row = []
        elif tag in ("th", "td"):
            self._cell = ""

    def handle_endtag(self, tag):
        if tag == "h2":
            self._h2 = False
        elif tag in ("th", "td"):
            self._row.append(self._cell)
            self._cell = None
        elif tag == "tr":
            head, header, body = self.found[-1]
            (body if header else header).extend([self._row] if header else self._row)
            self._row = None

    def handle_data(self, data):
        if self._h2:
            self.heading += data
        if self._cell is not None:
            self._cell += data


def test_demo_report_html_against_counts_from_the_truth(tmp_path):
    """The demo run's report.html parsed back: the charts embedded, every statistic with its missing
    share, and the record and per-file counts equal to the generator's truth (invented demo data)."""
    from linker import load_config, run_pipeline
    from linker.pipeline import write_outputs

    from conftest import ROOT

    res = run_pipeline(load_config(ROOT / "configs" / "sample.toml"))
    write_outputs(res, tmp_path)
    page = (tmp_path / "report.html").read_text(encoding="utf-8")
    pics = _Page()
    pics.feed(page)
    assert len(pics.images) == 3 and not pics.refs
    for src in pics.images:
        assert base64.b64decode(src.split(",", 1)[1], validate=True).startswith(PNG_SIGNATURE)
    parser = _Tables()
    parser.feed(page)
    found = {head: pd.DataFrame(body, columns=header) for head, header, body in parser.found}
    truth = pd.read_csv(ROOT / "sample" / "truth" / "records.csv", dtype=str, keep_default_na=False)

    totals = found["Totals"].set_index("count")["value"].astype(int)
    assert totals["records"] == len(truth)
    persons = truth["person_id"].nunique()
    assert abs(totals["entities (people)"] - persons) <= 0.05 * persons
    quality = found["Data quality per source file (worst first)"].set_index("source_file")
    assert quality["records"].astype(int).to_dict() == truth["source_file"].value_counts().to_dict()

    stats = [h for h, header, _ in parser.found if "share missing" in header]
    assert len(stats) == len(STAT_TABLES)
    for head in stats:
        frame = found[head]
        known, missing = frame["n known"].astype(int), frame["n missing"].astype(int)
        share = frame["share missing"].astype(float)
        assert ((missing / (known + missing)).round(4) == share.round(4)).all(), head
    everyone = found["Children by age at separation and sex"].set_index("sex").loc["all"]
    assert int(everyone["n known"]) + int(everyone["n missing"]) == totals["children"]
