"""Normalize stage: raw person-records (cell values as delivered) -> the record table.

Pandas in, pandas out, one sheet at a time (settings such as the date order
are per sheet).  Each normalizer of :mod:`linker.normalize` runs once per
distinct value of a column and the result is broadcast back, so a column of
200,000 cells with 3,000 distinct values costs 3,000 calls.
"""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pandas as pd

from .config import LinkConfig
from .ingest import cell_text
from .normalize import (age_to_birth_range, fold_text, infer_date_order, normalize_name,
                        normalize_reg_no, normalize_sex, parse_age, parse_date)
from .schema import DATE_FIELDS, RECORD_COLUMNS


def _map_unique(values, fn, typed: bool = False) -> list:
    """Apply ``fn`` once per distinct value (by type and value when ``typed``)."""
    cache: dict = {}
    out = []
    for v in values:
        key = (type(v).__name__, v) if typed else v
        try:
            hit = cache[key]
        except KeyError:
            hit = cache[key] = fn(v)
        except TypeError:      # unhashable cell value: compute directly
            hit = fn(v)
        out.append(hit)
    return out


def _is_blank(v) -> bool:
    return v is None or (isinstance(v, float) and v != v) or (isinstance(v, str) and not v.strip())


def normalize_records(raw: pd.DataFrame, cfg: LinkConfig,
                      corrections: pd.DataFrame | None = None) -> pd.DataFrame:
    """Turn raw records (from :mod:`linker.ingest`) into the normalized record table.

    Parameters
    ----------
    raw : DataFrame
        Columns ``record_id, row_key, source_file, sheet, row, slot, extras``,
        ``<field>_obj`` per canonical field, and the per-sheet settings
        ``date_order, full_name_order, sex_codes``.
    cfg : LinkConfig
    corrections : DataFrame, optional
        Lines of a corrections file (:func:`linker.corrections.read_corrections`),
        applied as :func:`linker.corrections.apply_corrections` says.  That
        function also returns the corrections that matched no record; call it
        directly when those are needed.

    Returns
    -------
    DataFrame with the columns of :data:`linker.schema.RECORD_COLUMNS`.
    """
    if corrections is not None and len(corrections):
        from .corrections import apply_corrections   # it normalizes through this module
        return apply_corrections(raw, corrections, cfg).records
    if raw.empty:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in RECORD_COLUMNS})
    parts = [_normalize_sheet(chunk, cfg) for _, chunk in
             raw.groupby(["source_file", "sheet"], sort=False, dropna=False)]
    out = pd.concat(parts, ignore_index=True)
    shared = out[out["reg_no"] != ""].groupby(["row_key", "reg_no"])["record_id"].transform("size")
    out["reg_no_shared"] = False
    out.loc[shared.index, "reg_no_shared"] = shared.to_numpy() > 1
    mask = out["reg_no_shared"]
    out.loc[mask, "notes"] = _append(out.loc[mask, "notes"],
                                     "reg_no: the row shows this number for another person too")
    return out[list(RECORD_COLUMNS)]


def _append(notes: pd.Series, text: str) -> pd.Series:
    return notes.map(lambda n: f"{n}; {text}" if n else text)


def _normalize_sheet(chunk: pd.DataFrame, cfg: LinkConfig) -> pd.DataFrame:
    """Normalize the raw records of one sheet (one date order, one set of codes)."""
    n = len(chunk)
    out = {c: chunk[c].to_numpy() for c in ("record_id", "row_key", "source_file", "sheet",
                                             "row", "slot", "extras")}
    notes: list[list[str]] = [[] for _ in range(n)]
    for fld in ("reg_no", "given_name", "family_name", "full_name", "birth_date", "age", "sex",
                *DATE_FIELDS[1:], "location", "status"):
        out[fld + "_raw"] = np.array(_map_unique(chunk[fld + "_obj"].tolist(), cell_text,
                                                 typed=True), dtype=object)

    # Registration numbers
    regs = _map_unique(chunk["reg_no_obj"].tolist(), lambda v: normalize_reg_no(v, cfg.scheme),
                       typed=True)
    out["reg_no"] = np.array([r.reg_no for r in regs], dtype=object)
    out["reg_no_prefix"] = np.array([r.prefix for r in regs], dtype=object)
    out["reg_no_status"] = np.array([r.status for r in regs], dtype=object)
    for i, r in enumerate(regs):
        if r.note:
            notes[i].append(f"reg_no: {r.note}")

    # Names
    order = chunk["full_name_order"].iloc[0]
    triples = list(zip(out["given_name_raw"], out["family_name_raw"], out["full_name_raw"]))
    names = _map_unique(triples, lambda g: normalize_name(g[0], g[1], g[2], full_order=order))
    for attr in ("given_name", "family_name", "given_key", "family_key", "name_key",
                 "given_soundex", "family_soundex"):
        out[attr] = np.array([getattr(nm, attr) for nm in names], dtype=object)

    # Dates: the column's d/m order is inferred from its unambiguous values unless set
    sheet_order = chunk["date_order"].iloc[0]
    max_year = cfg.as_of.year + 1
    parsed_dates = {}
    for fld in DATE_FIELDS:
        values = chunk[fld + "_obj"].tolist()
        assumed = False
        col_order = sheet_order
        if sheet_order == "auto":
            texts = [v for v in values if isinstance(v, str)]
            inferred, _why = infer_date_order(texts)
            col_order = inferred or cfg.fallback_order
            assumed = inferred is None
        limit = cfg.as_of.year if fld == "birth_date" else max_year
        res = _map_unique(values, lambda v: parse_date(v, order=col_order, min_year=cfg.min_year,
                                                       max_year=limit, assumed=assumed,
                                                       pivot_year=cfg.as_of.year),
                          typed=True)
        out[fld] = np.array([r.iso for r in res], dtype=object)
        for i, r in enumerate(res):
            if r.flag and not _is_blank(values[i]):
                notes[i].append(f"{fld}: {r.flag}")
        parsed_dates[fld] = out[fld]
    out["birth_year"] = pd.array([int(d[:4]) if d else pd.NA for d in out["birth_date"]],
                                 dtype="Int64")

    # Ages -> birth-date ranges at the row's own reference date
    ages = _map_unique(chunk["age_obj"].tolist(), parse_age, typed=True)
    as_of_default = cfg.as_of
    bmin, bmax, months = [], [], []
    for i, rng in enumerate(ages):
        if rng is None:
            if not _is_blank(chunk["age_obj"].iat[i]):
                notes[i].append(f"age: cannot read {out['age_raw'][i]!r} as an age")
            bmin.append("")
            bmax.append("")
            months.append(np.nan)
            continue
        ref = as_of_default
        for fld in cfg.age_reference:
            if parsed_dates[fld][i]:
                ref = dt.date.fromisoformat(parsed_dates[fld][i])
                break
        lo, hi = age_to_birth_range(rng, ref)
        bmin.append(lo)
        bmax.append(hi)
        months.append(float(rng[0]))
    out["birth_date_min"] = np.array(bmin, dtype=object)
    out["birth_date_max"] = np.array(bmax, dtype=object)
    out["age_months"] = np.array(months, dtype=float)

    # Sex
    codes = json.loads(chunk["sex_codes"].iloc[0])
    sexes = _map_unique(chunk["sex_obj"].tolist(), lambda v: normalize_sex(v, codes), typed=True)
    out["sex"] = np.array(sexes, dtype=object)
    for i, s in enumerate(sexes):
        if not s and out["sex_raw"][i] and fold_text(out["sex_raw"][i]).lower() not in codes:
            notes[i].append(f"sex: unknown code {out['sex_raw'][i]!r}")

    # Event text fields
    for fld in ("location", "status"):
        out[fld] = np.array(_map_unique(out[fld + "_raw"].tolist(), fold_text), dtype=object)

    out["notes"] = np.array(["; ".join(x) for x in notes], dtype=object)
    out["corrections"] = np.full(n, "", dtype=object)
    out["reg_no_shared"] = np.zeros(n, dtype=bool)
    return pd.DataFrame(out)
