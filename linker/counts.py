"""Reported totals beside computed counts: do the numbers an agency reports add up?

Config ``[[reported_totals]]`` lines name a category (``sex``, ``location``,
``status``, ``age_band``), a value, the total the agency reported, its source
and whom it counts (``children`` or ``everyone``).  Computed counts are per
entity (linker.counting: each person once, however many rows name them),
and every count lists the entities behind it so a difference can be traced.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
from openpyxl import Workbook

from .counting import UNKNOWN, age_at, age_band, entity_value
from .io import safe_cell
from .queries import save_book

__all__ = ["CATEGORIES", "entity_categories", "count_table", "write_counts"]

CATEGORIES = ("sex", "location", "status", "age_band")
COUNT_COLUMNS = ("category", "value", "who", "reported", "computed", "difference", "source")


def entity_categories(records: pd.DataFrame, edges=(5, 10, 14, 18), child_slot: str = "child") -> pd.DataFrame:
    """One line per entity: ``child`` (any record in the child slot) and its value per category
    (the most frequent non-empty value; ``unknown`` when the records give none)."""
    out = pd.DataFrame(index=pd.Index(sorted(records["entity_id"].astype(str).unique()), name="entity_id"))
    out["child"] = records.assign(_c=records["slot"].astype(str) == child_slot).groupby(
        records["entity_id"].astype(str))["_c"].any().reindex(out.index)
    for col in ("sex", "location", "status"):
        out[col] = entity_value(records, col).reindex(out.index).replace("", UNKNOWN)
    out["age_band"] = age_band(age_at(records, ("intake_date", "placement_date")), edges).reindex(out.index)
    return out


def count_table(records: pd.DataFrame, reported: pd.DataFrame, edges=(5, 10, 14, 18)) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The reported totals with the computed count and the difference, and the entities behind each count.

    ``reported``: category, value, reported, source, who.  Values are matched
    after folding case and spaces ("Port Emberly" = "PORT EMBERLY").
    """
    cats = entity_categories(records, edges)
    lines, behind = [], []
    for k, r in reported.reset_index(drop=True).iterrows():
        who = str(r.get("who", "children") or "children")
        pool = cats[cats["child"]] if who == "children" else cats
        want = " ".join(str(r["value"]).upper().split())
        have = pool[r["category"]].astype(str).str.upper().str.split().str.join(" ")
        hit = pool.index[have == want]
        lines.append({"category": r["category"], "value": r["value"], "who": who,
                      "reported": int(r["reported"]), "computed": int(len(hit)),
                      "difference": int(len(hit)) - int(r["reported"]), "source": r.get("source", "")})
        behind.append(pd.DataFrame({"line": k + 1, "category": r["category"], "value": r["value"],
                                    "entity_id": list(hit)}))
    table = pd.DataFrame(lines, columns=list(COUNT_COLUMNS))
    ents = pd.concat(behind, ignore_index=True) if behind else pd.DataFrame(
        columns=["line", "category", "value", "entity_id"])
    return table, ents


def write_counts(table: pd.DataFrame, entities: pd.DataFrame, path: str | Path) -> Path:
    """counts.xlsx: the comparison, and the entities behind every computed count (formula-safe, deterministic)."""
    book = Workbook()
    book.remove(book.active)
    for title, frame in (("counts", table), ("entities behind counts", entities)):
        sheet = book.create_sheet(title)
        sheet.append([safe_cell(c) for c in frame.columns])
        for row in frame.itertuples(index=False):
            sheet.append([safe_cell(v) if isinstance(v, str) else v for v in row])
        sheet.freeze_panes = "A2"
    return save_book(book, path)
