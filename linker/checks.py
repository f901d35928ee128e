"""Impossibility and consistency checks on linked person-records.

Each rule is a small frozen object with a name, a severity and a plain-words
explanation for the agency, plus a pure function ``find(ctx)`` returning the
involved records (``record_id``, ``detail``).  :func:`run_checks` applies the
rules in :data:`RULES` order and returns findings.csv rows: one line per
involved record, with its provenance (source_file, sheet, row, slot).

A finding is a query for the producing agency to verify, never a determination.

Inputs may be the in-memory frames of a run or the CSV files read back as
text: dates are ISO text or ``""`` and numbers may be text.  Nothing here loops
over records in Python; every rule is a handful of pandas merges and groupbys.

"Most common birth date" of an entity: the birth date written on most of its
records (real birth dates only; ranges from a stated age never count).  When
several dates tie, a rule uses the tied date that makes a finding least
likely, so a tie never raises a finding by itself (except in
``birth_date_conflict``, where a tie is the conflict).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Callable

import numpy as np
import pandas as pd

from .io import text_column
from .relations import claims_with_entities
from .schema import FINDING_COLUMNS

__all__ = ["CheckSettings", "CheckContext", "Rule", "RULES", "build_context", "run_checks",
           "rule_table", "AGE_SLACK_DAYS"]

AGE_SLACK_DAYS = 30          # a stated age may miss the birth date by this much before it is flagged
_EVENTS = (("intake_date", "intake"), ("placement_date", "placement"), ("release_date", "release"))
_TEXT = ("record_id", "entity_id", "row_key", "source_file", "sheet", "row", "slot", "reg_no",
         "reg_no_status", "given_name", "family_name", "sex", "age_raw")
_DATES = ("birth_date", "birth_date_min", "birth_date_max", "intake_date", "placement_date",
          "release_date")
_FOUND = ("record_id", "detail")


@dataclass(frozen=True)
class CheckSettings:
    """Settings of the checks (config section ``[rules]``; docs/config.md)."""

    cutoff_date: dt.date | None = None     # events after it are flagged
    min_parent_age_gap: float = 12.0       # years; 12 is common practice, not law
    birth_date_tolerance_days: int = 0     # one entity's birth dates may differ this much
    max_parents: int = 2                   # parent entities per child before it is flagged

    def __post_init__(self):
        if self.min_parent_age_gap < 0:
            raise ValueError(f"min_parent_age_gap must be >= 0, got {self.min_parent_age_gap}")
        if self.birth_date_tolerance_days < 0:
            raise ValueError(f"birth_date_tolerance_days must be >= 0, got {self.birth_date_tolerance_days}")
        if self.max_parents < 1:
            raise ValueError(f"max_parents must be >= 1, got {self.max_parents}")


@dataclass(frozen=True)
class CheckContext:
    """What the rules read, prepared once by :func:`build_context`.

    records : one line per record; text columns ``""`` when missing, ``reg_no_shared`` boolean,
        ``row_num`` numeric, and ``d_<field>`` datetime columns for every date field (NaT = none).
    claims : one line per claim with ``child_entity_id`` and ``parent_entity_id``.
    relations : the relations table (or one derived from the claims).
    births : per entity with a real birth date: ``bd_lo`` / ``bd_hi`` (earliest / latest of its
        most common birth dates), ``bd_span`` (days between its extreme dates), ``bd_summary`` text.
    """

    records: pd.DataFrame
    claims: pd.DataFrame
    relations: pd.DataFrame
    births: pd.DataFrame
    settings: CheckSettings


@dataclass(frozen=True)
class Rule:
    """One check: ``find(ctx)`` returns the involved records as (``record_id``, ``detail``)."""

    name: str
    severity: str          # "error" (impossible) | "warning" (inconsistent)
    explanation: str       # one plain-words sentence for the agency
    find: Callable[[CheckContext], pd.DataFrame]


# --- preparing the inputs ---------------------------------------------------------------------------

_text = text_column                # column as stripped text (linker.io)


def _dates(s: pd.Series) -> pd.Series:
    """ISO text (or dates) as datetimes; "" and unreadable text become NaT."""
    return pd.to_datetime(s.str.slice(0, 10), format="%Y-%m-%d", errors="coerce")


def _iso(s: pd.Series) -> pd.Series:
    return s.dt.strftime("%Y-%m-%d").fillna("")


def prepare_records(records: pd.DataFrame) -> pd.DataFrame:
    """The columns the rules read, in one shape whether ``records`` came from memory or from CSV."""
    rec = records.reset_index(drop=True)
    out = pd.DataFrame({col: _text(rec, col) for col in _TEXT}, index=rec.index)
    # a record outside any entity stands alone
    out["entity_id"] = out["entity_id"].where(out["entity_id"] != "", "\x00" + out["record_id"])
    if "reg_no_shared" in rec.columns:
        out["reg_no_shared"] = _text(rec, "reg_no_shared").str.lower().isin(["true", "1", "yes"])
    else:
        out["reg_no_shared"] = False
    out["row_num"] = pd.to_numeric(out["row"], errors="coerce")
    for col in _DATES:
        out["d_" + col] = _dates(_text(rec, col))
    return out


def _entity_births(rec: pd.DataFrame) -> pd.DataFrame:
    """Per entity with a real birth date: its most common dates (lo, hi), span and a summary text."""
    cols = ["bd_lo", "bd_hi", "bd_span", "bd_summary"]
    has = rec[rec["d_birth_date"].notna()]
    if has.empty:
        none = pd.Series(dtype="datetime64[ns]")
        return pd.DataFrame({"bd_lo": none, "bd_hi": none, "bd_span": pd.Series(dtype="int64"),
                             "bd_summary": pd.Series(dtype=object)},
                            index=pd.Index([], name="entity_id", dtype=object))
    counts = has.groupby(["entity_id", "d_birth_date"]).size().rename("n").reset_index()
    counts = counts.sort_values(["entity_id", "n", "d_birth_date"], ascending=[True, False, True],
                                kind="mergesort")
    top = counts["n"] == counts.groupby("entity_id")["n"].transform("max")
    modes = counts[top].groupby("entity_id")["d_birth_date"].agg(bd_lo="min", bd_hi="max")
    g = counts.groupby("entity_id")["d_birth_date"]
    span = (g.max() - g.min()).dt.days.rename("bd_span")
    counts["part"] = _iso(counts["d_birth_date"]) + " (" + _records_word(counts["n"]) + ")"
    summary = counts.groupby("entity_id")["part"].agg(", ".join).rename("bd_summary")
    return pd.concat([modes, span, summary], axis=1)[cols]


def _records_word(n: pd.Series) -> pd.Series:
    return n.astype(str) + np.where(n == 1, " record", " records")


def _lift_claims(rec: pd.DataFrame, claims: pd.DataFrame | None) -> pd.DataFrame:
    """Claims with the entity of their child and parent record; a claim naming an unknown record is an error."""
    cols = ["child_record_id", "parent_record_id", "source_file", "sheet", "row"]
    if claims is None or len(claims) == 0:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in
                             cols + ["child_entity_id", "parent_entity_id"]})
    out = pd.DataFrame({c: _text(claims.reset_index(drop=True), c) for c in cols})
    return claims_with_entities(rec, out)


def _relations_from_claims(claims: pd.DataFrame) -> pd.DataFrame:
    pairs = claims[claims["child_entity_id"] != claims["parent_entity_id"]]
    return pairs[["child_entity_id", "parent_entity_id"]].drop_duplicates().reset_index(drop=True)


def build_context(records: pd.DataFrame, claims: pd.DataFrame | None = None,
                  relations: pd.DataFrame | None = None,
                  settings: CheckSettings | None = None) -> CheckContext:
    """Prepare what the rules read.  ``relations`` defaults to the distinct claimed entity pairs."""
    rec = prepare_records(records)
    lifted = _lift_claims(rec, claims)
    if relations is None:
        rel = _relations_from_claims(lifted)
    else:
        rel = pd.DataFrame({c: _text(relations.reset_index(drop=True), c)
                            for c in ("child_entity_id", "parent_entity_id")})
    return CheckContext(rec, lifted, rel, _entity_births(rec), settings or CheckSettings())


def _found(record_id=(), detail=()) -> pd.DataFrame:
    return pd.DataFrame({"record_id": pd.Series(record_id, dtype=object).reset_index(drop=True),
                         "detail": pd.Series(detail, dtype=object).reset_index(drop=True)})


def _both_sides(claims: pd.DataFrame, detail: pd.Series) -> pd.DataFrame:
    """The child and the parent record of each claim, each with the claim's detail."""
    return pd.concat([_found(claims["child_record_id"], detail),
                      _found(claims["parent_record_id"], detail)], ignore_index=True)


def _with_birth(ctx: CheckContext, frame: pd.DataFrame, key: str, prefix: str) -> pd.DataFrame:
    """Add ``<prefix>_lo/_hi`` (own birth date, else the entity's most common ones) and ``<prefix>_own``."""
    rec = ctx.records.set_index("record_id")
    own = rec["d_birth_date"].reindex(frame[key]).to_numpy()
    ent = rec["entity_id"].reindex(frame[key])
    lo = ctx.births["bd_lo"].reindex(ent).to_numpy()
    hi = ctx.births["bd_hi"].reindex(ent).to_numpy()
    out = frame.copy()
    has_own = ~pd.isna(own)
    out[prefix + "_own"] = has_own
    out[prefix + "_lo"] = pd.to_datetime(np.where(has_own, own, lo))
    out[prefix + "_hi"] = pd.to_datetime(np.where(has_own, own, hi))
    return out


# --- the rules ----------------------------------------------------------------------------------------

def find_self_parent(ctx: CheckContext) -> pd.DataFrame:
    """A row showing one reg_no for two persons, or a claim whose child and parent are one entity."""
    rec = ctx.records
    shared = rec[rec["reg_no_shared"] & (rec["reg_no"] != "")]
    slots = (shared.sort_values(["slot"], kind="mergesort")
             .groupby(["row_key", "reg_no"])["slot"].agg(" and ".join).rename("slots"))
    shared = shared.join(slots, on=["row_key", "reg_no"])
    parts = [_found(shared["record_id"], "reg_no " + shared["reg_no"] + " is written for the "
                    + shared["slots"] + " on this row")]
    c = ctx.claims
    if not c.empty:
        child = rec.set_index("record_id").reindex(c["child_record_id"])
        parent = rec.set_index("record_id").reindex(c["parent_record_id"])
        same_reg = (child["reg_no"].to_numpy() != "") & (child["reg_no"].to_numpy() == parent["reg_no"].to_numpy())
        hit = c[same_reg]
        parts.append(_both_sides(hit, "reg_no " + child["reg_no"][same_reg].reset_index(drop=True)
                                 + " is written for the child and parent on this row"))
        one = c[c["child_entity_id"] == c["parent_entity_id"]]
        parts.append(_both_sides(one, pd.Series("the child and the parent on this row were matched to the "
                                                "same person", index=one.index)))
    return pd.concat(parts, ignore_index=True)


def find_parent_too_young(ctx: CheckContext) -> pd.DataFrame:
    """Per claim: the parent's birth date less than ``min_parent_age_gap`` years before the child's."""
    c = ctx.claims[ctx.claims["child_entity_id"] != ctx.claims["parent_entity_id"]]
    if c.empty:
        return _found()
    c = _with_birth(ctx, c, "child_record_id", "c")
    c = _with_birth(ctx, c, "parent_record_id", "p")
    c = c[c["c_hi"].notna() & c["p_lo"].notna()]
    gap = ctx.settings.min_parent_age_gap
    months = int(round(gap * 12))
    # least alarming reading of ties: the parent's earliest and the child's latest most common date
    too_young = c["p_lo"] + pd.DateOffset(months=months) > c["c_hi"]
    hit = c[too_young]
    if hit.empty:
        return _found()
    years = (hit["c_hi"] - hit["p_lo"]).dt.days / 365.2425
    amount = years.abs().map("{:.1f}".format)
    gap_words = np.where(years >= 0, "the parent is only " + amount + " years older",
                         "the parent is " + amount + " years younger")
    detail = ("parent born " + _iso(hit["p_lo"]) + np.where(hit["p_own"], "", " (other records)")
              + ", child born " + _iso(hit["c_hi"]) + np.where(hit["c_own"], "", " (other records)")
              + ": " + gap_words + f" (expected at least {gap:g} years)")
    return _both_sides(hit, detail)


def find_release_before_intake(ctx: CheckContext) -> pd.DataFrame:
    """A record whose release date is earlier than its intake or placement date."""
    rec = ctx.records
    parts = [_found()]
    for field, word in (("intake_date", "intake"), ("placement_date", "placement")):
        hit = rec[rec["d_release_date"] < rec["d_" + field]]
        if hit.empty:
            continue
        parts.append(_found(hit["record_id"], "release " + _iso(hit["d_release_date"]) + f" before {word} "
                            + _iso(hit["d_" + field])))
    return pd.concat(parts, ignore_index=True)


def find_event_after_cutoff(ctx: CheckContext) -> pd.DataFrame:
    """A record with an intake, placement or release date after the cutoff date (none: no findings)."""
    cutoff = ctx.settings.cutoff_date
    if cutoff is None:
        return _found()
    rec = ctx.records
    limit = pd.Timestamp(cutoff)
    parts = [_found()]
    for field, word in _EVENTS:
        hit = rec[rec["d_" + field] > limit]
        if hit.empty:
            continue
        parts.append(_found(hit["record_id"], f"{word} " + _iso(hit["d_" + field])
                            + f" after the cutoff date {cutoff.isoformat()}"))
    return pd.concat(parts, ignore_index=True)


def find_event_before_birth(ctx: CheckContext) -> pd.DataFrame:
    """An event date before the record's birth date (or the person's, when the record shows none)."""
    rec = _with_birth(ctx, ctx.records, "record_id", "b")
    parts = [_found()]
    for field, word in _EVENTS:
        hit = rec[rec["d_" + field] < rec["b_lo"]]
        if hit.empty:
            continue
        parts.append(_found(hit["record_id"], f"{word} " + _iso(hit["d_" + field]) + " before birth "
                            + _iso(hit["b_lo"]) + np.where(hit["b_own"], "", " (from this person's other records)")))
    return pd.concat(parts, ignore_index=True)


def _minority(rec: pd.DataFrame, value: str, label: str, summary_of) -> pd.DataFrame:
    """Records of entities with several values: those in a minority value, or all when the top is tied."""
    counts = rec.groupby(["entity_id", value]).size().rename("n").reset_index()
    counts = counts[counts.groupby("entity_id")[value].transform("size") > 1]
    if counts.empty:
        return _found()
    counts = counts.sort_values(["entity_id", "n", value], ascending=[True, False, True], kind="mergesort")
    top = counts.groupby("entity_id")["n"].transform("max")
    n_top = (counts["n"] == top).groupby(counts["entity_id"]).transform("sum")
    counts["flag"] = (counts["n"] < top) | (n_top > 1)
    counts["part"] = summary_of(counts[value]) + " (" + _records_word(counts["n"]) + ")"
    summary = counts.groupby("entity_id")["part"].agg(", ".join).rename("summary")
    flagged = counts[counts["flag"]][["entity_id", value]]
    hit = rec.merge(flagged, on=["entity_id", value]).join(summary, on="entity_id")
    if hit.empty:
        return _found()
    return _found(hit["record_id"], f"{label} " + summary_of(hit[value]) + " here; this person's records show "
                  + hit["summary"])


def find_sex_conflict(ctx: CheckContext) -> pd.DataFrame:
    """Records whose sex is in the minority among their entity's records (all when tied)."""
    rec = ctx.records[ctx.records["sex"] != ""]
    return _minority(rec, "sex", "sex", lambda s: s.astype(str))


def find_birth_date_conflict(ctx: CheckContext) -> pd.DataFrame:
    """Entities whose birth dates span more than the tolerance: records further than it from the most common."""
    tol = ctx.settings.birth_date_tolerance_days
    rec = ctx.records[ctx.records["d_birth_date"].notna()]
    rec = rec.join(ctx.births, on="entity_id")
    rec = rec[rec["bd_span"] > tol]
    if rec.empty:
        return _found()
    far = np.maximum((rec["d_birth_date"] - rec["bd_lo"]).dt.days.abs(),
                     (rec["d_birth_date"] - rec["bd_hi"]).dt.days.abs())
    hit = rec[far > tol]
    if hit.empty:
        return _found()
    return _found(hit["record_id"], "birth date " + _iso(hit["d_birth_date"]) + " here; this person's records show "
                  + hit["bd_summary"])


def find_age_conflict(ctx: CheckContext) -> pd.DataFrame:
    """A stated age whose birth-date range misses the person's birth date by more than AGE_SLACK_DAYS."""
    rec = ctx.records
    rec = rec[rec["d_birth_date_min"].notna() & rec["d_birth_date_max"].notna()]
    if rec.empty:
        return _found()
    rec = _with_birth(ctx, rec, "record_id", "b")
    slack = pd.Timedelta(days=AGE_SLACK_DAYS)
    rec = rec[rec["b_lo"].notna()]
    hit = rec[(rec["b_hi"] < rec["d_birth_date_min"] - slack) | (rec["b_lo"] > rec["d_birth_date_max"] + slack)]
    if hit.empty:
        return _found()
    born = np.where(hit["b_lo"] == hit["b_hi"], _iso(hit["b_lo"]), _iso(hit["b_lo"]) + " or " + _iso(hit["b_hi"]))
    stated = np.where(hit["age_raw"] != "", "stated age '" + hit["age_raw"] + "'", "the stated age")
    detail = (stated + " means born " + _iso(hit["d_birth_date_min"]) + " to " + _iso(hit["d_birth_date_max"])
              + ", but " + np.where(hit["b_own"], "the birth date here is ", "this person's birth date is ")
              + born)
    return _found(hit["record_id"], detail)


def find_too_many_parents(ctx: CheckContext) -> pd.DataFrame:
    """Child entities with more than ``max_parents`` parent entities: every record of their claims."""
    limit = ctx.settings.max_parents
    rel = ctx.relations.drop_duplicates(["child_entity_id", "parent_entity_id"])
    n = rel.groupby("child_entity_id").size()
    many = n[n > limit]
    c = ctx.claims[ctx.claims["child_entity_id"].isin(many.index)
                   & (ctx.claims["child_entity_id"] != ctx.claims["parent_entity_id"])]
    if c.empty:
        return _found()
    # the name of each parent entity: from its first record in provenance order
    rec = ctx.records.sort_values(["source_file", "sheet", "row_num", "slot"], kind="mergesort")
    rec = rec[(rec["given_name"] + rec["family_name"]) != ""]
    first = rec.drop_duplicates("entity_id").set_index("entity_id")
    names = (first["given_name"] + " " + first["family_name"]).str.strip()
    pairs = c[["child_entity_id", "parent_entity_id"]].drop_duplicates().copy()
    pairs["name"] = names.reindex(pairs["parent_entity_id"]).fillna("(no name)").to_numpy()
    pairs = pairs.sort_values(["child_entity_id", "name", "parent_entity_id"], kind="mergesort")
    listed = pairs.groupby("child_entity_id")["name"].agg("; ".join)
    detail = (c["child_entity_id"].map(many).astype(str) + " different parents or guardians are named for this "
              f"child (more than {limit}): " + c["child_entity_id"].map(listed))
    return _both_sides(c, detail)


def find_shared_reg_no(ctx: CheckContext) -> pd.DataFrame:
    """A valid reg_no on records of several entities: the records holding another entity's number.

    An entity's main numbers are its most common valid ones.  When exactly one of
    the entities holding a number has it as main number and most records with it,
    the number is that entity's and only the other entities' records are flagged;
    otherwise every record with the number is.  Rows writing one number for two
    persons are ``self_parent``, not this rule.
    """
    rec = ctx.records
    v = rec[(rec["reg_no_status"] == "valid") & (rec["reg_no"] != "") & ~rec["reg_no_shared"]]
    cnt = v.groupby(["reg_no", "entity_id"]).size().rename("n").reset_index()
    cnt["main"] = cnt["n"] == cnt.groupby("entity_id")["n"].transform("max")
    cnt = cnt[cnt.groupby("reg_no")["entity_id"].transform("size") > 1]
    if cnt.empty:
        return _found()
    cand = cnt[cnt["main"]]
    top = cand[cand["n"] == cand.groupby("reg_no")["n"].transform("max")]
    owners = top[top.groupby("reg_no")["entity_id"].transform("size") == 1].set_index("reg_no")
    cnt["owner"] = cnt["reg_no"].map(owners["entity_id"])
    cnt["owner_n"] = cnt["reg_no"].map(owners["n"])
    cnt["holders"] = cnt.groupby("reg_no")["entity_id"].transform("size")
    flagged = cnt[cnt["owner"].isna() | (cnt["entity_id"] != cnt["owner"])]
    hit = v.merge(flagged, on=["reg_no", "entity_id"])
    if hit.empty:
        return _found()
    owner_n = _records_word(hit["owner_n"].fillna(0).astype(int))
    detail = np.where(hit["owner"].notna(),
                      "reg_no " + hit["reg_no"] + " here is also on " + owner_n
                      + " of another person (entity " + hit["owner"].fillna("") + ")",
                      "reg_no " + hit["reg_no"] + " is on records of " + hit["holders"].astype(str)
                      + " different persons")
    return _found(hit["record_id"], detail)


RULES: tuple[Rule, ...] = (
    Rule("self_parent", "error",
         "The same person appears as both the child and the parent on one row, or one registration number "
         "is written for both.", find_self_parent),
    Rule("parent_too_young", "error",
         "The parent or guardian is not enough years older than the child to be the child's parent.",
         find_parent_too_young),
    Rule("release_before_intake", "error",
         "The release or reunification date is earlier than the intake or placement date.",
         find_release_before_intake),
    Rule("event_after_cutoff", "warning",
         "An intake, placement or release date is later than the last date the files should cover.",
         find_event_after_cutoff),
    Rule("event_before_birth", "error",
         "An intake, placement or release date is earlier than the person's date of birth.",
         find_event_before_birth),
    Rule("sex_conflict", "warning",
         "The records of one person do not agree on the person's sex.", find_sex_conflict),
    Rule("birth_date_conflict", "warning",
         "The records of one person do not agree on the date of birth.", find_birth_date_conflict),
    Rule("age_conflict", "warning",
         "The age written on this record does not fit the person's date of birth on other records.",
         find_age_conflict),
    Rule("too_many_parents", "warning",
         "More parents or guardians are named for this child than a child is expected to have.",
         find_too_many_parents),
    Rule("shared_reg_no", "warning",
         "This registration number also appears on the records of a different person.", find_shared_reg_no),
)


def rule_table(rules: tuple[Rule, ...] = RULES) -> pd.DataFrame:
    """One line per rule, in check order: ``rule``, ``severity``, ``explanation`` (for reports)."""
    return pd.DataFrame([(r.name, r.severity, r.explanation) for r in rules],
                        columns=["rule", "severity", "explanation"])


def _finding_lines(ctx: CheckContext, rule: Rule, order: int) -> pd.DataFrame:
    """One line per involved record of one rule, details of the same record joined."""
    found = rule.find(ctx)
    found = pd.DataFrame({c: _text(found, c) for c in _FOUND}).drop_duplicates()
    found = found.sort_values(["record_id", "detail"], kind="mergesort")
    found = found.groupby("record_id", sort=True)["detail"].agg("; ".join).reset_index()
    found["detail"] = found["detail"].str.replace("\x00", "", regex=False)   # stand-alone records' ids
    lines = found.merge(ctx.records, on="record_id", how="left")
    lines["rule"] = rule.name
    lines["severity"] = rule.severity
    lines["_order"] = order
    return lines


def run_checks(records: pd.DataFrame, claims: pd.DataFrame | None = None,
               relations: pd.DataFrame | None = None, settings: CheckSettings | None = None,
               rules: tuple[Rule, ...] = RULES) -> pd.DataFrame:
    """Apply the rules; findings.csv rows (columns :data:`FINDING_COLUMNS`), one per involved record.

    Sorted by rule order, then source_file, sheet, numeric row, slot and detail.  ``row`` is
    an integer column.  ``relations`` defaults to the distinct entity pairs the claims name.
    """
    ctx = build_context(records, claims, relations, settings)
    lines = [_finding_lines(ctx, rule, k) for k, rule in enumerate(rules)]
    lines = [x for x in lines if not x.empty]
    if not lines:
        empty = pd.DataFrame({c: pd.Series(dtype=object) for c in FINDING_COLUMNS})
        empty["row"] = empty["row"].astype("Int64")
        return empty
    out = pd.concat(lines, ignore_index=True)
    out = out.sort_values(["_order", "source_file", "sheet", "row_num", "slot", "detail", "record_id"],
                          kind="mergesort").reset_index(drop=True)
    out["row"] = out["row_num"].round().astype("Int64")
    out["entity_id"] = out["entity_id"].where(~out["entity_id"].str.startswith("\x00"), "")
    return out[list(FINDING_COLUMNS)]
