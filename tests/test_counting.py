"""Counting per entity: a child in five sheets is one child; unknown ages are their own group."""

from __future__ import annotations

import pandas as pd
import pytest

from linker.counting import (UNKNOWN, age_at, age_band, children_by_age_at_separation, count_entities,
                             entity_birth_date, entity_value)


def _rec(entity, sheet, slot="child", birth="", intake="", lo="", hi=""):
    return {"entity_id": entity, "source_file": f"{sheet}.xlsx", "sheet": sheet, "slot": slot,
            "birth_date": birth, "intake_date": intake, "placement_date": "", "birth_date_min": lo,
            "birth_date_max": hi}


def test_a_child_in_five_sheets_is_counted_once():
    recs = [_rec("E1", f"S{k}", birth="2018-05-01", intake="2026-01-10") for k in range(5)]
    recs += [_rec("E2", "S1", birth="2012-02-02", intake="2026-01-10"),
             _rec("E3", "S2", intake="2026-01-10"),                         # no birth date, no age
             _rec("E4", "S3", slot="parent", birth="1990-01-01", intake="2026-01-10")]
    counts = children_by_age_at_separation(pd.DataFrame(recs)).set_index("group")["entities"]
    assert counts.to_dict() == {"under 10": 1, "10 and over": 1, UNKNOWN: 1}
    assert counts.sum() == 3                        # 3 children, 8 rows


def test_stated_age_range_straddling_the_edge_is_unknown_not_guessed():
    recs = pd.DataFrame([_rec("E1", "S", intake="2026-01-10", lo="2015-06-01", hi="2016-06-30"),   # 9 or 10
                         _rec("E2", "S", intake="2026-01-10", lo="2019-01-11", hi="2020-01-10")])  # 6
    ages = age_at(recs)
    assert ages.loc["E1", "youngest"] == 9 and ages.loc["E1", "oldest"] == 10
    bands = age_band(ages, (10,))
    assert bands.to_dict() == {"E1": UNKNOWN, "E2": "under 10"}


def test_age_in_whole_years_on_the_day_before_and_of_the_birthday():
    recs = pd.DataFrame([_rec("A", "S", birth="2016-01-10", intake="2026-01-09"),
                         _rec("B", "S", birth="2016-01-10", intake="2026-01-10")])
    ages = age_at(recs)
    assert ages.loc["A", "oldest"] == 9 and ages.loc["B", "oldest"] == 10


def test_entity_value_takes_the_most_frequent_value_and_earliest_event():
    recs = pd.DataFrame([_rec("E1", "S1", birth="2018-05-01", intake="2026-03-01"),
                         _rec("E1", "S2", birth="2018-05-01", intake="2026-01-10"),
                         _rec("E1", "S3", birth="2018-01-05", intake="")])
    assert entity_value(recs, "birth_date")["E1"] == "2018-05-01"
    assert str(age_at(recs).loc["E1", "event_date"].date()) == "2026-01-10"
    assert str(entity_birth_date(recs).loc["E1", "earliest"].date()) == "2018-05-01"


def test_count_entities_lists_empty_groups_and_refuses_repeated_entities():
    out = count_entities(pd.Series({"E1": "under 5", "E2": UNKNOWN}), order=["under 5", "5 and over"])
    assert out.to_dict("list") == {"group": ["under 5", "5 and over", UNKNOWN], "entities": [1, 0, 1]}
    with pytest.raises(ValueError, match="one label per entity"):
        count_entities(pd.Series(["a", "b"], index=["E1", "E1"]))


def test_a_tie_between_two_values_is_left_unknown_not_guessed():
    recs = pd.DataFrame({"entity_id": ["E1", "E1", "E1", "E2", "E2", "E2"],
                         "sex": ["M", "F", "", "F", "F", "M"]})
    assert entity_value(recs, "sex").to_dict() == {"E1": "", "E2": "F"}


def test_an_event_dated_before_the_birth_is_an_unknown_age_not_under_five():
    recs = pd.DataFrame([_rec("E3", "S", birth="2024-10-26", intake="2016-08-12")])
    assert age_band(age_at(recs), (5,)).tolist() == [UNKNOWN]
