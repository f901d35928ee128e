"""Fellegi-Sunter match weights with EM-fitted parameters.

Model (Fellegi & Sunter 1969, JASA 64(328)): under conditional independence a
pair's Bayes factor is the product over fields of m(level) / u(level), where
m = P(level | same person) and u = P(level | different persons).  The match
weight is ``log2(prior / (1 - prior)) + sum_f log2(m_f / u_f)`` and the match
probability is ``1 / (1 + 2**-weight)``.  A missing level weighs 0 (m and u
are distributions over the non-missing levels only).

Fitting
-------
* **u** comes from random record pairs (seeded, ``u_sample`` pairs; every pair
  when the whole pair space is no larger).  Random pairs are nearly all
  non-matches, so their level shares estimate u directly.  A level never seen
  among them gets half a count (so its u is small but not zero).
* **m and the prior** come from EM (Winkler 1988) over the *counts of
  distinct comparison patterns* (``np.unique`` over level rows), never per
  pair.  With ``em_pairs="all"`` (default) the data is the whole pair space:
  the candidate pairs counted exactly and the other ``n(n-1)/2 - n_candidates``
  pairs stood in for by the random pairs that are not candidates, each
  re-weighted so that together they count as many as the pairs they stand
  for.  Without them the non-match class would be made of blocked pairs
  only and would collapse onto near matches.  With ``em_pairs="candidates"``
  EM sees only the candidate pairs (for comparisons with other tools).
* **u fixed or updated**: by default (``update_u=False``) u stays at the
  random-pair estimate, which is unbiased for the non-match class and keeps
  EM from trading u against m; ``update_u=True`` lets EM update u as well
  (needed when fitting on candidates only).
* EM starts from the stated ``prior`` and ``m_start`` (settings), stops when
  no parameter moves by more than ``tol`` (the prior relative to itself) or
  after ``max_iter`` iterations, and reports ``n_iter_`` and ``converged_``.
  It is deterministic for a given ``seed`` (the seed only draws random pairs).
* Problems are reported in ``warnings_`` and never used silently: EM not
  converged; an agreement level with ``m <= u`` (its weight is set to 0 when
  ``clamp_agreement``, the default, rather than letting an agreement count
  against a match).

Value-specific (term-frequency) weights
---------------------------------------
For an ``exact`` agreement on value v of a name or date field, u is replaced
by u_v = the relative frequency of v among the fitted records (Winkler 1989;
common practice), so a shared common family name weighs less than a shared
rare one: weight = log2(m_exact / u_v).  Values not seen at fit time fall back
to the level's average u.

Relatives
---------
Siblings and cousins share family names and places; twins also share a birth
date; namesakes share whole names.  Conditional independence over-counts such
shared family-level evidence, so (a) only person-level fields are compared
(see :mod:`linker.compare`), (b) term-frequency weights shrink common shared
names, and (c) optional *guards* cap the weight of any pair that strongly
disagrees on a field that separates relatives: a guard (field, levels, cap,
unless) sets ``weight = min(weight, cap)`` when the pair's level on ``field``
is one of ``levels``, unless one of the ``unless`` (field, level) agreements
holds.  :data:`DEFAULT_PERSON_GUARDS` caps pairs whose given names or birth
dates are plainly different (not typo-close) at weight 0 unless their
registration numbers agree exactly, so a twin or sibling with the same family
name, place and birth date is never linked on those alone.  (d) With
``classes=3`` EM fits a third latent class for close-but-different persons
(namesakes, relatives; Larsen & Rubin 2001): it starts agreeing on the name
fields (``relative_fields``) and like u elsewhere.  Without it, a delivery
with many namesakes drives EM to put them in the match class, so m learns
that a different registration number or birth date is common among matches
and those disagreements lose their weight.  The third class is used only to
estimate m and the prior; scoring stays the additive two-class weight
``log2(m / u)`` with u from random pairs, so the per-field weights of
:meth:`FellegiSunter.explain` still sum to the pair's weight.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd
from scipy.special import expit

from .compare import (DEFAULT_PERSON_FIELDS, FieldComparison, _unique, column_codes, compare, field_from_dict,
                      field_to_dict)

__all__ = ["Guard", "FellegiSunter", "DEFAULT_PERSON_GUARDS", "em_fit", "em_fit_relatives", "pattern_counts",
           "random_pairs", "NotFittedError"]

FORMAT = "linker.fellegi_sunter/1"


class NotFittedError(RuntimeError):
    """The model was used before ``fit``."""


@dataclass(frozen=True)
class Guard:
    """Cap the weight of pairs that show ``levels`` on ``field`` (unless an ``unless`` agreement holds)."""

    field: str
    levels: tuple[str, ...]
    cap: float = 0.0
    unless: tuple[tuple[str, str], ...] = ()

    def __post_init__(self):
        object.__setattr__(self, "levels", (self.levels,) if isinstance(self.levels, str) else tuple(self.levels))
        object.__setattr__(self, "unless", tuple(tuple(u) for u in self.unless))


DEFAULT_PERSON_GUARDS = (
    Guard("given_name", ("different",), 0.0, (("reg_no", "exact"),)),
    Guard("birth_date", ("different", "age_inconsistent"), 0.0, (("reg_no", "exact"),)),
)


# ---------------------------------------------------------------------------
# pure helpers
# ---------------------------------------------------------------------------

def random_pairs(n_records: int, size: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Random distinct-record pairs (left < right), seeded; all pairs if there are no more than ``size``."""
    total = n_records * (n_records - 1) // 2
    if total == 0:
        e = np.zeros(0, dtype=np.int64)
        return e, e
    if total <= size:
        lo, hi = np.triu_indices(n_records, k=1)
        return lo.astype(np.int64), hi.astype(np.int64)
    rng = np.random.default_rng(seed)
    i = rng.integers(0, n_records, size=size, dtype=np.int64)
    j = rng.integers(0, n_records - 1, size=size, dtype=np.int64)
    j = j + (j >= i)
    return np.minimum(i, j), np.maximum(i, j)


def pattern_counts(levels: np.ndarray, weights: np.ndarray | None = None):
    """Distinct level rows and their (weighted) counts, sorted by pattern."""
    levels = np.asarray(levels)
    if levels.shape[0] == 0:
        return levels.reshape(0, levels.shape[1] if levels.ndim == 2 else 0), np.zeros(0)
    levels = levels.astype(np.int64)
    radix = levels.max(axis=0) + 1
    if np.sum(np.log2(np.maximum(radix, 2))) < 62:
        # rows as one mixed-radix int64 key: a 1-d sort instead of a row-wise one
        place = np.concatenate(([1], np.cumprod(radix[::-1])[:-1]))[::-1]
        key = levels @ place
        space = int(np.prod(radix))
        if space <= 1 << 24:       # few possible patterns: count by direct address, no sort
            full = np.bincount(key, weights=None if weights is None else np.asarray(weights, dtype=np.float64),
                               minlength=space)
            present = np.bincount(key, minlength=space) > 0
            keys = np.flatnonzero(present)
            patterns = (keys[:, None] // place[None, :]) % radix[None, :]
            return patterns, full[keys].astype(np.float64)
        keys, inverse = np.unique(key, return_inverse=True)
        patterns = (keys[:, None] // place[None, :]) % radix[None, :]
    else:
        patterns, inverse = np.unique(levels, axis=0, return_inverse=True)
    inverse = np.asarray(inverse).ravel()
    if weights is None:
        counts = np.bincount(inverse, minlength=patterns.shape[0]).astype(np.float64)
    else:
        counts = np.bincount(inverse, weights=np.asarray(weights, dtype=np.float64), minlength=patterns.shape[0])
    return patterns, counts


def _pattern_table(patterns, counts, n_fields: int) -> tuple[np.ndarray, np.ndarray]:
    """Level rows (int64, lexicographically sorted, distinct) with float counts; equal rows are summed."""
    patterns = np.asarray(patterns, dtype=np.int64).reshape(-1, n_fields)
    counts = np.asarray(counts, dtype=np.float64).ravel()
    if patterns.shape[0] != counts.size:
        raise ValueError(f"fit_counts: {patterns.shape[0]} patterns but {counts.size} counts")
    if patterns.shape[0] == 0:
        return patterns, counts
    order = np.lexsort(patterns.T[::-1])
    patterns, counts = patterns[order], counts[order]
    new = np.concatenate(([True], (patterns[1:] != patterns[:-1]).any(axis=1)))
    if new.all():
        return patterns, counts
    return patterns[new], np.add.reduceat(counts, np.flatnonzero(new))


def _weighted_union(cand_patterns, cand_counts, other_patterns, other_counts, w_other: float):
    """Sorted union of two pattern tables; a pattern's count is its candidate count plus ``w_other``
    added once per non-candidate random pair showing it, one addition after the other, so the floats
    equal those of :func:`pattern_counts` over the candidate rows followed by the random rows."""
    n_fields = cand_patterns.shape[1]
    both = np.concatenate([cand_patterns, other_patterns]).reshape(-1, n_fields)
    if both.shape[0] == 0:
        return both, np.zeros(0)
    order = np.lexsort(both.T[::-1])
    s = both[order]
    new = np.concatenate(([True], (s[1:] != s[:-1]).any(axis=1)))
    slot = np.cumsum(new) - 1                      # sorted row -> distinct pattern
    where = np.empty(both.shape[0], dtype=np.int64)
    where[order] = slot
    counts = np.zeros(int(new.sum()))
    nc = cand_patterns.shape[0]
    np.add.at(counts, where[:nc], cand_counts)      # each candidate pattern once: exact integers
    reps = np.asarray(np.round(other_counts), dtype=np.int64)
    if reps.sum():
        np.add.at(counts, np.repeat(where[nc:], reps), float(w_other))
    return s[new], counts


def _normalize(v: np.ndarray, floor: float) -> np.ndarray:
    v = np.maximum(np.asarray(v, dtype=np.float64), 0.0)
    s = v.sum()
    v = v / s if s > 0 else np.full(v.size, 1.0 / max(v.size, 1))
    v = np.maximum(v, floor)
    return v / v.sum()


def em_fit(patterns: np.ndarray, counts: np.ndarray, n_levels: Sequence[int], m0, u0, p0: float, *,
           update_u: bool = False, max_iter: int = 1000, tol: float = 1e-6, floor: float = 1e-9):
    """EM for the two-class Fellegi-Sunter mixture over weighted comparison patterns.

    ``patterns`` (P, F) holds level codes (0 = missing, which adds nothing to
    either class); ``counts`` (P,) how many pairs show each pattern.  ``m0``,
    ``u0`` are per-field arrays over levels 1..L-1.  Returns
    (m, u, p, n_iter, converged) with m, u lists of arrays over levels 1..L-1.
    E-step: g = p m(γ) / (p m(γ) + (1-p) u(γ)); M-step: m_k = Σ g·[γ=k] / Σ g,
    u_k likewise with 1-g, p = Σ g / Σ 1 (Winkler 1988 as restated in REFERENCES.md §5).
    """
    patterns = np.asarray(patterns, dtype=np.int64)
    counts = np.asarray(counts, dtype=np.float64)
    n_fields = patterns.shape[1]
    m = [_normalize(np.asarray(m0[f], dtype=np.float64), floor) for f in range(n_fields)]
    u = [_normalize(np.asarray(u0[f], dtype=np.float64), floor) for f in range(n_fields)]
    p = float(p0)
    total = counts.sum()
    converged = False
    n_iter = 0
    if max_iter < 0:
        raise ValueError(f"em_fit: max_iter must be >= 0, got {max_iter}")
    for n_iter in range(1, max_iter + 1):
        z = np.full(patterns.shape[0], math.log(p) - math.log1p(-p))
        for f in range(n_fields):
            lr = np.concatenate(([0.0], np.log(m[f]) - np.log(u[f])))
            z += lr[patterns[:, f]]
        g = expit(z)
        wg = counts * g
        wu = counts - wg
        p_new = float(wg.sum() / total)
        p_new = min(max(p_new, 1e-300), 1 - 1e-12)
        delta = abs(p_new - p) / p
        m_new, u_new = [], []
        for f in range(n_fields):
            L = int(n_levels[f])
            mf = _normalize(np.bincount(patterns[:, f], weights=wg, minlength=L)[1:L], floor)
            delta = max(delta, float(np.abs(mf - m[f]).max()))
            m_new.append(mf)
            if update_u:
                uf = _normalize(np.bincount(patterns[:, f], weights=wu, minlength=L)[1:L], floor)
                delta = max(delta, float(np.abs(uf - u[f]).max()))
                u_new.append(uf)
            else:
                u_new.append(u[f])
        m, u, p = m_new, u_new, p_new
        if delta < tol:
            converged = True
            break
    return m, u, p, n_iter, converged


def em_fit_relatives(patterns: np.ndarray, counts: np.ndarray, n_levels: Sequence[int], m0, r0, u0,
                     p0: float, q0: float, *, update_u: bool = False, max_iter: int = 1000, tol: float = 1e-6,
                     floor: float = 1e-9):
    """EM for a three-class mixture: same person, close-but-different person, unrelated pair.

    The middle class (relatives, namesakes) shares names but not the person's
    own identifiers; giving it a class of its own keeps it from being absorbed
    into the match class, where it would teach m that a different
    registration number or birth date is common among matches (three-class
    mixtures: Larsen & Rubin 2001, JASA 96(453)).  Classes are conditionally
    independent over fields, missing levels add nothing.  ``m0``, ``r0``,
    ``u0`` are per-field arrays over levels 1..L-1; ``p0``, ``q0`` the starting
    shares of the match and relative classes.  Returns
    (m, r, u, p, q, n_iter, converged).
    """
    patterns = np.asarray(patterns, dtype=np.int64)
    counts = np.asarray(counts, dtype=np.float64)
    n_fields = patterns.shape[1]
    if max_iter < 0:
        raise ValueError(f"em_fit_relatives: max_iter must be >= 0, got {max_iter}")
    if not (0 < p0 and 0 < q0 and p0 + q0 < 1):
        raise ValueError(f"em_fit_relatives: need class shares p0, q0 > 0 with p0 + q0 < 1, got {p0}, {q0}")
    theta = [[_normalize(np.asarray(x[f], dtype=np.float64), floor) for f in range(n_fields)]
             for x in (m0, r0, u0)]
    share = np.array([p0, q0, 1.0 - p0 - q0])
    total = counts.sum()
    free = (0, 1, 2) if update_u else (0, 1)
    converged = False
    n_iter = 0
    for n_iter in range(1, max_iter + 1):
        ll = np.tile(np.log(share), (patterns.shape[0], 1))
        for c in range(3):
            for f in range(n_fields):
                ll[:, c] += np.concatenate(([0.0], np.log(theta[c][f])))[patterns[:, f]]
        ll -= ll.max(axis=1, keepdims=True)
        resp = np.exp(ll)
        resp /= resp.sum(axis=1, keepdims=True)
        w = counts[:, None] * resp
        new_share = np.maximum(w.sum(axis=0) / total, 1e-300)
        delta = float(np.max(np.abs(new_share - share) / share))
        for c in free:
            for f in range(n_fields):
                L = int(n_levels[f])
                v = _normalize(np.bincount(patterns[:, f], weights=w[:, c], minlength=L)[1:L], floor)
                delta = max(delta, float(np.abs(v - theta[c][f]).max()))
                theta[c][f] = v
        share = new_share
        if delta < tol:
            converged = True
            break
    m, r, u = theta
    return m, r, u, float(share[0]), float(share[1]), n_iter, converged


def _default_m_start(f: FieldComparison) -> np.ndarray:
    """Agreement levels share 0.9 halving down the order; disagreement levels share 0.1."""
    agree = np.array(f.agreement[1:])
    out = np.zeros(agree.size)
    k = np.cumsum(agree) - 1
    out[agree] = 0.5 ** k[agree]
    out[agree] *= 0.9 / out[agree].sum()
    if (~agree).any():
        out[~agree] = 0.1 / (~agree).sum()
    return out


def _log2(x):
    return np.log2(np.asarray(x, dtype=np.float64))


# ---------------------------------------------------------------------------
# model
# ---------------------------------------------------------------------------

class FellegiSunter:
    """Fellegi-Sunter linkage model fitted by EM over comparison patterns.

    Parameters
    ----------
    fields : sequence of FieldComparison
        The comparisons the level matrix was built with (one column each).
    prior : float, optional
        Starting match probability per pair of the EM data; default
        1/(n-1) over the whole pair space (about one duplicate per record
        pair-up), 0.1 on candidates only.
    m_start, u_start : dict field -> sequence over levels 1..L-1, optional
        Starting m (default: see ``_default_m_start``) and u (default: from
        random pairs).
    em_pairs : {"all", "candidates"}
        Pair space EM is fitted over (see module docstring).
    update_u : bool
        Let EM update u (default False: u fixed from random pairs).
    u_sample : int
        Random pairs drawn for u and as stand-ins for non-candidates.
    seed : int
    max_iter : int
    tol : float
    tf_fields : sequence of str, optional
        Fields whose exact agreements get value-specific u; default: every
        ``name`` and ``date`` field.
    clamp_agreement : bool
        Set the weight of an agreement level (or value) whose m <= u to 0.
    guards : sequence of Guard
    classes : {2, 3}
        Latent classes of EM: match / non-match, or with a third class for
        close-but-different persons (see the module docstring).
    relative_fields : sequence of str, optional
        Fields on which the relatives class starts agreeing (default: the
        ``name`` fields).
    floor : float
        Smallest m or u kept for any level (default 1e-6), so one level seen
        in no matching pair weighs about -20, not minus infinity.

    Attributes
    ----------
    m_, u_ : dict field -> ndarray over all levels (index 0 = missing, NaN)
    prior_ : float   match probability per pair of the fitted pair space
    r_ : dict field -> ndarray   level distribution of the relatives class (``classes=3``; else empty)
    relative_share_ : float      share of the relatives class (0 with two classes)
    weights_ : dict field -> ndarray of log2 weights per level (missing 0)
    tf_ : dict field -> dict value -> relative frequency
    n_iter_, converged_, warnings_ : EM report
    n_records_, n_candidates_, n_random_, pair_space_ : what it was fitted on
    """

    def __init__(self, fields: Sequence[FieldComparison] = DEFAULT_PERSON_FIELDS, *, prior: float | None = None,
                 m_start: dict | None = None, u_start: dict | None = None, em_pairs: str = "all",
                 update_u: bool = False, u_sample: int = 200_000, seed: int = 0, max_iter: int = 1000,
                 tol: float = 1e-6, tf_fields: Sequence[str] | None = None, clamp_agreement: bool = True,
                 guards: Sequence[Guard] = (), floor: float = 1e-6, classes: int = 2,
                 relative_fields: Sequence[str] | None = None):
        self.fields = tuple(fields)
        self.prior = prior
        self.m_start = m_start
        self.u_start = u_start
        self.em_pairs = em_pairs
        self.update_u = update_u
        self.u_sample = u_sample
        self.seed = seed
        self.max_iter = max_iter
        self.tol = tol
        self.tf_fields = None if tf_fields is None else tuple(tf_fields)
        self.clamp_agreement = clamp_agreement
        self.guards = tuple(guards)
        self.floor = floor
        self.classes = classes
        self.relative_fields = None if relative_fields is None else tuple(relative_fields)

    # -- checks ------------------------------------------------------------
    def _check_settings(self):
        names = [f.name for f in self.fields]
        if len(set(names)) != len(names):
            raise ValueError(f"FellegiSunter: field names must be unique, got {names}")
        if self.em_pairs not in ("all", "candidates"):
            raise ValueError(f"FellegiSunter: em_pairs must be 'all' or 'candidates', got {self.em_pairs!r}")
        if self.prior is not None and not 0.0 < self.prior < 1.0:
            raise ValueError(f"FellegiSunter: prior must lie in (0, 1), got {self.prior!r}")
        if self.classes not in (2, 3):
            raise ValueError(f"FellegiSunter: classes must be 2 or 3, got {self.classes!r}")
        for name in (self.relative_fields or ()):
            if name not in names:
                raise ValueError(f"FellegiSunter: relative_fields names unknown field {name!r}; fields: {names}")
        if int(self.u_sample) < 1:
            raise ValueError(f"FellegiSunter: u_sample must be >= 1, got {self.u_sample!r}")
        for name in (self.tf_fields or ()):
            if name not in names:
                raise ValueError(f"FellegiSunter: tf_fields names unknown field {name!r}; fields: {names}")
        by_name = {f.name: f for f in self.fields}
        for g in self.guards:
            for fname, lvls in [(g.field, g.levels)] + [(a, (b,)) for a, b in g.unless]:
                if fname not in by_name:
                    raise ValueError(f"FellegiSunter: guard names unknown field {fname!r}; fields: {names}")
                for lv in lvls:
                    by_name[fname].level(lv)
        for label, start in (("m_start", self.m_start), ("u_start", self.u_start)):
            for fname, vals in (start or {}).items():
                if fname not in by_name:
                    raise ValueError(f"FellegiSunter: {label} names unknown field {fname!r}; fields: {names}")
                if len(vals) != len(by_name[fname].levels) - 1:
                    raise ValueError(f"FellegiSunter: {label}[{fname!r}] needs {len(by_name[fname].levels) - 1} "
                                     f"values (levels after 'missing'), got {len(vals)}")

    def _check_fitted(self):
        if not hasattr(self, "m_"):
            raise NotFittedError("FellegiSunter is not fitted yet: call fit(records, pairs, levels) first")

    def _relative_names(self) -> tuple[str, ...]:
        if self.relative_fields is not None:
            return self.relative_fields
        return tuple(f.name for f in self.fields if f.kind == "name")

    def _tf_names(self) -> tuple[str, ...]:
        if self.tf_fields is not None:
            return self.tf_fields
        return tuple(f.name for f in self.fields if f.kind in ("name", "date"))

    # -- fit -----------------------------------------------------------------
    def fit(self, records: pd.DataFrame, pairs: pd.DataFrame, levels: np.ndarray | None = None,
            prepared: dict | None = None):
        """Fit u (random pairs), m and the prior (EM over pattern counts) and term frequencies.

        ``pairs`` holds the candidate pairs (``left``, ``right`` positions);
        ``levels`` their level matrix from :func:`linker.compare.compare` with
        the same ``fields`` (computed when None); ``prepared`` the records'
        :func:`linker.compare.prepare_fields` tables (computed when None).

        The records and pairs are reduced to the aggregates of
        :meth:`fit_counts` (pattern counts, per-field level counts of the
        random pairs, value counts), which does the fitting; another engine can
        compute the same aggregates its own way and call :meth:`fit_counts`.
        """
        self._check_settings()
        fields = self.fields
        n = len(records)
        left = pairs["left"].to_numpy(dtype=np.int64)
        right = pairs["right"].to_numpy(dtype=np.int64)
        if levels is None:
            levels = compare(records, pairs, fields, prepared=prepared)
        levels = np.asarray(levels)
        if levels.shape != (left.size, len(fields)):
            raise ValueError(f"FellegiSunter.fit: levels shape {levels.shape} does not match "
                             f"{left.size} pairs x {len(fields)} fields")
        n_levels = [len(f.levels) for f in fields]

        if self.needs_random_pairs():
            rl, rr = self.random_pairs(n)
            rlev = compare(records, (rl, rr), fields, prepared=prepared)
        else:
            rl = rr = np.zeros(0, dtype=np.int64)
            rlev = np.zeros((0, len(fields)), dtype=np.int8)
        random_level_counts = [np.bincount(rlev[:, j].astype(np.int64), minlength=n_levels[j])
                               for j in range(len(fields))]

        n_distinct = None
        other_patterns, other_counts = np.zeros((0, len(fields)), dtype=np.int64), np.zeros(0)
        if self.em_pairs == "all":
            cand_key = _unique(left * max(n, 1) + right)
            rkey = rl * max(n, 1) + rr
            pos = np.searchsorted(cand_key, rkey)
            is_cand = (pos < cand_key.size) & (cand_key[np.minimum(pos, max(cand_key.size - 1, 0))] == rkey) \
                if cand_key.size else np.zeros(rkey.size, dtype=bool)
            other_patterns, other_counts = pattern_counts(rlev[~is_cand])
            n_distinct = int(cand_key.size)
        cand_patterns, cand_counts = pattern_counts(levels)
        return self.fit_counts(n, cand_patterns, cand_counts, random_level_counts, other_patterns, other_counts,
                               self.tf_value_counts(records), n_distinct_candidates=n_distinct)

    def needs_random_pairs(self) -> bool:
        """Whether fitting uses random pairs (for u, or as stand-ins for the non-candidate pairs)."""
        return self.u_start is None or self.em_pairs == "all"

    def random_pairs(self, n_records: int) -> tuple[np.ndarray, np.ndarray]:
        """The random pairs :meth:`fit` compares: ``random_pairs(n_records, u_sample, seed)``."""
        return random_pairs(n_records, int(self.u_sample), int(self.seed))

    def tf_value_counts(self, records: pd.DataFrame) -> dict[str, pd.Series]:
        """Per term-frequency field: counts of its cleaned (stripped, non-empty) values in ``records``.

        Counts of several parts of the records (say partitions) add up to the counts of the whole.
        """
        self._check_settings()
        by_name = {f.name: f for f in self.fields}
        out = {}
        for name in self._tf_names():
            codes, uniques = column_codes(records, by_name[name].columns[0])
            counts = np.bincount(codes[codes >= 0], minlength=uniques.size)
            out[name] = pd.Series(counts, index=pd.Index(uniques, dtype=object), dtype=np.int64)
        return out

    def fit_counts(self, n_records: int, cand_patterns, cand_counts, random_level_counts, other_patterns,
                   other_counts, tf_counts: dict, *, n_distinct_candidates: int | None = None):
        """Fit from aggregates: what :meth:`fit` computes from the records, any engine can compute.

        Parameters
        ----------
        n_records : int
            Records the pairs are drawn from (the pair space is n(n-1)/2).
        cand_patterns, cand_counts : (P, F) int array, (P,) counts
            Distinct level rows of the candidate pairs and how many pairs show each.
        random_level_counts : sequence of F arrays
            Per field, the count of each level code (0 = missing first) among all
            random pairs (:meth:`random_pairs`), candidates or not; empty arrays
            when :meth:`needs_random_pairs` is false.
        other_patterns, other_counts : (Q, F) int array, (Q,) counts
            Level rows of the random pairs that are not candidate pairs and their
            counts (used with ``em_pairs="all"`` only).
        tf_counts : dict field -> Series value -> count
            :meth:`tf_value_counts` of the records (the parts' counts summed).
        n_distinct_candidates : int, optional
            Distinct candidate pairs (default: the sum of ``cand_counts``).

        The result is bit-identical to :meth:`fit` on the records those aggregates
        describe: EM sees the same patterns in the same (sorted) order with the same
        weighted counts, accumulated in the same order.
        """
        self._check_settings()
        fields = self.fields
        n = int(n_records)
        n_levels = [len(f.levels) for f in fields]
        cand_patterns, cand_counts = _pattern_table(cand_patterns, cand_counts, len(fields))
        other_patterns, other_counts = _pattern_table(other_patterns, other_counts, len(fields))
        n_pairs = int(round(float(cand_counts.sum())))
        n_distinct = n_pairs if n_distinct_candidates is None else int(n_distinct_candidates)
        pair_space = n * (n - 1) // 2
        warn: list[str] = []
        rcounts = [np.asarray(c) for c in random_level_counts] if len(random_level_counts) else []
        n_random = int(round(float(np.sum(rcounts[0])))) if rcounts and np.size(rcounts[0]) else 0

        # u start
        u0 = []
        for j, f in enumerate(fields):
            if self.u_start is not None and f.name in self.u_start:
                u0.append(np.asarray(self.u_start[f.name], dtype=np.float64))
                continue
            full = np.zeros(n_levels[j])
            if rcounts and np.size(rcounts[j]):
                full[:np.size(rcounts[j])] = np.asarray(rcounts[j], dtype=np.float64)
            c = full[1:]
            if c.sum() == 0:
                warn.append(f"field {f.name}: no random pair has a value on both sides; u set uniform")
                u0.append(np.full(n_levels[j] - 1, 1.0 / (n_levels[j] - 1)))
                continue
            u0.append(np.maximum(c, 0.5) / np.maximum(c, 0.5).sum())
        m0 = []
        for f in fields:
            if self.m_start is not None and f.name in self.m_start:
                m0.append(np.asarray(self.m_start[f.name], dtype=np.float64))
            else:
                m0.append(_default_m_start(f))

        # EM data: pattern counts
        if self.em_pairs == "all":
            n_other = pair_space - n_distinct
            n_others = int(round(float(other_counts.sum())))
            w_other = (n_other / n_others) if n_others else 0.0
            patterns, counts = _weighted_union(cand_patterns, cand_counts, other_patterns, other_counts, w_other)
            p0 = self.prior if self.prior is not None else min(1.0 / max(n - 1, 1), 0.1)
        else:
            patterns, counts = cand_patterns, cand_counts
            p0 = self.prior if self.prior is not None else 0.1
        if patterns.shape[0] == 0:
            raise ValueError("FellegiSunter.fit: no pairs to fit on")

        if self.classes == 3:
            rel = self._relative_names()
            r0 = [m0[j] if f.name in rel else u0[j] for j, f in enumerate(fields)]
            m, r, u, p, q, n_iter, converged = em_fit_relatives(
                patterns, counts, n_levels, m0, r0, u0, p0, min(p0 * 3.0, 0.5 * (1.0 - p0)),
                update_u=self.update_u, max_iter=int(self.max_iter), tol=float(self.tol), floor=float(self.floor))
        else:
            m, u, p, n_iter, converged = em_fit(patterns, counts, n_levels, m0, u0, p0, update_u=self.update_u,
                                                max_iter=int(self.max_iter), tol=float(self.tol),
                                                floor=float(self.floor))
            r, q = None, 0.0
        if int(self.max_iter) == 0:
            warn.append("EM not run (max_iter=0): m and the prior are the stated starting values")
        elif not converged:
            warn.append(f"EM did not converge in {n_iter} iterations (tol {self.tol})")

        self.m_, self.u_, self.weights_, self.r_ = {}, {}, {}, {}
        for j, f in enumerate(fields):
            mf = np.concatenate(([np.nan], m[j]))
            uf = np.concatenate(([np.nan], u[j]))
            w = np.concatenate(([0.0], _log2(m[j]) - _log2(u[j])))
            for k in range(1, n_levels[j]):
                if f.agreement[k] and mf[k] <= uf[k]:
                    warn.append(f"field {f.name}, level {f.levels[k]}: m {mf[k]:.4g} <= u {uf[k]:.4g}"
                                + ("; its weight is set to 0" if self.clamp_agreement else ""))
                    if self.clamp_agreement:
                        w[k] = 0.0
            self.m_[f.name], self.u_[f.name], self.weights_[f.name] = mf, uf, w
            if r is not None:
                self.r_[f.name] = np.concatenate(([np.nan], r[j]))
        self.prior_ = float(p)
        self.relative_share_ = float(q)
        self.n_iter_ = int(n_iter)
        self.converged_ = bool(converged)
        self.warnings_ = warn
        self.n_records_ = n
        self.n_candidates_ = n_pairs
        self.n_random_ = n_random
        self.pair_space_ = self.em_pairs
        self.tf_ = {}
        for name in self._tf_names():
            vc = tf_counts.get(name)
            vc = pd.Series(dtype=np.int64) if vc is None else pd.Series(vc)
            vc = vc[vc > 0]
            if vc.empty:
                self.tf_[name] = {}
                continue
            freq = vc.astype(np.int64) / int(vc.sum())
            freq = freq.sort_index()
            self.tf_[name] = {str(k): float(v) for k, v in freq.items()}
        return self

    # -- scoring ---------------------------------------------------------------
    def _prior_weight(self) -> float:
        return math.log2(self.prior_) - math.log2(1.0 - self.prior_)

    def record_weights(self, records: pd.DataFrame) -> dict[str, np.ndarray]:
        """Per term-frequency field (by name): per record its value's exact-agreement weight
        (NaN where the value was not seen in fitting: the level weight applies).

        What scoring needs of the records' values; computed once per record
        table and handed to :meth:`score` (``record_weights=``) when the same
        records are scored in several batches.
        """
        self._check_fitted()
        out = {}
        for f in self.fields:
            table = getattr(self, "tf_", {}).get(f.name)
            if not table:
                continue
            exact = f.level("exact")
            # once per distinct value: the stripped texts looked up in the fitted frequencies
            codes, uniques = column_codes(records, f.columns[0])
            where = pd.Index(list(table.keys()), dtype=object).get_indexer(uniques)   # -1: not seen in fitting
            freq = np.append(np.fromiter(table.values(), dtype=np.float64, count=len(table)), np.nan)
            per_value = np.append(freq[where], np.nan)                                # last: missing value
            w = _log2(self.m_[f.name][exact]) - _log2(per_value[codes])
            if self.clamp_agreement:
                w = np.where(w < 0, 0.0, w)
            out[f.name] = w
        return out

    def _field_weights(self, records, left, right, levels, record_weights: dict | None = None):
        """(n_pairs, n_fields) weights with term-frequency adjustment (column-major: one field at a time)."""
        if record_weights is None:
            record_weights = self.record_weights(records)
        W = np.empty(levels.shape, dtype=np.float64, order="F")
        for j, f in enumerate(self.fields):
            col = self.weights_[f.name][levels[:, j]]
            rec_w = record_weights.get(f.name)
            if rec_w is not None:
                idx = np.flatnonzero(levels[:, j] == f.level("exact"))
                tw = rec_w[left[idx]]
                ok = ~np.isnan(tw)
                col[idx[ok]] = tw[ok]
            W[:, j] = col
        return W

    def _guard_adjustment(self, levels, total):
        """Per pair: amount added by guards (<= 0) and the guard that fired (index or -1)."""
        adj = np.zeros(total.size)
        fired = np.full(total.size, -1, dtype=np.int64)
        idx = {f.name: j for j, f in enumerate(self.fields)}
        current = total.copy()
        for g_i, g in enumerate(self.guards):
            f = self.fields[idx[g.field]]
            on = np.zeros(len(f.levels), dtype=bool)
            on[[f.level(lv) for lv in g.levels]] = True
            hit = on[levels[:, idx[g.field]]]
            for fname, lv in g.unless:
                hit &= levels[:, idx[fname]] != self.fields[idx[fname]].level(lv)
            hit &= current > g.cap
            fired[hit & (fired < 0)] = g_i
            new = np.where(hit, g.cap, current)
            adj += new - current
            current = new
        return adj, fired

    def _levels_for(self, records, pairs, levels):
        left = pairs["left"].to_numpy(dtype=np.int64)
        right = pairs["right"].to_numpy(dtype=np.int64)
        if levels is None:
            levels = compare(records, pairs, self.fields)
        levels = np.asarray(levels)
        if levels.shape != (left.size, len(self.fields)):
            raise ValueError(f"FellegiSunter: levels shape {levels.shape} does not match "
                             f"{left.size} pairs x {len(self.fields)} fields")
        return left, right, levels

    def match_weight(self, records: pd.DataFrame, pairs: pd.DataFrame, levels: np.ndarray | None = None,
                     record_weights: dict | None = None):
        """log2 Bayes factor sum plus prior log-odds (guards applied), per pair.

        ``record_weights``: :meth:`record_weights` of ``records`` (computed when None).
        """
        self._check_fitted()
        left, right, levels = self._levels_for(records, pairs, levels)
        total = self._field_weights(records, left, right, levels, record_weights).sum(axis=1) + self._prior_weight()
        adj, _ = self._guard_adjustment(levels, total)
        return total + adj

    def match_probability(self, records, pairs, levels=None, record_weights: dict | None = None):
        """Posterior match probability per pair, 1 / (1 + 2**-weight)."""
        return expit(self.match_weight(records, pairs, levels, record_weights) * math.log(2.0))

    def score(self, records: pd.DataFrame, pairs: pd.DataFrame, levels: np.ndarray | None = None,
              record_weights: dict | None = None) -> pd.DataFrame:
        """Frame of ``left``, ``right``, ``weight``, ``probability`` per pair.

        ``record_weights``: :meth:`record_weights` of ``records`` (computed when None).
        With both ``levels`` and ``record_weights`` given the records are not read
        (``records`` may be None): what a batch of pairs on a worker needs.
        """
        w = self.match_weight(records, pairs, levels, record_weights)
        return pd.DataFrame({"left": pairs["left"].to_numpy(dtype=np.int64),
                             "right": pairs["right"].to_numpy(dtype=np.int64),
                             "weight": w, "probability": expit(w * math.log(2.0))})

    def explain(self, records: pd.DataFrame, i: int, j: int) -> pd.DataFrame:
        """Per-field account of one pair (positions ``i``, ``j``): the ``weight`` column sums to its match weight.

        Columns: ``field``, ``level``, ``m``, ``u`` (the value-specific u when
        the term-frequency adjustment applies), ``weight``, ``tf``.  The first
        row is the prior log-odds; a guard that fired adds a final row.
        """
        self._check_fitted()
        pair = pd.DataFrame({"left": [int(i)], "right": [int(j)]})
        left, right, levels = self._levels_for(records, pair, None)
        tfw = self.record_weights(records)
        W = self._field_weights(records, left, right, levels, tfw)[0]
        rows = [{"field": "(prior)", "level": "", "m": np.nan, "u": np.nan, "weight": self._prior_weight(),
                 "tf": False}]
        for k, f in enumerate(self.fields):
            lv = int(levels[0, k])
            m, u = self.m_[f.name][lv], self.u_[f.name][lv]
            tf = bool(f.name in tfw and lv == f.level("exact") and not np.isnan(tfw[f.name][left[0]]))
            if tf:
                u = self.tf_[f.name][str(records[f.columns[0]].iloc[left[0]]).strip()]
            rows.append({"field": f.name, "level": f.levels[lv], "m": float(m) if lv else np.nan,
                         "u": float(u) if lv else np.nan, "weight": float(W[k]), "tf": tf})
        total = np.array([W.sum() + self._prior_weight()])
        adj, fired = self._guard_adjustment(levels, total)
        if fired[0] >= 0:
            g = self.guards[fired[0]]
            rows.append({"field": f"(guard {g.field})", "level": ",".join(g.levels), "m": np.nan, "u": np.nan,
                         "weight": float(adj[0]), "tf": False})
        return pd.DataFrame(rows, columns=["field", "level", "m", "u", "weight", "tf"])

    # -- persistence -----------------------------------------------------------
    def _settings(self) -> dict:
        return {
            "fields": [field_to_dict(f) for f in self.fields],
            "prior": self.prior,
            "m_start": None if self.m_start is None else {k: [float(x) for x in v] for k, v in self.m_start.items()},
            "u_start": None if self.u_start is None else {k: [float(x) for x in v] for k, v in self.u_start.items()},
            "em_pairs": self.em_pairs, "update_u": bool(self.update_u), "u_sample": int(self.u_sample),
            "seed": int(self.seed), "max_iter": int(self.max_iter), "tol": float(self.tol),
            "tf_fields": None if self.tf_fields is None else list(self.tf_fields),
            "clamp_agreement": bool(self.clamp_agreement),
            "guards": [{"field": g.field, "levels": list(g.levels), "cap": float(g.cap),
                        "unless": [list(u) for u in g.unless]} for g in self.guards],
            "floor": float(self.floor),
            "classes": int(self.classes),
            "relative_fields": None if self.relative_fields is None else list(self.relative_fields),
        }

    def to_json(self, path) -> None:
        """Write settings and fitted state to ``path`` (UTF-8 JSON, stable key order)."""
        self._check_fitted()

        def arr(a):
            return [None if np.isnan(x) else float(x) for x in np.asarray(a, dtype=np.float64)]

        doc = {
            "format": FORMAT,
            "settings": self._settings(),
            "fitted": {
                "m_": {k: arr(v) for k, v in self.m_.items()},
                "u_": {k: arr(v) for k, v in self.u_.items()},
                "weights_": {k: arr(v) for k, v in self.weights_.items()},
                "r_": {k: arr(v) for k, v in self.r_.items()},
                "relative_share_": float(self.relative_share_),
                "prior_": float(self.prior_), "n_iter_": self.n_iter_, "converged_": self.converged_,
                "warnings_": list(self.warnings_), "n_records_": self.n_records_,
                "n_candidates_": self.n_candidates_, "n_random_": self.n_random_, "pair_space_": self.pair_space_,
                "tf_": self.tf_,
            },
        }
        Path(path).write_text(json.dumps(doc, indent=1, sort_keys=True, ensure_ascii=False) + "\n",
                              encoding="utf-8")

    @classmethod
    def from_json(cls, path) -> "FellegiSunter":
        """Read a model written by :meth:`to_json`."""
        path = Path(path)
        try:
            doc = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as err:
            raise ValueError(f"{path}: not a readable model file ({err})") from None
        if doc.get("format") != FORMAT:
            raise ValueError(f"{path}: format {doc.get('format')!r} is not {FORMAT!r}")
        s = dict(doc["settings"])
        s["fields"] = [field_from_dict(d) for d in s["fields"]]
        s["guards"] = [Guard(g["field"], tuple(g["levels"]), g["cap"], tuple(tuple(u) for u in g["unless"]))
                       for g in s["guards"]]
        model = cls(**{k: v for k, v in s.items()})
        fit = doc["fitted"]

        def arr(a):
            return np.array([np.nan if x is None else x for x in a], dtype=np.float64)

        model.m_ = {k: arr(v) for k, v in fit["m_"].items()}
        model.u_ = {k: arr(v) for k, v in fit["u_"].items()}
        model.weights_ = {k: arr(v) for k, v in fit["weights_"].items()}
        model.r_ = {k: arr(v) for k, v in fit["r_"].items()}
        model.relative_share_ = float(fit["relative_share_"])
        model.prior_ = float(fit["prior_"])
        model.n_iter_ = int(fit["n_iter_"])
        model.converged_ = bool(fit["converged_"])
        model.warnings_ = list(fit["warnings_"])
        model.n_records_ = int(fit["n_records_"])
        model.n_candidates_ = int(fit["n_candidates_"])
        model.n_random_ = int(fit["n_random_"])
        model.pair_space_ = fit["pair_space_"]
        model.tf_ = {k: dict(v) for k, v in fit["tf_"].items()}
        return model

    def parameters(self) -> pd.DataFrame:
        """Fitted m, u and weight per field and level (a readable table)."""
        self._check_fitted()
        rows = []
        for f in self.fields:
            for k, lv in enumerate(f.levels):
                rows.append({"field": f.name, "level": lv, "m": self.m_[f.name][k], "u": self.u_[f.name][k],
                             "weight": self.weights_[f.name][k]})
        return pd.DataFrame(rows)
