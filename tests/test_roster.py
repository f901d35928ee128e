"""Tests of linker.roster: reading the class list and setting it beside the entities."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pytest

from linker import load_config, run_pipeline
from linker.errors import InputError
from linker.link import LinkageSettings
from linker.normalize import luhn_check_digit, normalize_reg_no
from linker.roster import (ROSTER_COLUMNS, ROSTER_SLOT, STATUS_LISTED, STATUS_MISSING, STATUS_REVIEW,
                           STATUS_ROSTER_ONLY, read_roster, read_roster_sheet, reconcile_roster)

ROOT = Path(__file__).resolve().parents[1]

ROSTER_SECTION = """
[roster]
file = "class_list.xlsx"
sheet = "Class list"
columns = { reg_no = ["register number"], family_name = ["family name"], given_name = ["given name"], birth_date = ["date of birth"], sex = ["sex"] }
"""


def reg(seven: str) -> str:
    """A valid 8-digit number (Luhn) written as the roster writes it."""
    digits = seven + luhn_check_digit(seven)
    return f"HR-{digits[:4]}-{digits[4:]}"


ANA, BEN, CEM, DANA, EVA = (reg(s) for s in ("1000001", "2000002", "3000003", "4000004", "5000005"))


def write_roster(path: Path, rows: list[list], title: str | None = "Class list as of 1 Oct 2026"):
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.title = "Class list"
    if title:
        ws.append([title])
        ws.append([])
    ws.append(["Register number", "Family name", "Given name", "Date of birth", "Sex"])
    for r in rows:
        ws.append(r)
    wb.save(path)


@pytest.fixture
def tiny(project):
    """Config with a roster under a title: Ana and Dana (listed), Eva (in no file), a blank row."""
    folder, write_config = project
    write_roster(folder / "class_list.xlsx", [
        [ANA, "López", "Ana", dt.datetime(2015, 3, 2), "F"],
        [DANA, "Ruiz", "Dana", dt.datetime(2012, 7, 9), "f"],
        [None, None, None, None, None],
        [EVA, "Sol", "Eva", "04/05/2011", "F"],
    ])
    return load_config(write_config(ROSTER_SECTION))


# ---------------------------------------------------------------------------
# read_roster
# ---------------------------------------------------------------------------
def test_read_roster_finds_header_and_keeps_spreadsheet_rows(tiny):
    read = read_roster_sheet(tiny)
    e = read.entries
    assert e["roster_row"].tolist() == [4, 5, 7]          # title, blank, header above; blank row 6
    assert (e["slot"] == ROSTER_SLOT).all()
    assert e["source_file"].unique().tolist() == ["class_list.xlsx"]   # no machine path
    # the same normalizers as the records: number, names folded, dates ISO, sex codes
    assert e["reg_no"].tolist() == [normalize_reg_no(v, tiny.scheme).reg_no for v in (ANA, DANA, EVA)]
    assert e["reg_no_status"].tolist() == ["valid"] * 3
    assert e["family_name"].tolist() == ["LOPEZ", "RUIZ", "SOL"]
    assert e["birth_date"].tolist() == ["2015-03-02", "2012-07-09", "2011-05-04"]
    assert e["sex"].tolist() == ["F", "F", "F"]
    led = read.ledger.set_index("row")
    assert led.loc[3, "outcome"] == "header" and led.loc[6, "reason"] == "blank row"
    assert sorted(led.index) == list(range(1, 8))           # every sheet row has a line


def test_read_roster_errors_name_file_and_sheet(project):
    folder, write_config = project
    cfg = load_config(write_config(ROSTER_SECTION))
    with pytest.raises(InputError, match="class_list.xlsx: roster file does not exist"):
        read_roster(cfg)
    write_roster(folder / "class_list.xlsx", [[ANA, "López", "Ana", None, "F"]])
    cfg2 = load_config(write_config(ROSTER_SECTION.replace('"Class list"', '"Members"')))
    with pytest.raises(InputError, match="sheet 'Members': no such sheet") as err:
        read_roster(cfg2)
    assert err.value.sheet == "Members"
    wb = openpyxl.Workbook()
    wb.active.title = "Class list"
    wb.active.append(["Name", "Born"])
    wb.active.append(["Ana López", "2015-03-02"])
    wb.save(folder / "class_list.xlsx")
    with pytest.raises(InputError, match="sheet 'Class list': no header row found"):
        read_roster(cfg)


# ---------------------------------------------------------------------------
# reconcile_roster on a constructed case, scored by a stand-in model
# ---------------------------------------------------------------------------
class RuleModel:
    """Stand-in for the fitted model: registration numbers equal 0.99, names equal 0.5, else 0.01."""

    m_ = {}

    def __init__(self):
        from linker.link import person_fields
        self.fields = person_fields(LinkageSettings())

    def score(self, records, pairs, levels):
        reg_exact = levels[:, 0] == 1
        names = (levels[:, 1] == 1) & (levels[:, 2] == 1)
        p = np.where(reg_exact, 0.99, np.where(names, 0.5, 0.01))
        return pd.DataFrame({"left": pairs["left"].to_numpy(), "right": pairs["right"].to_numpy(),
                             "weight": np.log2(p / (1 - p)), "probability": p})


def tiny_records(cfg) -> pd.DataFrame:
    """Agency records built through the same reader (then given files, slots, entities, intakes)."""
    from linker.records import normalize_records
    from linker.roster import roster_raw_records
    rows = [[None], ["Register number", "Family name", "Given name", "Date of birth", "Sex"],
            [ANA, "Lopez", "Ana", "02/03/2015", "F"],     # E1, file a
            [ANA, "LÓPEZ", "Ana", "02/03/2015", "F"],     # E1, file b
            [BEN, "Kaya", "Ben", "01/01/2014", "M"],      # E2, missing, one file, intake in period
            [CEM, "Kaya", "Cem", "01/06/1980", "M"],      # E3, missing, two files, intake before
            [CEM, "Kaya", "Cem", "01/06/1980", "M"],
            [None, "Ruiz", "Dana", None, None]]           # E4, a name only: review
    raw, _ = roster_raw_records(cfg, "s", rows)
    rec = normalize_records(raw, cfg)
    rec["source_file"] = ["a.csv", "b.csv", "a.csv", "a.csv", "b.csv", "c/x.csv"]
    rec["slot"] = ["child", "child", "child", "parent", "parent", "child"]
    rec["entity_id"] = ["E1", "E1", "E2", "E3", "E3", "E4"]
    rec["intake_date"] = ["2025-02-01", "", "2025-03-01", "2025-01-01", "", ""]
    return rec


def test_reconcile_statuses_probabilities_and_rank(tiny):
    rec, ros = tiny_records(tiny), read_roster(tiny)
    out = reconcile_roster(rec, ros, LinkageSettings(), RuleModel())
    assert list(out.columns) == list(ROSTER_COLUMNS)
    got = {(r.entity_id, None if pd.isna(r.roster_row) else int(r.roster_row)): r.roster_status
           for r in out.itertuples()}
    assert got == {("E1", 4): STATUS_LISTED, ("E4", 5): STATUS_REVIEW, ("E2", None): STATUS_MISSING,
                   ("E3", None): STATUS_MISSING, ("", 7): STATUS_ROSTER_ONLY}
    line = out.set_index("entity_id")
    assert line.loc["E1", "probability"] == pytest.approx(0.99)
    assert line.loc["E4", "probability"] == pytest.approx(0.5)
    assert (line.loc["E1", "files"], line.loc["E1", "sources"]) == (2, 2)
    assert (line.loc["E1", "first_source_file"], line.loc["E1", "first_row"]) == ("a.csv", 3)
    assert line.loc["E3", "first_event"] == "2025-01-01"
    # default class: everybody; more independent sources first -> E3 (2 files) before E2
    assert (line.loc["E3", "rank"], line.loc["E2", "rank"]) == (1, 2)
    assert out.loc[out["roster_status"] != STATUS_MISSING, "rank"].isna().all()
    assert out.loc[out["roster_row"] == 7, "roster_given_name"].item() == "EVA"


def test_reconcile_class_period_and_member_slots(tiny):
    rec, ros = tiny_records(tiny), read_roster(tiny)
    out = reconcile_roster(rec, ros, LinkageSettings(), RuleModel(),
                           class_period=(dt.date(2025, 2, 1), None)).set_index("entity_id")
    assert bool(out.loc["E2", "in_class_period"]) and not bool(out.loc["E3", "in_class_period"])
    assert (out.loc["E2", "rank"], out.loc["E3", "rank"]) == (1, 2)   # separated in the period first
    kids = reconcile_roster(rec, ros, LinkageSettings(), RuleModel(), member_slots=("child",))
    assert "E3" not in set(kids["entity_id"])                          # a parent: not a class member here
    assert "E2" in set(kids.loc[kids["roster_status"] == STATUS_MISSING, "entity_id"])


def test_reconcile_without_match_above_link_at_is_not_listed(tiny):
    rec, ros = tiny_records(tiny), read_roster(tiny)
    out = reconcile_roster(rec, ros, LinkageSettings(link_at=0.995, review_at=0.995), RuleModel())
    status = out.groupby("roster_status")["entity_id"].apply(set)
    assert STATUS_LISTED not in status.index
    assert status[STATUS_MISSING] == {"E1", "E2", "E3", "E4"}
    near = out.set_index("entity_id").loc["E1"]
    assert (near["nearest_roster_row"], near["probability"]) == (4, pytest.approx(0.99))


# ---------------------------------------------------------------------------
# The demo delivery against sample/truth/roster.csv
# ---------------------------------------------------------------------------
@pytest.fixture(scope="module")
def demo():
    cfg = load_config(ROOT / "configs" / "sample.toml")
    res = run_pipeline(cfg)
    roster = read_roster(cfg)
    return res, roster, reconcile_roster(res.records, roster, cfg.linkage, res.model)


def _entity_person(records: pd.DataFrame) -> pd.Series:
    """entity -> the person most of its records are (truth/records.csv by file, sheet, row, slot)."""
    truth = pd.read_csv(ROOT / "sample" / "truth" / "records.csv", dtype=str)
    r = records.astype({"row": str}).merge(truth, on=["source_file", "sheet", "row", "slot"], how="left")
    r = r.dropna(subset=["person_id"])
    return r.groupby("entity_id")["person_id"].agg(lambda x: x.value_counts().sort_index().idxmax())


def test_demo_roster_recall_and_precision(demo):
    res, roster, out = demo
    truth = pd.read_csv(ROOT / "sample" / "truth" / "roster.csv", dtype=str)
    assert len(roster) == truth["roster_row"].notna().sum() == 1118
    person = _entity_person(res.records)
    missing_truth = set(truth.loc[truth["status"] == "not on roster", "person_id"])
    only_truth = set(truth.loc[truth["status"] == "roster only", "roster_row"].astype(int))
    miss = out.loc[out["roster_status"] == STATUS_MISSING, "entity_id"].map(person)
    only = set(out.loc[out["roster_status"] == STATUS_ROSTER_ONLY, "roster_row"].astype(int))
    fig = {"missing_recall": len(set(miss) & missing_truth) / len(missing_truth),
           "missing_precision": float(miss.isin(missing_truth).mean()),
           "roster_only_recall": len(only & only_truth) / len(only_truth),
           "roster_only_precision": len(only & only_truth) / max(1, len(only))}
    print("roster demo:", {k: round(v, 3) for k, v in fig.items()},
          out["roster_status"].value_counts().to_dict())
    assert fig["missing_recall"] >= 0.95 and fig["roster_only_recall"] >= 0.95
    assert fig["missing_precision"] >= 0.9 and fig["roster_only_precision"] >= 0.9
    # the listed links point at the right person's roster row
    listed = out[out["roster_status"] == STATUS_LISTED]
    row_person = truth.dropna(subset=["roster_row", "person_id"]).astype({"roster_row": int}) \
        .set_index("roster_row")["person_id"]
    right = listed["entity_id"].map(person).to_numpy() == listed["roster_row"].astype(int).map(row_person).to_numpy()
    assert right.mean() >= 0.99
    # every roster entry and every entity is accounted for
    assert set(out["roster_row"].dropna().astype(int)) == set(roster["roster_row"])
    assert set(out["entity_id"]) - {""} == set(res.records["entity_id"])


def test_demo_roster_is_deterministic(demo):
    res, roster, out = demo
    cfg = load_config(ROOT / "configs" / "sample.toml")
    again = reconcile_roster(res.records, read_roster(cfg), cfg.linkage, res.model)
    assert again.to_csv(index=False) == out.to_csv(index=False)
