"""Child–parent relations: row-level claims lifted to entities.

A row naming a child and a parent (or guardian) claims a relation between the
two person-records; once records are grouped into entities, every claim
becomes evidence for a relation between two entities.  Independent sources are
distinct source files: the same file repeating a claim on many rows counts once.

A relation is a lead for qualified staff to verify, never a determination.
"""

from __future__ import annotations

import json

import pandas as pd

from .normalize import fold_header
from .schema import CLAIM_COLUMNS, EVENT_FIELDS, RELATION_COLUMNS

__all__ = ["claims_with_entities", "relations_table", "family_claims", "family_values"]

_DATE_EVENTS = tuple(f for f in EVENT_FIELDS if f.endswith("_date"))


def family_values(records: pd.DataFrame, family_columns: dict) -> pd.Series:
    """Each record's value in its sheet's family column ("" when the sheet has none or the cell is empty).

    ``family_columns`` maps (source_file, sheet) to the header (folded here) of the
    column whose value groups a sheet's rows into families (a case number);
    the column is one the config maps to no field, so its value sits in ``extras``.
    """
    out = pd.Series("", index=records.index, dtype=object)
    if not family_columns or records.empty:
        return out
    folded = {k: fold_header(v) for k, v in family_columns.items() if v}
    keys = list(zip(records["source_file"].astype(str), records["sheet"].astype(str)))
    wanted = pd.Series([folded.get(k) for k in keys], index=records.index)
    has = wanted.notna() & (records["extras"].astype(str) != "")
    for idx in records.index[has]:          # only rows of sheets with a family column
        extras = json.loads(records.at[idx, "extras"])
        for header, value in extras.items():
            if fold_header(header) == wanted[idx]:
                out[idx] = str(value).strip()
                break
    return out


def family_claims(records: pd.DataFrame, family: pd.Series, child_slots=("child",),
                  parent_slots=("parent",)) -> pd.DataFrame:
    """Claims between every child and every parent record of one sheet that share a family value.

    ``family`` is :func:`family_values` of ``records``.  ``row`` is the child's
    row, ``parent_row`` the parent's, ``basis`` "family <value>".
    """
    rec = records.assign(_family=family.to_numpy())
    rec = rec[rec["_family"] != ""]
    key = ["source_file", "sheet", "_family"]
    kids = rec[rec["slot"].isin(child_slots)][key + ["record_id", "row"]]
    adults = rec[rec["slot"].isin(parent_slots)][key + ["record_id", "row"]]
    both = kids.merge(adults, on=key, suffixes=("_c", "_p"))
    out = pd.DataFrame({"child_record_id": both["record_id_c"], "parent_record_id": both["record_id_p"],
                        "source_file": both["source_file"], "sheet": both["sheet"], "row": both["row_c"],
                        "basis": "family " + both["_family"].astype(str), "parent_row": both["row_p"]})
    out["_r"] = pd.to_numeric(out["row"], errors="coerce")
    out["_pr"] = pd.to_numeric(out["parent_row"], errors="coerce")
    out = out.sort_values(["source_file", "sheet", "_r", "_pr"], kind="mergesort")
    return out[list(CLAIM_COLUMNS)].reset_index(drop=True)


def claims_with_entities(records: pd.DataFrame, claims: pd.DataFrame) -> pd.DataFrame:
    """The claims with ``child_entity_id`` and ``parent_entity_id`` added (from ``records``).

    Raises ValueError when a claim names a record that ``records`` lacks.
    """
    ent = records.set_index("record_id")["entity_id"]
    out = claims.reset_index(drop=True).copy()
    if out.empty:
        return out.assign(child_entity_id=pd.Series(dtype=str), parent_entity_id=pd.Series(dtype=str))
    for side in ("child", "parent"):
        ids = out[f"{side}_record_id"]
        missing = ~ids.isin(ent.index)
        if missing.any():
            first = out[missing].iloc[0]
            raise ValueError(f"{first['source_file']}, sheet {first['sheet']!r}, row {first['row']}: "
                             f"the claim's {side} record is not among the records")
        out[f"{side}_entity_id"] = ent.reindex(ids).to_numpy()
    return out


def _claim_dates(records: pd.DataFrame, claims: pd.DataFrame) -> pd.Series:
    """Per claim, the event dates (ISO text) found on its child's and parent's records, as lists."""
    cols = [c for c in _DATE_EVENTS if c in records.columns]
    rec = records.set_index("record_id")[cols].astype(str)
    both = pd.concat([rec.reindex(claims["child_record_id"]).reset_index(drop=True),
                      rec.reindex(claims["parent_record_id"]).reset_index(drop=True)], axis=1)
    return both


def relations_table(records: pd.DataFrame, claims: pd.DataFrame) -> pd.DataFrame:
    """One line per claimed (child entity, parent entity) pair; columns :data:`RELATION_COLUMNS`.

    Claims whose two records fall in one entity are left out here (the checks
    report them as a child recorded as its own parent).  Sorted by child, then parent.
    """
    lifted = claims_with_entities(records, claims)
    if lifted.empty:
        return pd.DataFrame(columns=list(RELATION_COLUMNS))
    lifted = lifted[lifted["child_entity_id"] != lifted["parent_entity_id"]].reset_index(drop=True)
    if lifted.empty:
        return pd.DataFrame(columns=list(RELATION_COLUMNS))
    dates = _claim_dates(records, lifted)
    # earliest / latest event date per claim ("" and unreadable text count as no date)
    parsed = dates.apply(lambda col: pd.to_datetime(col, format="%Y-%m-%d", errors="coerce"))
    lifted["first"] = parsed.min(axis=1, skipna=True)
    lifted["last"] = parsed.max(axis=1, skipna=True)
    rows = lifted["row"].astype(str)
    if "parent_row" in lifted.columns:
        other = lifted["parent_row"].astype(str)
        rows = rows.where((other == rows) | (other == "") | (other == "nan"), rows + "+" + other)
    lifted["where"] = (lifted["source_file"].astype(str) + " | " + lifted["sheet"].astype(str) + " | "
                       + rows)
    lifted["row_num"] = pd.to_numeric(lifted["row"], errors="coerce")
    lifted = lifted.sort_values(["child_entity_id", "parent_entity_id", "source_file", "sheet", "row_num"],
                                kind="mergesort")
    g = lifted.groupby(["child_entity_id", "parent_entity_id"], sort=True)
    out = pd.DataFrame({
        "sources": g["source_file"].nunique(),
        "claims": g.size(),
        "first_seen": g["first"].min(),
        "last_seen": g["last"].max(),
        "evidence": g["where"].agg("; ".join),
    }).reset_index()
    for col in ("first_seen", "last_seen"):
        out[col] = out[col].dt.strftime("%Y-%m-%d").fillna("")
    return out[list(RELATION_COLUMNS)]
