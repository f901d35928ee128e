"""Tests for linker.checks: each rule on a minimal constructed case, then the demo delivery."""

from __future__ import annotations

import datetime as dt
import io

import pandas as pd
import pytest

from linker.checks import RULES, CheckSettings, build_context, rule_table, run_checks
from linker.schema import FINDING_COLUMNS

SPEC_RULES = [  # rule names and severities fixed by the shared spec
    ("self_parent", "error"), ("parent_too_young", "error"), ("release_before_intake", "error"),
    ("event_after_cutoff", "warning"), ("event_before_birth", "error"), ("sex_conflict", "warning"),
    ("birth_date_conflict", "warning"), ("age_conflict", "warning"), ("too_many_parents", "warning"),
    ("shared_reg_no", "warning"),
]

_DEFAULTS = dict(entity_id="", row_key="", source_file="a.xlsx", sheet="S1", row=2, slot="child",
                 reg_no="", reg_no_status="missing", reg_no_shared=False, given_name="ANA",
                 family_name="SOTO", birth_date="", birth_date_min="", birth_date_max="", age_raw="",
                 sex="", intake_date="", placement_date="", release_date="")


def records(*rows: dict) -> pd.DataFrame:
    """A records frame from partial rows; record_id defaults to R<n>, entity to E<n>, row_key to W<row>."""
    out = []
    for k, r in enumerate(rows):
        full = {"record_id": f"R{k}", **_DEFAULTS, **r}
        full["entity_id"] = full["entity_id"] or f"E{k}"
        full["row_key"] = full["row_key"] or f"W{full['source_file']}{full['sheet']}{full['row']}"
        out.append(full)
    return pd.DataFrame(out, columns=["record_id", *_DEFAULTS])


def claims(*pairs: tuple[str, str], frame: pd.DataFrame) -> pd.DataFrame:
    """Claims (child record, parent record) with the child's provenance."""
    pos = frame.set_index("record_id")
    return pd.DataFrame([{"child_record_id": c, "parent_record_id": p,
                          "source_file": pos.at[c, "source_file"], "sheet": pos.at[c, "sheet"],
                          "row": pos.at[c, "row"]} for c, p in pairs],
                        columns=["child_record_id", "parent_record_id", "source_file", "sheet", "row"])


def found(rule: str, recs: pd.DataFrame, cl: pd.DataFrame | None = None, **settings) -> pd.DataFrame:
    out = run_checks(recs, cl, None, CheckSettings(**settings))
    return out[out["rule"] == rule].reset_index(drop=True)


def ids(frame: pd.DataFrame) -> list[str]:
    return sorted(frame["record_id"])


# --- the rule table -------------------------------------------------------------------------------

def test_rules_follow_the_spec_order_with_plain_explanations():
    """RULES has the spec's names and severities in order; each explanation is one plain sentence."""
    assert [(r.name, r.severity) for r in RULES] == SPEC_RULES
    table = rule_table()
    assert list(table.columns) == ["rule", "severity", "explanation"]
    assert table["rule"].tolist() == [n for n, _ in SPEC_RULES]
    for text in table["explanation"]:
        assert text.endswith(".") and text.count(". ") == 0 and "_" not in text and len(text) < 160
    with pytest.raises(Exception):
        RULES[0].name = "other"            # frozen


def test_empty_inputs_give_empty_findings_with_the_columns():
    """No records (or records without problems) give an empty frame with FINDING_COLUMNS."""
    empty = records().iloc[0:0]
    for out in (run_checks(empty, None, None, CheckSettings()),
                run_checks(empty, claims(frame=empty), pd.DataFrame(columns=["child_entity_id",
                                                                              "parent_entity_id"]),
                           CheckSettings(cutoff_date=dt.date(2026, 1, 1))),
                run_checks(records({"birth_date": "2010-01-01", "sex": "F"}), None, None, CheckSettings())):
        assert list(out.columns) == list(FINDING_COLUMNS)
        assert out.empty


# --- one case per rule: a positive and a near miss ------------------------------------------------

def test_self_parent_on_a_shared_reg_no_row_and_on_one_entity():
    """A row writing one reg_no for child and parent, or a claim inside one entity, flags both records."""
    recs = records(
        {"row": 2, "slot": "child", "reg_no": "12345674", "reg_no_status": "valid", "reg_no_shared": True},
        {"row": 2, "slot": "parent", "reg_no": "12345674", "reg_no_status": "valid", "reg_no_shared": True},
        {"row": 3, "slot": "child", "entity_id": "E9"},
        {"row": 3, "slot": "parent", "entity_id": "E9"},
        {"row": 4, "slot": "child", "reg_no": "12345674", "reg_no_status": "valid"},   # near miss: other
        {"row": 4, "slot": "parent", "reg_no": "23456781", "reg_no_status": "valid"},  # numbers, entities
    )
    out = found("self_parent", recs, claims(("R0", "R1"), ("R2", "R3"), ("R4", "R5"), frame=recs))
    assert ids(out) == ["R0", "R1", "R2", "R3"]
    assert set(out["severity"]) == {"error"}
    assert out.loc[out["row"] == 2, "detail"].tolist() == [
        "reg_no 12345674 is written for the child and parent on this row"] * 2
    assert out.loc[out["row"] == 3, "detail"].str.contains("same person").all()


def test_parent_too_young_uses_the_gap_and_falls_back_to_the_entity():
    """A parent under 12 years older is flagged (12 is common practice, not law); exactly 12 is not."""
    recs = records(
        {"row": 2, "slot": "child", "birth_date": "2012-03-02"},
        {"row": 2, "slot": "parent", "birth_date": "2000-03-03"},            # 11.99 years older
        {"row": 3, "slot": "child", "birth_date": "2012-03-03"},
        {"row": 3, "slot": "parent", "birth_date": "2000-03-03"},            # exactly 12: near miss
        {"row": 4, "slot": "child", "birth_date": "2010-01-01"},
        {"row": 4, "slot": "parent", "entity_id": "EP"},                     # no birth date here ...
        {"row": 9, "slot": "parent", "entity_id": "EP", "birth_date": "2001-06-01"},  # ... the person's
    )
    cl = claims(("R0", "R1"), ("R2", "R3"), ("R4", "R5"), frame=recs)
    out = found("parent_too_young", recs, cl)
    assert ids(out) == ["R0", "R1", "R4", "R5"]
    first = out.loc[out["record_id"] == "R1", "detail"].item()
    assert "2000-03-03" in first and "2012-03-02" in first and "12.0 years older" in first
    assert "(other records)" in out.loc[out["record_id"] == "R5", "detail"].item()
    assert "8.6 years older" in out.loc[out["record_id"] == "R5", "detail"].item()
    # settings honoured: a gap of 8 years clears every claim, a gap of 13 adds the exact-12 one
    assert found("parent_too_young", recs, cl, min_parent_age_gap=8).empty
    assert ids(found("parent_too_young", recs, cl, min_parent_age_gap=13)) == ["R0", "R1", "R2", "R3", "R4", "R5"]


def test_parent_born_after_the_child_says_younger():
    recs = records({"slot": "child", "birth_date": "2000-01-01"},
                   {"slot": "parent", "birth_date": "2005-01-01"})
    out = found("parent_too_young", recs, claims(("R0", "R1"), frame=recs))
    assert out["detail"].str.contains("5.0 years younger").all() and len(out) == 2


def test_release_before_intake_or_placement_on_one_record():
    """Release earlier than intake or placement is flagged; a same-day release is not."""
    recs = records(
        {"row": 2, "intake_date": "2026-02-10", "release_date": "2026-01-03"},
        {"row": 3, "placement_date": "2026-02-10", "release_date": "2026-02-09"},
        {"row": 4, "intake_date": "2026-02-10", "placement_date": "2026-02-11", "release_date": "2026-02-11"},
        {"row": 5, "intake_date": "2026-02-10"},                            # no release: nothing to check
    )
    out = found("release_before_intake", recs)
    assert out["detail"].tolist() == ["release 2026-01-03 before intake 2026-02-10",
                                      "release 2026-02-09 before placement 2026-02-10"]


def test_event_after_cutoff_and_no_cutoff():
    """Events after the cutoff are flagged (the cutoff day itself is not); without a cutoff, nothing."""
    recs = records({"row": 2, "release_date": "2026-11-04"},
                   {"row": 3, "intake_date": "2026-10-31", "release_date": "2026-10-31"},
                   {"row": 4, "placement_date": "2027-01-02", "intake_date": "2026-12-01"})
    out = found("event_after_cutoff", recs, cutoff_date=dt.date(2026, 10, 31))
    assert ids(out) == ["R0", "R2"]
    assert out.loc[0, "detail"] == "release 2026-11-04 after the cutoff date 2026-10-31"
    assert out.loc[1, "detail"] == ("intake 2026-12-01 after the cutoff date 2026-10-31; "
                                    "placement 2027-01-02 after the cutoff date 2026-10-31")
    assert set(out["severity"]) == {"warning"}
    assert found("event_after_cutoff", recs, cutoff_date=None).empty


def test_event_before_birth_own_date_then_entity_date_never_a_stated_age():
    """An intake before the record's birth date, or the person's when the record has none; ages do not count."""
    recs = records(
        {"row": 2, "birth_date": "2020-05-01", "intake_date": "2020-04-30"},
        {"row": 3, "birth_date": "2020-05-01", "intake_date": "2020-05-01"},          # born that day: fine
        {"row": 4, "entity_id": "EX", "intake_date": "2015-01-01"},                   # no birth date here
        {"row": 5, "entity_id": "EX", "birth_date": "2016-02-02"},
        {"row": 6, "birth_date_min": "2025-01-01", "birth_date_max": "2025-12-31", "age_raw": "0",
         "intake_date": "2025-06-01"},                                                # age only: skipped
    )
    out = found("event_before_birth", recs)
    assert ids(out) == ["R0", "R2"]
    assert out.loc[0, "detail"] == "intake 2020-04-30 before birth 2020-05-01"
    assert out.loc[1, "detail"] == "intake 2015-01-01 before birth 2016-02-02 (from this person's other records)"


def test_sex_conflict_flags_the_minority_or_all_when_tied():
    recs = records(
        *[{"entity_id": "EA", "row": r, "sex": "M"} for r in (2, 3, 4)],
        {"entity_id": "EA", "row": 5, "sex": "F"},
        {"entity_id": "EA", "row": 6, "sex": ""},                     # unknown sex is no conflict
        {"entity_id": "EB", "row": 7, "sex": "M"}, {"entity_id": "EB", "row": 8, "sex": "F"},
        {"entity_id": "EC", "row": 9, "sex": "F"}, {"entity_id": "EC", "row": 10, "sex": "F"},
    )
    out = found("sex_conflict", recs)
    assert ids(out) == ["R3", "R5", "R6"]
    assert out.loc[out["record_id"] == "R3", "detail"].item() == (
        "sex F here; this person's records show M (3 records), F (1 record)")


def test_birth_date_conflict_with_tolerance_and_ties():
    recs = records(
        *[{"entity_id": "EA", "row": r, "birth_date": "2015-09-04"} for r in (2, 3, 4)],
        {"entity_id": "EA", "row": 5, "birth_date": "2015-04-09"},            # day and month swapped
        {"entity_id": "EB", "row": 6, "birth_date": "2010-01-01"},
        {"entity_id": "EB", "row": 7, "birth_date": "2010-01-03"},            # tie, 2 days apart
        {"entity_id": "EB", "row": 8},                                         # no date: not involved
        {"entity_id": "EC", "row": 9, "birth_date": "2011-01-01"},
        {"entity_id": "EC", "row": 10, "birth_date": "2011-01-01"},
    )
    out = found("birth_date_conflict", recs)
    assert ids(out) == ["R3", "R4", "R5"]
    assert out.loc[out["record_id"] == "R3", "detail"].item() == (
        "birth date 2015-04-09 here; this person's records show 2015-09-04 (3 records), 2015-04-09 (1 record)")
    assert ids(found("birth_date_conflict", recs, birth_date_tolerance_days=2)) == ["R3"]
    assert found("birth_date_conflict", recs, birth_date_tolerance_days=200).empty


def test_age_conflict_outside_the_range_plus_slack():
    """A stated age whose range misses the person's birth date by more than 30 days is flagged."""
    recs = records(
        {"entity_id": "EA", "row": 2, "birth_date": "2013-10-24"},
        {"entity_id": "EA", "row": 3, "age_raw": "13", "birth_date_min": "2012-07-06",
         "birth_date_max": "2013-07-05"},                                   # 111 days too early
        {"entity_id": "EB", "row": 4, "birth_date": "2013-08-01"},
        {"entity_id": "EB", "row": 5, "age_raw": "13", "birth_date_min": "2012-07-06",
         "birth_date_max": "2013-07-05"},                                   # 27 days: within slack
        {"entity_id": "EC", "row": 6, "age_raw": "2", "birth_date_min": "2020-01-01",
         "birth_date_max": "2020-12-31"},                                   # no birth date anywhere
    )
    out = found("age_conflict", recs)
    assert ids(out) == ["R1"]
    assert out.loc[0, "detail"] == ("stated age '13' means born 2012-07-06 to 2013-07-05, but this person's "
                                    "birth date is 2013-10-24")


def test_too_many_parents_flags_every_claim_of_the_child():
    recs = records(
        *[{"entity_id": "EK", "row": r, "slot": "child"} for r in (2, 3, 4)],
        {"entity_id": "P1", "row": 2, "slot": "parent", "given_name": "LUIS"},
        {"entity_id": "P2", "row": 3, "slot": "parent", "given_name": "EVA"},
        {"entity_id": "P3", "row": 4, "slot": "parent", "given_name": "ROSA"},
        *[{"entity_id": "EL", "row": r, "slot": "child"} for r in (5, 6)],    # two parents: fine
        {"entity_id": "P1", "row": 5, "slot": "parent"}, {"entity_id": "P2", "row": 6, "slot": "parent"},
    )
    cl = claims(("R0", "R3"), ("R1", "R4"), ("R2", "R5"), ("R6", "R8"), ("R7", "R9"), frame=recs)
    out = found("too_many_parents", recs, cl)
    assert ids(out) == ["R0", "R1", "R2", "R3", "R4", "R5"]
    assert set(out["detail"]) == {"3 different parents or guardians are named for this child (more than 2): "
                                  "EVA SOTO; LUIS SOTO; ROSA SOTO"}
    assert found("too_many_parents", recs, cl, max_parents=3).empty
    assert len(found("too_many_parents", recs, cl, max_parents=1)) == 10


def test_too_many_parents_reads_the_relations_table_when_given():
    recs = records({"entity_id": "EK", "slot": "child"}, {"entity_id": "P1", "slot": "parent"})
    cl = claims(("R0", "R1"), frame=recs)
    rel = pd.DataFrame({"child_entity_id": ["EK", "EK", "EK"], "parent_entity_id": ["P1", "P2", "P3"]})
    out = run_checks(recs, cl, rel, CheckSettings())
    assert ids(out[out["rule"] == "too_many_parents"]) == ["R0", "R1"]


def test_shared_reg_no_flags_only_the_record_holding_another_persons_number():
    recs = records(
        *[{"entity_id": "EA", "row": r, "reg_no": "12345674", "reg_no_status": "valid"} for r in (2, 3, 4)],
        *[{"entity_id": "EB", "row": r, "reg_no": "23456781", "reg_no_status": "valid"} for r in (5, 6)],
        {"entity_id": "EB", "row": 7, "reg_no": "12345674", "reg_no_status": "valid"},   # EA's number
        {"entity_id": "EC", "row": 8, "reg_no": "34567898", "reg_no_status": "valid"},   # two persons, one
        {"entity_id": "ED", "row": 9, "reg_no": "34567898", "reg_no_status": "valid"},   # record each
        {"entity_id": "EE", "row": 10, "reg_no": "23456781", "reg_no_status": "check_failed"},  # not valid
        {"entity_id": "EF", "row": 11, "reg_no": "23456781", "reg_no_status": "valid", "reg_no_shared": True},
    )
    out = found("shared_reg_no", recs)
    assert ids(out) == ["R5", "R6", "R7"]
    assert out.loc[out["record_id"] == "R5", "detail"].item() == (
        "reg_no 12345674 here is also on 3 records of another person (entity EA)")
    assert out.loc[out["record_id"] == "R6", "detail"].item() == "reg_no 34567898 is on records of 2 different persons"


# --- provenance, order, input forms ---------------------------------------------------------------

def _mixed() -> tuple[pd.DataFrame, pd.DataFrame]:
    recs = records(
        {"source_file": "b.csv", "sheet": "b", "row": 10, "intake_date": "2026-02-10", "release_date": "2026-01-03",
         "birth_date": "2026-03-01"},
        {"source_file": "b.csv", "sheet": "b", "row": 9, "intake_date": "2026-02-10", "release_date": "2026-01-03"},
        {"source_file": "a.xlsx", "sheet": "Z", "row": 3, "slot": "parent", "release_date": "2026-12-01",
         "intake_date": "2026-12-02", "sex": "M", "entity_id": "EQ"},
        {"source_file": "a.xlsx", "sheet": "Z", "row": 3, "slot": "child", "release_date": "2026-12-01",
         "intake_date": "2026-12-02", "sex": "F", "entity_id": "EQ", "reg_no_shared": True,
         "reg_no": "12345674", "reg_no_status": "valid"},
    )
    return recs, claims(("R3", "R2"), frame=recs)


def test_findings_carry_provenance_and_sort_deterministically():
    recs, cl = _mixed()
    out = run_checks(recs, cl, None, CheckSettings(cutoff_date=dt.date(2026, 10, 31)))
    assert list(out.columns) == list(FINDING_COLUMNS)
    by_id = recs.set_index("record_id")
    for _, f in out.iterrows():
        src = by_id.loc[f["record_id"]]
        assert (f["entity_id"], f["source_file"], f["sheet"], f["row"], f["slot"]) == (
            src["entity_id"], src["source_file"], src["sheet"], src["row"], src["slot"])
    order = {name: k for k, (name, _) in enumerate(SPEC_RULES)}
    keys = list(zip(out["rule"].map(order), out["source_file"], out["sheet"], out["row"], out["slot"]))
    assert keys == sorted(keys)
    # numeric row order: row 9 before row 10
    rel = out[out["rule"] == "release_before_intake"]
    assert rel["row"].tolist() == [3, 3, 9, 10]
    # shuffled input, same findings
    again = run_checks(recs.sample(frac=1, random_state=3), cl.iloc[::-1], None,
                       CheckSettings(cutoff_date=dt.date(2026, 10, 31)))
    pd.testing.assert_frame_equal(out, again)


def test_text_read_back_from_csv_gives_the_same_findings():
    """records.csv and claims.csv read back as text (rows, flags, dates all strings) give equal findings."""
    recs, cl = _mixed()
    settings = CheckSettings(cutoff_date=dt.date(2026, 10, 31))
    direct = run_checks(recs, cl, None, settings)
    as_text = [pd.read_csv(io.StringIO(f.to_csv(index=False)), dtype=str, keep_default_na=False)
               for f in (recs, cl)]
    assert as_text[0]["reg_no_shared"].tolist() == ["False", "False", "False", "True"]
    back = run_checks(as_text[0], as_text[1], None, settings)
    pd.testing.assert_frame_equal(direct, back)
    assert direct["rule"].nunique() >= 4


def test_a_claim_naming_an_unknown_record_is_reported_with_its_row():
    recs, cl = _mixed()
    cl.loc[0, "parent_record_id"] = "R_missing"
    with pytest.raises(ValueError, match=r"a\.xlsx, sheet 'Z', row 3: the claim's parent record"):
        build_context(recs, cl)


def test_settings_reject_impossible_values():
    for bad in ({"min_parent_age_gap": -1}, {"birth_date_tolerance_days": -1}, {"max_parents": 0}):
        with pytest.raises(ValueError):
            CheckSettings(**bad)


def test_sample_config_documents_the_rules_keys():
    """configs/sample.toml's [rules] section gives the checks their settings (cutoff set, defaults kept)."""
    from linker import load_config
    from tests.conftest import ROOT
    cfg = load_config(ROOT / "configs" / "sample.toml")
    assert cfg.checks == CheckSettings(cutoff_date=dt.date(2026, 10, 31), min_parent_age_gap=12,
                                       birth_date_tolerance_days=0, max_parents=2)


def test_docs_list_every_rule_with_its_severity_and_explanation():
    """docs/config.md's [rules] table shows each rule as rule_table() has it."""
    from tests.conftest import ROOT
    doc = (ROOT / "docs" / "config.md").read_text(encoding="utf-8")
    for _, r in rule_table().iterrows():
        assert f"| `{r['rule']}` | {r['severity']} | {r['explanation']} |" in doc


# --- the demo delivery: labelled injections found, clean rows left alone ---------------------------

# The record fields each rule reads; a defect (sample/truth/defects.csv) in one of them may rightly
# raise the rule, so such records do not count as clean for it.
_EVENTS = {"intake_date", "placement_date", "release_date"}
READS = {
    "self_parent": {"reg_no"},
    "parent_too_young": {"birth_date"},
    "release_before_intake": _EVENTS,
    "event_after_cutoff": _EVENTS,
    "event_before_birth": {"birth_date"} | _EVENTS,
    "sex_conflict": {"sex"},
    "birth_date_conflict": {"birth_date"},
    "age_conflict": {"birth_date"},
    "too_many_parents": {"reg_no", "name", "given_name", "family_name", "birth_date", "sex"},
    "shared_reg_no": {"reg_no"},
}
# rules that compare one person's records with each other: a defect on any record of the person counts
PERSON_LEVEL = {"parent_too_young", "event_before_birth", "sex_conflict", "birth_date_conflict",
                "age_conflict", "too_many_parents", "shared_reg_no", "self_parent"}
# claim-based rules: a record is also left out when another person on its row (or claim) is affected
CLAIM_BASED = {"self_parent", "parent_too_young", "too_many_parents"}
KEY = ["source_file", "sheet", "row", "slot"]


def _text_csv(path) -> pd.DataFrame:
    return pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8")


@pytest.fixture(scope="module")
def demo():
    """The demo run's findings with each record's true person, plus the truth files."""
    from linker import load_config, run_pipeline
    from linker.relations import relations_table
    from tests.conftest import ROOT
    truth = ROOT / "sample" / "truth"
    if not (truth / "injected.csv").is_file():
        pytest.skip("sample/truth/injected.csv not generated yet")
    cfg = load_config(ROOT / "configs" / "sample.toml")
    result = run_pipeline(cfg)
    rel = relations_table(result.records, result.claims)
    findings = run_checks(result.records, result.claims, rel, cfg.checks)
    people = _text_csv(truth / "records.csv")
    findings = findings.astype({"row": str}).merge(people, on=KEY, how="left")
    where = result.records[["record_id", *KEY]]
    claims = (result.claims[["child_record_id", "parent_record_id"]]
              .merge(where.add_prefix("c_"), left_on="child_record_id", right_on="c_record_id")
              .merge(where.add_prefix("p_"), left_on="parent_record_id", right_on="p_record_id"))
    return findings, people, _text_csv(truth / "injected.csv"), _text_csv(truth / "defects.csv"), claims, result


def _not_clean(rule: str, findings: pd.DataFrame, people: pd.DataFrame, injected: pd.DataFrame,
               defects: pd.DataFrame, claims: pd.DataFrame) -> pd.Series:
    """Per finding line: True when the record may rightly be flagged by ``rule`` (see the test's docstring)."""
    reads = defects[defects["field"].isin(READS[rule])]
    rows = lambda f: pd.MultiIndex.from_frame(f[KEY[:3]].astype(str))   # noqa: E731
    slots = lambda f: pd.MultiIndex.from_frame(f[KEY].astype(str))      # noqa: E731
    touched_rows = rows(injected)                                         # any injection, any rule
    event_rows = rows(reads[reads["field"].isin(_EVENTS)])
    out = (rows(findings).isin(touched_rows) | rows(findings).isin(event_rows)
           | slots(findings).isin(slots(reads)))
    if rule in PERSON_LEVEL:
        affected = set(reads["person_id"]) | set(injected["person_id"])
        if rule in CLAIM_BASED:
            # the other persons named on the same row or claim as an affected person
            on_rows = people[rows(people).isin(rows(people[people["person_id"].isin(affected)]))]
            pid = people.set_index(KEY)["person_id"]
            sides = [pid.reindex(pd.MultiIndex.from_frame(claims[[p + c for c in KEY]].astype(str))
                                 .set_names(KEY)).to_numpy() for p in ("c_", "p_")]
            pairs = pd.DataFrame({"a": sides[0], "b": sides[1]}).dropna()
            affected |= set(on_rows["person_id"]) | set(pairs.loc[pairs["a"].isin(affected), "b"]) \
                | set(pairs.loc[pairs["b"].isin(affected), "a"])
        out |= findings["person_id"].isin(affected).to_numpy()
    return pd.Series(out, index=findings.index)


def test_demo_injections_found_and_clean_rows_left_alone(demo, capsys):
    """On the demo delivery every rule finds >= 95 % of its labelled injections and flags no clean record.

    Clean for a rule: a record whose row carries no labelled injection (of any rule) and whose own
    cells carry no defect (defects.csv) in a field the rule reads.  For rules that compare a person's
    records (or a claim's two persons) the whole person counts: a defect or injection on any record
    of the person (or of the other person of a claim) may rightly raise the rule on the others.
    """
    findings, people, injected, defects, claims, _ = demo
    lines = []
    for rule in RULES:
        mine = findings[findings["rule"] == rule.name]
        inj = injected[injected["rule"] == rule.name]
        hit = pd.MultiIndex.from_frame(inj[KEY]).isin(pd.MultiIndex.from_frame(mine[KEY]))
        flagged_clean = mine[~_not_clean(rule.name, mine, people, injected, defects, claims)]
        lines.append((rule.name, int(hit.sum()), len(inj), len(mine), len(flagged_clean)))
        with capsys.disabled():
            print(f"\n{rule.name:22s} injected found {hit.sum():3d}/{len(inj):3d}  findings {len(mine):4d}  "
                  f"clean flagged {len(flagged_clean)}")
            if len(flagged_clean):
                print(flagged_clean[["entity_id", "person_id", *KEY, "detail"]].to_string())
    for name, got, total, _, clean in lines:
        assert total > 0, f"{name}: no labelled injections in the demo"
        assert got >= 0.95 * total, f"{name}: found {got} of {total} injected rows"
        assert clean == 0, f"{name}: {clean} clean records flagged"


def test_demo_findings_are_the_same_from_the_written_csv_files(demo, tmp_path):
    """records.csv and claims.csv as a run writes them, read back as text, give byte-identical findings."""
    from linker.io import write_csv
    from linker.relations import relations_table
    findings, _, _, _, _, result = demo
    write_csv(result.records, tmp_path / "records.csv")
    write_csv(result.claims, tmp_path / "claims.csv")
    recs, cl = _text_csv(tmp_path / "records.csv"), _text_csv(tmp_path / "claims.csv")
    settings = CheckSettings(cutoff_date=dt.date(2026, 10, 31))
    direct = run_checks(result.records, result.claims, relations_table(result.records, result.claims), settings)
    back = run_checks(recs, cl, relations_table(recs, cl), settings)
    assert len(direct) == len(findings) > 0
    assert direct.to_csv(index=False) == back.to_csv(index=False)
