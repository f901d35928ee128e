"""Counting people, not rows: every count is per entity, each entity in exactly one group.

A child who appears in five sheets is one child.  Reports count through these
helpers so nobody sums rows by mistake.  A value the records do not give
(no birth date, no stated age, no event date) is its own group, ``unknown``,
never dropped and never guessed.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["UNKNOWN", "entity_value", "entity_first_date", "entity_birth_date", "age_at",
           "age_band", "count_entities", "children_by_age_at_separation"]

UNKNOWN = "unknown"


def _text(s: pd.Series) -> pd.Series:
    return s.astype(str).str.strip().replace({"nan": "", "NaT": "", "<NA>": "", "None": ""})


def entity_value(records: pd.DataFrame, column: str, entity: str = "entity_id") -> pd.Series:
    """Per entity, the most frequent non-empty value of ``column``; "" when none, and "" when two
    values tie for most frequent (a conflict is never settled by guessing)."""
    vals = pd.DataFrame({"e": records[entity].astype(str), "v": _text(records[column])})
    ents = pd.Index(sorted(vals["e"].unique()), name=entity)
    vals = vals[vals["v"] != ""]
    if vals.empty:
        return pd.Series("", index=ents, dtype=object)
    counts = vals.groupby(["e", "v"]).size().rename("n").reset_index()
    counts = counts.sort_values(["e", "n", "v"], ascending=[True, False, True], kind="mergesort")
    top = counts.drop_duplicates("e").set_index("e")
    runner = counts[counts.duplicated("e")].drop_duplicates("e").set_index("e")["n"]
    tied = runner.reindex(top.index).eq(top["n"])
    best = top["v"].where(~tied, "")
    return best.reindex(ents, fill_value="").rename(column)


def entity_first_date(records: pd.DataFrame, columns, entity: str = "entity_id") -> pd.Series:
    """Per entity, the earliest date found in any of ``columns`` (ISO text) over its records; NaT when none."""
    cols = [columns] if isinstance(columns, str) else list(columns)
    ents = records[entity].astype(str)
    stacked = pd.concat([pd.to_datetime(_text(records[c]), format="%Y-%m-%d", errors="coerce") for c in cols],
                        axis=1).min(axis=1)
    out = stacked.groupby(ents.to_numpy()).min()
    out.index.name = entity
    return out.sort_index()


def entity_birth_date(records: pd.DataFrame, entity: str = "entity_id") -> pd.DataFrame:
    """Per entity, the birth date as a range: ``earliest`` and ``latest`` (Timestamps, NaT when unknown).

    A written birth date (the most frequent one) gives a one-day range; with none,
    the stated ages' ranges are intersected (their union when they do not overlap).
    """
    best = pd.to_datetime(entity_value(records, "birth_date", entity), format="%Y-%m-%d", errors="coerce")
    ents = records[entity].astype(str).to_numpy()
    lo = pd.to_datetime(_text(records.get("birth_date_min", pd.Series("", index=records.index))),
                        format="%Y-%m-%d", errors="coerce")
    hi = pd.to_datetime(_text(records.get("birth_date_max", pd.Series("", index=records.index))),
                        format="%Y-%m-%d", errors="coerce")
    g_lo_max, g_hi_min = lo.groupby(ents).max(), hi.groupby(ents).min()
    g_lo_min, g_hi_max = lo.groupby(ents).min(), hi.groupby(ents).max()
    overlap = g_lo_max <= g_hi_min
    earliest = g_lo_max.where(overlap, g_lo_min).reindex(best.index)
    latest = g_hi_min.where(overlap, g_hi_max).reindex(best.index)
    has = best.notna()
    earliest[has], latest[has] = best[has], best[has]
    return pd.DataFrame({"earliest": earliest, "latest": latest})


def age_at(records: pd.DataFrame, event_columns=("intake_date",), entity: str = "entity_id") -> pd.DataFrame:
    """Per entity, its age in whole years on its earliest event date: ``youngest`` and ``oldest``
    possible (equal when the birth date is written; NaN when birth or event is unknown)."""
    birth = entity_birth_date(records, entity)
    when = entity_first_date(records, event_columns, entity).reindex(birth.index)

    def years(born: pd.Series) -> pd.Series:
        ok = born.notna() & when.notna()
        out = pd.Series(np.nan, index=born.index)
        b, w = born[ok], when[ok]
        full = w.dt.year - b.dt.year - ((w.dt.month < b.dt.month) |
                                        ((w.dt.month == b.dt.month) & (w.dt.day < b.dt.day))).astype(int)
        out[ok] = full.astype(float)
        return out

    return pd.DataFrame({"youngest": years(birth["latest"]), "oldest": years(birth["earliest"]),
                         "event_date": when})


def age_band(ages: pd.DataFrame, edges=(10,)) -> pd.Series:
    """Band labels ("under 10", "10 and over", or "under 5", "5 to 9", ...), ``unknown`` when the age
    is unknown, negative (an event dated before the birth) or its range straddles an edge (never guessed)."""
    edges = sorted(int(e) for e in edges)
    labels = [f"under {edges[0]}"] + [f"{a} to {b - 1}" for a, b in zip(edges, edges[1:])] + [f"{edges[-1]} and over"]
    bins = [-np.inf] + edges + [np.inf]
    lo = pd.cut(ages["youngest"], bins, right=False, labels=False)
    hi = pd.cut(ages["oldest"], bins, right=False, labels=False)
    same = lo.notna() & (lo == hi) & (ages["youngest"] >= 0)   # an event before birth: unknown
    out = pd.Series(UNKNOWN, index=ages.index, dtype=object)
    out[same] = np.asarray(labels, dtype=object)[lo[same].astype(int).to_numpy()]
    return out


def count_entities(groups: pd.Series, order=None) -> pd.DataFrame:
    """Entities per group from one label per entity (``groups`` indexed by entity id).

    Columns ``group`` and ``entities``; every group in ``order`` is listed (zero
    when empty), ``unknown`` last; the total equals the number of entities.
    """
    if not groups.index.is_unique:
        raise ValueError("count_entities: one label per entity expected; the index repeats an entity")
    counts = groups.value_counts()
    names = list(order) if order is not None else sorted(n for n in counts.index if n != UNKNOWN)
    names = [n for n in names if n != UNKNOWN] + [UNKNOWN]
    extra = sorted(set(counts.index) - set(names))
    names = names[:-1] + extra + [UNKNOWN]
    return pd.DataFrame({"group": names, "entities": [int(counts.get(n, 0)) for n in names]})


def children_by_age_at_separation(records: pd.DataFrame, edges=(10,), child_slot: str = "child",
                                  event_columns=("intake_date", "placement_date")) -> pd.DataFrame:
    """Children counted once each, by age band on their earliest intake or placement date.

    A child is an entity with any record in ``child_slot``.  Missing birth date
    and age, or missing event date, fall in ``unknown``.
    """
    kids = records[records.groupby("entity_id")["slot"].transform(lambda s: (s == child_slot).any())]
    bands = age_band(age_at(kids, event_columns), edges)
    edges = sorted(int(e) for e in edges)
    order = [f"under {edges[0]}"] + [f"{a} to {b - 1}" for a, b in zip(edges, edges[1:])] + [f"{edges[-1]} and over"]
    return count_entities(bands, order)
