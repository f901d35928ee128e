"""Reported totals beside computed counts: the computed counts checked by an independent count."""

from __future__ import annotations

import pandas as pd
import pytest

from linker.counts import count_table, write_counts

from conftest import ROOT

PROV = ["source_file", "sheet", "row", "slot"]


def _rec(entity, slot, sex="", location="", birth="", intake=""):
    return {"entity_id": entity, "slot": slot, "sex": sex, "location": location, "status": "",
            "birth_date": birth, "intake_date": intake, "placement_date": "", "birth_date_min": "",
            "birth_date_max": ""}


def test_counts_are_per_entity_and_list_the_entities_behind_them(tmp_path):
    recs = pd.DataFrame([_rec("E1", "child", "F", "Port Emberly", "2023-01-01", "2026-01-01")] * 5 +
                        [_rec("E2", "child", "M", "PORT  EMBERLY", "2015-01-01", "2026-01-01"),
                         _rec("E3", "parent", "F", "Port Emberly", "1990-01-01", "2026-01-01"),
                         _rec("E4", "child", "", "", "", "")])
    reported = pd.DataFrame([
        {"category": "location", "value": "Port Emberly", "reported": 3, "source": "s", "who": "children"},
        {"category": "sex", "value": "F", "reported": 2, "source": "s", "who": "everyone"},
        {"category": "age_band", "value": "under 5", "reported": 1, "source": "s", "who": "children"},
        {"category": "age_band", "value": "unknown", "reported": 0, "source": "s", "who": "children"},
    ])
    table, ents = count_table(recs, reported)
    assert table["computed"].tolist() == [2, 2, 1, 1]          # E1 once, not five times
    assert table["difference"].tolist() == [-1, 0, 0, 1]
    assert ents[ents["line"] == 1]["entity_id"].tolist() == ["E1", "E2"]
    assert ents[ents["line"] == 4]["entity_id"].tolist() == ["E4"]
    path = write_counts(table, ents, tmp_path / "counts.xlsx")
    again = write_counts(table, ents, tmp_path / "again.xlsx")
    assert path.read_bytes() == again.read_bytes()


def _demo_run():
    from linker import load_config, run_pipeline

    return run_pipeline(load_config(ROOT / "configs" / "sample.toml"))


def _truth(name):
    return pd.read_csv(ROOT / "sample" / "truth" / name, dtype=str, keep_default_na=False)


def _line(table, category, value):
    return int(table[(table["category"] == category) & (table["value"] == value)]["computed"].iloc[0])


def test_demo_count_table_equals_counts_computed_independently_from_truth():
    """The sample config's totals computed over the demo records grouped by the generator's true
    person (invented demo data), against counts computed here with plain pandas from the truth files."""
    res = _demo_run()
    rec = res.records.astype({"row": str}).merge(_truth("records.csv"), on=PROV, validate="1:1")
    rec = rec.assign(entity_id=rec["person_id"])
    table, _ = count_table(rec, _reported(), _EDGES)
    persons = _truth("persons.csv").set_index("person_id").loc[sorted(set(rec["person_id"]))]
    children = set(rec.loc[rec["slot"] == "child", "person_id"])

    # sex, everyone: the persons' true sex (a person whose records tie between two values counts as unknown)
    assert _line(table, "sex", "F") == int((persons["sex"] == "F").sum()) == 675

    # location, children: the most frequent written location of each child, ties left out
    kids = rec[rec["person_id"].isin(children) & (rec["location"] != "")]
    n = kids.groupby(["person_id", "location"]).size().rename("n").reset_index()
    top = n.groupby("person_id")["n"].transform("max")
    best = n[n["n"] == top].groupby("person_id").filter(lambda g: len(g) == 1)
    folded = best["location"].str.upper().str.split().str.join(" ")
    assert _line(table, "location", "Port Emberly") == int((folded == "PORT EMBERLY").sum())

    # age band, children: true birth date against the earliest written intake or placement date
    events = pd.concat([pd.to_datetime(rec[c], format="%Y-%m-%d", errors="coerce")
                        for c in ("intake_date", "placement_date")], axis=1).min(axis=1)
    first = events.groupby(rec["person_id"]).min().reindex(sorted(children))
    born = pd.to_datetime(persons["birth_date"]).reindex(first.index)
    age = first.dt.year - born.dt.year - ((first.dt.month < born.dt.month) |
                                          ((first.dt.month == born.dt.month) & (first.dt.day < born.dt.day)))
    true_under5 = set(age.index[(age >= 0) & (age < 5)])
    from linker.counts import entity_categories

    ours = entity_categories(rec, _EDGES)["age_band"]
    ours_under5 = set(ours.index[(ours == "under 5") & ours.index.isin(list(children))])
    defects = pd.concat([_truth("defects.csv")[["person_id", "field"]], _truth("injected.csv")[["person_id", "field"]]])
    dated = set(defects.loc[defects["field"].isin(["birth_date", "age", "intake_date", "placement_date"]), "person_id"])
    # every child counted differently from the truth has a damaged birth date, age or event date
    assert (ours_under5 ^ true_under5) <= dated
    assert _line(table, "age_band", "under 5") == len(ours_under5)
    print(f"under 5: computed {len(ours_under5)}, truth {len(true_under5)}, "
          f"differing {len(ours_under5 ^ true_under5)} (all with damaged dates)")


def test_demo_counts_over_linked_entities_differ_from_truth_only_by_split_persons():
    """Over the linked entities a person the linkage left in two pieces counts twice; the difference
    from the truth-grouped count is bounded by the number of such extra pieces."""
    res = _demo_run()
    table, _ = res.counts
    rec = res.records.astype({"row": str}).merge(_truth("records.csv"), on=PROV, validate="1:1")
    pieces = rec.groupby("person_id")["entity_id"].nunique()
    extra = int((pieces - 1).sum())
    truth_table, _ = count_table(rec.assign(entity_id=rec["person_id"]), _reported())
    diff = (table["computed"] - truth_table["computed"]).abs()
    print(f"extra pieces {extra}; differences {diff.tolist()}")
    assert (diff <= extra).all() and extra < 0.05 * len(pieces)
    # a plain groupby over the run's records gives the same per-entity count
    sex = rec[rec["sex"] != ""].groupby("entity_id")["sex"].agg(
        lambda s: s.value_counts().index[0] if (s.value_counts() == s.value_counts().max()).sum() == 1 else "")
    assert _line(table, "sex", "F") == int((sex == "F").sum())


def _reported():
    from linker import load_config

    return pd.DataFrame(list(load_config(ROOT / "configs" / "sample.toml").reported_totals))


_EDGES = (5, 10, 14, 18)   # the sample config's [report] age_edges

