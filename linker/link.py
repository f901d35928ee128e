"""The linkage stage: normalized person-records in, scored pairs and entities out.

``link_records`` wires the linkage core together: candidate pairs from the
blocking rules (:mod:`linker.blocking`), comparison levels
(:mod:`linker.compare`), a Fellegi-Sunter model fitted by EM without labels
(:mod:`linker.model`), a decision per pair from two match-probability
thresholds, and entities as connected components of the links
(:mod:`linker.cluster`).  Everything is a DataFrame or a fitted model; no
global state, so the stage can run on any frame of records.

Decisions (``decision`` column of the pairs):

``link``
    match probability >= ``link_at``: the two records are joined into one
    entity, unless that would join two valid registration numbers more than
    one edit apart (a record's number counts only when it passed validation
    and its row does not show it for two persons) with a match weight below
    ``override_weight``; such pairs are held apart and go to review.
``review``
    ``review_at`` <= probability < ``link_at``: shown to a reviewer, not joined.
``non-link``
    below ``review_at``: not written to the pairs table.

Links are leads for qualified staff to verify, never determinations.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field, replace
from typing import Callable

import numpy as np
import pandas as pd

from .blocking import BlockRule, block, pair_completeness, reduction_ratio
from .cluster import constrained_entities
from .compare import DEFAULT_PERSON_FIELDS, FieldComparison, compare, prepare_fields
from .fingerprint import FINGERPRINT_FIELDS, record_fingerprints
from .model import DEFAULT_PERSON_GUARDS, FellegiSunter

__all__ = ["LinkageSettings", "LinkResult", "link_records", "linkage_columns", "threshold_decisions",
           "person_fields", "person_rules", "pairs_table", "entity_ids", "entities_table", "explain_pair", "DECISIONS"]

DECISIONS = ("link", "review", "non-link")
ENTITY_FIELDS = ("reg_no", "given_name", "family_name", "birth_date", "sex")


@dataclass(frozen=True)
class LinkageSettings:
    """Settings of the linkage stage (config section ``[linkage]``; docs/config.md)."""

    link_at: float = 0.9           # match probability at or above which a pair is linked
    review_at: float = 0.2         # at or above (and below link_at): the pair goes to review
    override_weight: float = 20.0  # match weight that may join registration numbers > 1 edit apart
    seed: int = 0                  # draws the random pairs u is estimated from
    random_pairs: int = 200_000    # random record pairs for u and as stand-ins for the pair space
    latent_classes: int = 3        # 2 = match / non-match; 3 adds close-but-different persons
    name_high: float = 0.92        # Jaro-Winkler for the jw_high name level
    name_medium: float = 0.80      # Jaro-Winkler for the jw_medium name level
    date_days: int = 31            # largest gap for the within_days birth-date level
    block_cap: int = 500           # largest block expanded into pairs (larger ones are reported)
    name_window: int = 5           # sorted-window size over the order-free name key
    guards: bool = True            # cap pairs whose given names or birth dates plainly differ
    max_iter: int = 1000           # EM iterations at most
    memory_mb: int = 1024          # working memory for comparing candidate pairs (sets the chunk size)

    def __post_init__(self):
        if not 0.0 < self.review_at <= self.link_at < 1.0:
            raise ValueError(f"linkage: need 0 < review_at <= link_at < 1, got review_at={self.review_at}, "
                             f"link_at={self.link_at}")
        if self.latent_classes not in (2, 3):
            raise ValueError(f"linkage: latent_classes must be 2 or 3, got {self.latent_classes}")
        if not 0.0 <= self.name_medium <= self.name_high <= 1.0:
            raise ValueError(f"linkage: need 0 <= name_medium <= name_high <= 1, got {self.name_medium}, "
                             f"{self.name_high}")
        for name, low in (("random_pairs", 1000), ("block_cap", 2), ("name_window", 2), ("max_iter", 1),
                          ("date_days", 0), ("memory_mb", 16)):
            if getattr(self, name) < low:
                raise ValueError(f"linkage: {name} must be >= {low}, got {getattr(self, name)}")


PAIR_BYTES = 128   # working bytes per candidate pair while two fields are compared side by side


def pair_chunk(s: LinkageSettings) -> int:
    """Candidate pairs compared at a time within the memory budget ``memory_mb``."""
    return max(10_000, int(s.memory_mb) * (1 << 20) // PAIR_BYTES)


def person_fields(s: LinkageSettings) -> tuple[FieldComparison, ...]:
    """The identity comparisons with the settings' thresholds (event dates and places are left out)."""
    out = []
    for f in DEFAULT_PERSON_FIELDS:
        if f.kind == "name":
            f = replace(f, high=s.name_high, medium=s.name_medium)
        elif f.kind == "date":
            f = replace(f, days=s.date_days)
        out.append(f)
    return tuple(out)


def person_rules(s: LinkageSettings) -> tuple[BlockRule, ...]:
    """Blocking rules for person-records: identifiers, phonetic family name + year, given name + date, window."""
    id_cap = min(50, s.block_cap)
    return (
        BlockRule("reg_no", "exact", ("reg_no",), cap=id_cap),
        BlockRule("reg_no_near", "near_id", ("reg_no",), cap=id_cap),
        BlockRule("names_sx_year", "exact", ("family_soundex", "given_soundex", "birth_year"), cap=s.block_cap),
        BlockRule("given_dob", "exact", ("given_key", "birth_date"), cap=s.block_cap),
        BlockRule("name_window", "sorted_window", ("name_key",), window=s.name_window),
    )


TRUST_COLUMNS = ("reg_no", "reg_no_status", "reg_no_shared")


def threshold_decisions(probability: np.ndarray, link_at: float, review_at: float) -> np.ndarray:
    """The model's decision per pair: "link" at or above ``link_at``, "review" from ``review_at``,
    else "non-link" (reviewer decisions then overrule it, see :func:`apply_reviews`)."""
    p = np.asarray(probability, dtype=np.float64)
    return np.where(p >= link_at, "link", np.where(p >= review_at, "review", "non-link")).astype(object)


def linkage_columns(s: LinkageSettings, rules: bool = True, decisions: bool = False) -> list[str]:
    """The record columns the linkage stage reads: the comparisons' columns (flags and statuses
    included), the registration-number columns the clustering trusts, with ``rules`` the blocking
    keys' columns, with ``decisions`` the fingerprint columns that attach reviewer decisions.

    A caller holding wide records (an export at scale) can load only these.
    """
    fields = person_fields(s)
    cols = [c for f in fields for c in f.required_columns()]
    cols += [c for f in fields for c in (f.flag_column, f.status_column) if c]
    if rules:
        cols += [c for r in person_rules(s) for c in r.columns]
    cols += list(TRUST_COLUMNS)
    if decisions:
        cols += list(FINGERPRINT_FIELDS)
    return list(dict.fromkeys(cols))


@dataclass
class LinkResult:
    """What the linkage stage produced.

    ``scores`` has one row per candidate pair (positions ``left``/``right`` into
    the records, ``rules`` bitmask, ``weight``, ``probability``, ``decision``);
    ``levels`` its level matrix; ``labels`` the entity label per record.
    """

    scores: pd.DataFrame
    levels: np.ndarray
    labels: np.ndarray
    model: FellegiSunter
    fields: tuple[FieldComparison, ...]
    rules: tuple[BlockRule, ...]
    blocking: pd.DataFrame
    capped: pd.DataFrame
    info: dict = field(default_factory=dict)


def _quiet(message: str) -> None:
    pass


REVIEW_DECISIONS = ("same", "different", "unsure")


def decision_positions(records: pd.DataFrame, decisions: pd.DataFrame | None) -> pd.DataFrame:
    """Reviewer decisions attached to record positions by content fingerprint.

    ``decisions`` holds ``fp_a``, ``fp_b``, ``decision`` (same / different /
    unsure) and ``pair_id``.  Every record carrying ``fp_a`` is paired with every
    record carrying ``fp_b``.  Returns ``left``, ``right`` (left < right),
    ``decision`` and ``pair_id``; decisions whose fingerprints are not both
    among the records attach to nothing (see :func:`unattached_decisions`).
    """
    cols = ["left", "right", "decision", "pair_id"]
    if decisions is None or len(decisions) == 0:
        return pd.DataFrame({c: pd.Series(dtype=np.int64 if c in ("left", "right") else object) for c in cols})
    fp = pd.DataFrame({"fp": record_fingerprints(records).to_numpy(), "pos": np.arange(len(records))})
    d = decisions[["fp_a", "fp_b", "decision", "pair_id"]]
    m = d.merge(fp.rename(columns={"fp": "fp_a", "pos": "a"}), on="fp_a").merge(
        fp.rename(columns={"fp": "fp_b", "pos": "b"}), on="fp_b")
    m = m[m["a"] != m["b"]]
    out = pd.DataFrame({"left": np.minimum(m["a"], m["b"]).astype(np.int64),
                        "right": np.maximum(m["a"], m["b"]).astype(np.int64),
                        "decision": m["decision"].to_numpy(), "pair_id": m["pair_id"].to_numpy()})
    return out.drop_duplicates(["left", "right"]).sort_values(["left", "right"]).reset_index(drop=True)


def unattached_decisions(records: pd.DataFrame, decisions: pd.DataFrame | None) -> pd.DataFrame:
    """Decisions whose two records are not both in this run: a record's compared values changed,
    or it is gone.  They are listed for another look, never applied and never dropped."""
    if decisions is None or len(decisions) == 0:
        return pd.DataFrame(columns=["pair_id", "fp_a", "fp_b", "decision", "missing"])
    have = set(record_fingerprints(records))
    a_ok, b_ok = decisions["fp_a"].isin(have), decisions["fp_b"].isin(have)
    out = decisions[~(a_ok & b_ok)].copy()
    out["missing"] = np.where(~a_ok[~(a_ok & b_ok)] & ~b_ok[~(a_ok & b_ok)], "both records",
                              np.where(~a_ok[~(a_ok & b_ok)], "record A", "record B"))
    return out.reset_index(drop=True)


def link_records(records: pd.DataFrame, settings: LinkageSettings = LinkageSettings(),
                 progress: Callable[[str], None] = _quiet, decisions: pd.DataFrame | None = None) -> LinkResult:
    """Block, compare, fit, score, decide and cluster ``records`` (positions are row order).

    ``decisions`` (reviewer decisions by fingerprint, see :func:`decision_positions`)
    overrule the model: "same" pairs are linked and must stay together, "different"
    pairs are never linked and are split apart (minimum cut), "unsure" pairs stay in review.
    """
    records = records.reset_index(drop=True)
    fields, rules = person_fields(settings), person_rules(settings)
    t = {}
    t0 = time.perf_counter()
    pairs, report, capped = block(records, rules, return_capped=True)
    t["block_s"] = time.perf_counter() - t0
    if len(records) < 3 or len(pairs) == 0:
        return _unlinked(records, pairs, fields, rules, report, capped, settings)
    progress(f"blocking: {len(pairs)} candidate pairs")
    t0 = time.perf_counter()
    prepared = prepare_fields(records, fields)
    levels = compare(records, pairs, fields, prepared=prepared, chunk_size=pair_chunk(settings))
    t["compare_s"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    model = FellegiSunter(fields, seed=settings.seed, u_sample=settings.random_pairs,
                          classes=settings.latent_classes, max_iter=settings.max_iter,
                          guards=DEFAULT_PERSON_GUARDS if settings.guards else ())
    model.fit(records, pairs, levels, prepared=prepared)
    t["fit_s"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    scores = model.score(records, pairs, levels)
    t["score_s"] = time.perf_counter() - t0
    progress(f"model: EM {'converged' if model.converged_ else 'did not converge'} "
             f"after {model.n_iter_} iterations")
    p = scores["probability"].to_numpy()
    scores["rules"] = pairs["rules"].to_numpy()
    scores["decision"] = threshold_decisions(p, settings.link_at, settings.review_at)
    dec, must, cannot = apply_reviews(scores, records, decisions)
    linked = scores["decision"].to_numpy() == "link"
    t0 = time.perf_counter()
    left, right = scores["left"].to_numpy(), scores["right"].to_numpy()
    unresolved: list = []
    labels = constrained_entities(len(records), left[linked], right[linked], scores["weight"].to_numpy()[linked],
                                  trusted_ids(records), overwhelming=settings.override_weight,
                                  cannot=cannot, must=must, report=unresolved)
    held = linked & (labels[left] != labels[right])
    scores.loc[held, "decision"] = "review"     # held apart by the identifier constraint: a reviewer decides
    t["cluster_s"] = time.perf_counter() - t0
    report = report.copy()
    report["reduction_ratio"] = [reduction_ratio(int(n), len(records)) for n in report["pairs"]]
    info = {
        "candidate_pairs": int(len(pairs)),
        "pairs_linked": int((linked & ~held).sum()),
        "links_held_apart": int(held.sum()),
        "pairs_for_review": int((scores["decision"] == "review").sum()),
        "entities": int(labels.max() + 1) if labels.size else 0,
        "em_iterations": int(model.n_iter_),
        "em_converged": bool(model.converged_),
        "match_prior": float(model.prior_),
        "relatives_share": float(model.relative_share_),
        "capped_blocks": int(len(capped)),
        "decisions_applied": int(dec["pair_id"].nunique()) if len(dec) else 0,
        "decisions_unresolved": [[int(a), int(b)] for a, b in unresolved],
        "timings": {k: round(v, 3) for k, v in t.items()},
    }
    return LinkResult(scores, levels, labels, model, fields, rules, report, capped, info)


def apply_reviews(scores: pd.DataFrame, records: pd.DataFrame, decisions: pd.DataFrame | None):
    """Reviewer decisions overrule the model's decision column of ``scores`` (in place; ``reviewed``
    says which); returns the decisions by position and the must-link and cannot-link position pairs."""
    dec = decision_positions(records, decisions)
    scores["reviewed"] = ""
    if len(dec):
        hit = scores[["left", "right"]].reset_index().merge(dec, on=["left", "right"])
        scores.loc[hit["index"].to_numpy(), "reviewed"] = hit["decision"].to_numpy()
        r = scores["reviewed"].to_numpy()
        scores.loc[r == "same", "decision"] = "link"
        scores.loc[r == "different", "decision"] = "non-link"
        scores.loc[r == "unsure", "decision"] = "review"
    must = dec.loc[dec["decision"] == "same", ["left", "right"]].to_numpy()
    cannot = dec.loc[dec["decision"] == "different", ["left", "right"]].to_numpy()
    return dec, must, cannot


def labelled_fit(result: LinkResult) -> pd.DataFrame:
    """How reviewer-labelled pairs compare with the fitted model, per field and level.

    For the pairs reviewed "same person", the share at each level is an
    estimate of m from labels; for "different people", of the share among
    close non-matches.  Set beside the EM estimate, a large gap says the
    unsupervised fit misjudges that level.  Columns: field, level, m_fitted,
    m_labelled, same_pairs, share_different, different_pairs.
    """
    cols = ["field", "level", "m_fitted", "m_labelled", "same_pairs", "share_different", "different_pairs"]
    s = result.scores
    if "reviewed" not in s.columns or not hasattr(result.model, "m_"):
        return pd.DataFrame(columns=cols)
    rev = s["reviewed"].to_numpy()
    same, diff = rev == "same", rev == "different"
    if not (same.any() or diff.any()):
        return pd.DataFrame(columns=cols)
    rows = []
    for j, f in enumerate(result.fields):
        lv = result.levels[:, j].astype(np.int64)
        for k, name in enumerate(f.levels):
            if name == "missing":
                continue
            ns, nd = int(same.sum()), int(diff.sum())
            rows.append({"field": f.name, "level": name, "m_fitted": float(result.model.m_[f.name][k]),
                         "m_labelled": float((lv[same] == k).mean()) if ns else np.nan, "same_pairs": ns,
                         "share_different": float((lv[diff] == k).mean()) if nd else np.nan,
                         "different_pairs": nd})
    return pd.DataFrame(rows, columns=cols)


def trusted_ids(records: pd.DataFrame) -> np.ndarray:
    """Per record the registration number clustering may rely on: valid, and not shown for two persons of a row."""
    reg = records["reg_no"].astype(object).where(records["reg_no"].notna(), "").astype(str).to_numpy(dtype=object)
    ok = records["reg_no_status"].astype(str).to_numpy() == "valid"
    if "reg_no_shared" in records.columns:
        shared = records["reg_no_shared"].astype(str).str.lower().isin(["true", "1"]).to_numpy()
        ok &= ~shared
    return np.where(ok, reg, "").astype(object)


def _unlinked(records, pairs, fields, rules, report, capped, settings) -> LinkResult:
    """Too few records or no candidate pairs to fit a model: every record is its own entity."""
    n = len(records)
    model = FellegiSunter(fields, seed=settings.seed, u_sample=settings.random_pairs,
                          classes=settings.latent_classes)
    scores = pd.DataFrame({"left": pairs["left"].to_numpy(dtype=np.int64),
                           "right": pairs["right"].to_numpy(dtype=np.int64),
                           "weight": np.zeros(len(pairs)), "probability": np.zeros(len(pairs)),
                           "rules": pairs["rules"].to_numpy(), "decision": "non-link"})
    info = {"candidate_pairs": int(len(pairs)), "pairs_linked": 0, "links_held_apart": 0, "pairs_for_review": 0,
            "entities": n, "model": "not fitted: fewer than 3 records or no candidate pairs"}
    return LinkResult(scores, np.zeros((len(pairs), len(fields)), dtype=np.int8), np.arange(n, dtype=np.int64),
                      model, fields, rules, report, capped, info)


def entity_ids(labels: np.ndarray) -> np.ndarray:
    """Entity ids ``E00001``... in the order of each entity's first record."""
    width = max(5, len(str(int(labels.max()) + 1))) if labels.size else 5
    return np.array([f"E{k + 1:0{width}d}" for k in range(int(labels.max()) + 1 if labels.size else 0)],
                    dtype=object)[labels] if labels.size else np.zeros(0, dtype=object)


def _rule_names(mask: np.ndarray, rules) -> np.ndarray:
    out = np.full(mask.size, "", dtype=object)
    for k, r in enumerate(rules):
        hit = (mask >> k) & 1 == 1
        out[hit] = np.where(out[hit] == "", r.name, out[hit] + "+" + r.name)
    return out


def pairs_table(records: pd.DataFrame, result: LinkResult, include_non_links: bool = False) -> pd.DataFrame:
    """Scored pairs (links and review pairs by default) with per-field levels and weights.

    Columns: ``record_a``, ``record_b``, ``decision``, ``probability``,
    ``weight``, then ``<field>_level`` and ``<field>_weight`` per field,
    ``prior_weight``, ``guard_weight`` (what a guard took off, <= 0) and
    ``rules`` (the blocking rules that proposed the pair).  The field weights,
    the prior weight and the guard weight sum to ``weight``.  Sorted by
    probability (highest first), then by record ids.
    """
    s = result.scores
    keep = np.ones(len(s), dtype=bool) if include_non_links else (s["decision"].to_numpy() != "non-link")
    left, right = s["left"].to_numpy()[keep], s["right"].to_numpy()[keep]
    levels = result.levels[keep]
    model = result.model
    rec = records.reset_index(drop=True)
    fw = model._field_weights(rec, left, right, levels)
    prior = model._prior_weight()
    adj, _ = model._guard_adjustment(levels, fw.sum(axis=1) + prior)
    ids = rec["record_id"].to_numpy(dtype=object)
    a, b = ids[left], ids[right]
    swap = a > b
    out = pd.DataFrame({"record_a": np.where(swap, b, a), "record_b": np.where(swap, a, b),
                        "decision": s["decision"].to_numpy()[keep],
                        "probability": s["probability"].to_numpy()[keep].round(6),
                        "weight": s["weight"].to_numpy()[keep].round(4)})
    for j, f in enumerate(result.fields):
        out[f"{f.name}_level"] = np.asarray(f.levels, dtype=object)[levels[:, j].astype(np.int64)]
        out[f"{f.name}_weight"] = fw[:, j].round(4)
    out["prior_weight"] = round(prior, 4)
    out["guard_weight"] = adj.round(4)
    out["rules"] = _rule_names(s["rules"].to_numpy()[keep].astype(np.int64), result.rules)
    out["reviewed"] = s["reviewed"].to_numpy()[keep] if "reviewed" in s.columns else ""
    out = out.sort_values(["probability", "record_a", "record_b"], ascending=[False, True, True],
                          kind="mergesort")
    return out.reset_index(drop=True)


def _best_values(frame: pd.DataFrame, column: str) -> pd.DataFrame:
    """Per entity: the most frequent non-empty value (ties: smallest), its count and the distinct values seen."""
    v = frame[["entity_id", column]].astype({column: str})
    v = v[v[column].str.strip() != ""]
    if v.empty:
        return pd.DataFrame(columns=["entity_id", column, f"{column}_count", f"{column}_seen"])
    counts = v.groupby(["entity_id", column], sort=True).size().rename("n").reset_index()
    best = counts.sort_values(["entity_id", "n", column], ascending=[True, False, True],
                              kind="mergesort").drop_duplicates("entity_id")
    seen = counts.groupby("entity_id")[column].agg(lambda x: "|".join(sorted(x)))
    out = best.rename(columns={"n": f"{column}_count"})
    out[f"{column}_seen"] = out["entity_id"].map(seen)
    return out


def entities_table(records: pd.DataFrame) -> pd.DataFrame:
    """One line per entity: its best values with how many records give them, and its sources.

    ``records`` must carry ``entity_id``.  For each of reg_no, given_name,
    family_name, birth_date and sex: the value most records give
    (``<field>``), how many give it (``<field>_count``) and every distinct
    value seen (``<field>_seen``, ``|`` separated).  Then ``records``,
    ``files`` (distinct source files), ``slots`` and the first record's
    provenance.
    """
    rec = records.reset_index(drop=True)
    if rec.empty:
        return pd.DataFrame(columns=["entity_id", "records", "files", "slots"])
    g = rec.groupby("entity_id", sort=True)
    out = pd.DataFrame({"entity_id": sorted(rec["entity_id"].unique())})
    out["records"] = out["entity_id"].map(g.size())
    out["files"] = out["entity_id"].map(g["source_file"].nunique())
    out["slots"] = out["entity_id"].map(g["slot"].agg(lambda x: "|".join(sorted(set(x)))))
    for col in ENTITY_FIELDS:
        best = _best_values(rec, col)
        out = out.merge(best, on="entity_id", how="left")
        out[col] = out[col].fillna("")
        out[f"{col}_count"] = pd.to_numeric(out[f"{col}_count"], errors="coerce").fillna(0).astype(int)
        out[f"{col}_seen"] = out[f"{col}_seen"].fillna("")
    first = rec.drop_duplicates("entity_id")[["entity_id", "record_id", "source_file", "sheet", "row", "slot"]]
    first = first.rename(columns={c: f"first_{c}" for c in first.columns if c != "entity_id"})
    return out.merge(first, on="entity_id", how="left")


def explain_pair(records: pd.DataFrame, model: FellegiSunter, record_a: str, record_b: str) -> pd.DataFrame:
    """Per-field account of two records (by record id): values, level, m, u and weight.

    The ``weight`` column (prior row, field rows and a guard row when one
    fired) sums to the pair's match weight.  Raises KeyError naming an
    unknown record id.
    """
    rec = records.reset_index(drop=True)
    ids = rec["record_id"].astype(str)
    pos = {}
    for rid in (record_a, record_b):
        hit = np.flatnonzero(ids.to_numpy() == str(rid))
        if hit.size == 0:
            raise KeyError(f"no record with id {rid!r}")
        pos[rid] = int(hit[0])
    table = model.explain(rec, pos[record_a], pos[record_b])
    by_name = {f.name: f for f in model.fields}
    va, vb = [], []
    for name in table["field"]:
        f = by_name.get(name)
        va.append("" if f is None else str(rec.at[pos[record_a], f.columns[0]]))
        vb.append("" if f is None else str(rec.at[pos[record_b], f.columns[0]]))
    table.insert(1, "value_a", va)
    table.insert(2, "value_b", vb)
    return table


def blocking_report(result: LinkResult, truth_labels=None) -> pd.DataFrame:
    """Pairs per blocking rule and reduction ratio; with truth, pair completeness per rule too."""
    rep = result.blocking
    if truth_labels is None:
        return rep
    pc = pair_completeness(result.scores[["left", "right", "rules"]], truth_labels, result.rules)
    return rep.merge(pc[["rule", "true_pairs", "pair_completeness"]], on="rule", how="left")
