"""Comparison levels for candidate pairs.

Each field comparison maps a record pair to one small integer *level*: 0 is
always ``missing`` (either side has no value), 1 is the strongest agreement,
and the last level is ``different``.  Levels are tested in order and the first
that holds wins.  The result of :func:`compare` is an ``int8`` matrix with one
row per pair and one column per field.

Work is done once per distinct value pair: each field's values are factorized
into integer codes per record (:func:`prepare_fields`, once per record table),
the pairs' code pairs are made symmetric (smaller code first) and factorized
per chunk of pairs, each distinct code pair is scored once (string similarity
through :func:`rapidfuzz.process.cpdist` with ``workers=-1``; the costly tests
of a level run only on the pairs no earlier level took), and the levels are
broadcast back, so memory grows with the chunk size, not with the pair count
times the field count.  A chunk needs nothing but the prepared tables, so
chunks can run anywhere (another core, another machine).

Field kinds and their levels (after ``missing``):

``reg_no``
    ``exact``, ``one_edit`` (optimal string alignment distance 1: one
    substitution, insertion, deletion or adjacent swap), [``different_unverified``],
    ``different``.  ``different_unverified`` (only with ``status_column``) =
    further apart, and at least one of the two failed its length or check-digit
    validation.  When ``flag_column`` is set and present, a record whose flag
    is true (the row shows the same number for both of its persons) counts as
    missing.
``name``
    ``exact``, ``jw_high``, [``part``], ``jw_medium``, ``swapped``,
    ``phonetic``, ``different``.  ``part`` (only with ``parts=True``, for
    family names) = the two names share a whole name part and one has several
    parts ("GARCIA LOPEZ" / "GARCIA").  ``swapped`` = the order-free
    ``key_column`` values are equal or one holds every token (two or more) of
    the other, or the value equals the other side's
    ``swap_column`` (given <-> family) while the remaining cross pair is missing
    or at least ``medium``-similar (one shared word alone is no swap).  ``phonetic`` = equal ``phonetic_column`` codes.
``date``
    ``exact``, ``day_month_swapped``, ``one_component`` (exactly one of year,
    month, day differs), ``within_days`` (at most ``days`` apart),
    ``age_consistent`` / ``age_inconsistent`` (one side has no date but an
    age-derived range ``range_columns``: the other's date, or range, falls in /
    outside it), ``different``.
``sex``
    ``same``, ``different``.
``string``
    ``exact``, ``jw_high``, ``jw_medium``, ``different``.
``exact``
    ``same``, ``different``.

Only person-level fields are identity evidence: event dates (intake, release)
and places describe the case, not the person, so :data:`DEFAULT_PERSON_FIELDS`
leaves them out.
"""

from __future__ import annotations

import operator
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import asdict, dataclass
from itertools import chain
from typing import Sequence

import numpy as np
import pandas as pd
from rapidfuzz import process
from rapidfuzz.distance import JaroWinkler, OSA

__all__ = [
    "FieldComparison",
    "LEVELS",
    "AGREEMENT",
    "DEFAULT_PERSON_FIELDS",
    "compare",
    "prepare_fields",
    "jaro_winkler",
    "field_to_dict",
    "field_from_dict",
    "level_frame",
]

# level names per kind (index = level code); AGREEMENT marks levels that are agreements
LEVELS: dict[str, tuple[str, ...]] = {
    "reg_no": ("missing", "exact", "one_edit", "different"),
    "reg_no_checked": ("missing", "exact", "one_edit", "different_unverified", "different"),
    "name": ("missing", "exact", "jw_high", "jw_medium", "swapped", "phonetic", "different"),
    "name_parts": ("missing", "exact", "jw_high", "part", "jw_medium", "swapped", "phonetic", "different"),
    "date": ("missing", "exact", "day_month_swapped", "one_component", "within_days",
             "age_consistent", "age_inconsistent", "different"),
    "sex": ("missing", "same", "different"),
    "string": ("missing", "exact", "jw_high", "jw_medium", "different"),
    "exact": ("missing", "same", "different"),
}
DISAGREEMENT = frozenset({"missing", "different", "different_unverified", "age_inconsistent"})
AGREEMENT = {k: tuple(name not in DISAGREEMENT for name in v) for k, v in LEVELS.items()}
KINDS = ("reg_no", "name", "date", "sex", "string", "exact")


@dataclass(frozen=True)
class FieldComparison:
    """How one field of two records is compared.

    Parameters
    ----------
    name : str
        Field label (column of the level matrix, key of model parameters).
    kind : {"reg_no", "name", "date", "sex", "string", "exact"}
    columns : tuple of str
        Value column(s); the first is the value compared (and the value whose
        frequency the model's term-frequency adjustment uses).
    high, medium : float
        Jaro-Winkler thresholds for ``jw_high`` / ``jw_medium``.
    days : int
        Largest gap in days for the date level ``within_days``.
    swap_column, key_column, phonetic_column : str, optional
        ``name`` kind: column holding the other name part, the order-free name
        key, and the phonetic code.
    parts : bool
        ``name`` kind: add the ``part`` level (double family names).
    range_columns : tuple of str, optional
        ``date`` kind: (earliest, latest) birth date consistent with a stated age.
    flag_column : str, optional
        ``reg_no`` kind: boolean column; a true flag makes the value count as missing.
    status_column : str, optional
        ``reg_no`` kind: validation status column (``valid`` when length and
        check digit hold); adds the level ``different_unverified`` for
        numbers more than one edit apart of which at least one failed
        validation (a known-mangled number disagrees more weakly).  Optional:
        records without the column count as valid.
    """

    name: str
    kind: str
    columns: tuple[str, ...]
    high: float = 0.92
    medium: float = 0.80
    days: int = 31
    swap_column: str | None = None
    key_column: str | None = None
    phonetic_column: str | None = None
    parts: bool = False
    range_columns: tuple[str, ...] | None = None
    flag_column: str | None = None
    status_column: str | None = None

    def __post_init__(self):
        if isinstance(self.columns, str):
            object.__setattr__(self, "columns", (self.columns,))
        else:
            object.__setattr__(self, "columns", tuple(self.columns))
        if self.range_columns is not None:
            object.__setattr__(self, "range_columns", tuple(self.range_columns))
        if self.kind not in KINDS:
            raise ValueError(f"FieldComparison {self.name!r}: kind must be one of {KINDS}, got {self.kind!r}")
        if len(self.columns) != 1:
            raise ValueError(f"FieldComparison {self.name!r}: columns must name one value column, "
                             f"got {self.columns!r}")
        if not 0.0 <= self.medium <= self.high <= 1.0:
            raise ValueError(f"FieldComparison {self.name!r}: need 0 <= medium <= high <= 1, "
                             f"got medium={self.medium}, high={self.high}")
        if self.days < 0:
            raise ValueError(f"FieldComparison {self.name!r}: days must be >= 0, got {self.days}")
        if self.range_columns is not None and len(self.range_columns) != 2:
            raise ValueError(f"FieldComparison {self.name!r}: range_columns must be (earliest, latest), "
                             f"got {self.range_columns!r}")

    @property
    def level_kind(self) -> str:
        if self.kind == "name" and self.parts:
            return "name_parts"
        if self.kind == "reg_no" and self.status_column:
            return "reg_no_checked"
        return self.kind

    @property
    def levels(self) -> tuple[str, ...]:
        """Level names, index = level code."""
        return LEVELS[self.level_kind]

    @property
    def agreement(self) -> tuple[bool, ...]:
        """Per level: is it an agreement (as opposed to missing / a disagreement)."""
        return AGREEMENT[self.level_kind]

    def level(self, name: str) -> int:
        """Code of the level called ``name``."""
        if name not in self.levels:
            raise ValueError(f"field {self.name!r} ({self.kind}) has no level {name!r}; levels: {self.levels}")
        return self.levels.index(name)

    def required_columns(self) -> tuple[str, ...]:
        """Columns that must be present (optional flag and status columns excluded)."""
        cols = list(self.columns)
        for c in (self.swap_column, self.key_column, self.phonetic_column):
            if c:
                cols.append(c)
        if self.range_columns:
            cols += list(self.range_columns)
        return tuple(cols)


def field_to_dict(f: FieldComparison) -> dict:
    """Plain dict of a field comparison (JSON-ready)."""
    d = asdict(f)
    d["columns"] = list(f.columns)
    d["range_columns"] = list(f.range_columns) if f.range_columns else None
    return d


def field_from_dict(d: dict) -> FieldComparison:
    """Inverse of :func:`field_to_dict`."""
    d = dict(d)
    d["columns"] = tuple(d["columns"])
    if d.get("range_columns") is not None:
        d["range_columns"] = tuple(d["range_columns"])
    return FieldComparison(**d)


# The person-record comparison set: identity evidence only (no event dates or places).
DEFAULT_PERSON_FIELDS = (
    FieldComparison("reg_no", "reg_no", ("reg_no",), flag_column="reg_no_shared", status_column="reg_no_status"),
    FieldComparison("given_name", "name", ("given_name",), swap_column="family_name",
                    key_column="name_key", phonetic_column="given_soundex"),
    FieldComparison("family_name", "name", ("family_name",), swap_column="given_name",
                    key_column="name_key", phonetic_column="family_soundex", parts=True),
    FieldComparison("birth_date", "date", ("birth_date",), range_columns=("birth_date_min", "birth_date_max")),
    FieldComparison("sex", "sex", ("sex",)),
)


def _unique(x: np.ndarray) -> np.ndarray:
    """Sorted distinct values by sorting (numpy 2's hash-based ``np.unique`` is far slower on int64 keys)."""
    x = np.sort(np.asarray(x).ravel())
    if x.size == 0:
        return x
    return x[np.concatenate(([True], x[1:] != x[:-1]))]


# ---------------------------------------------------------------------------
# similarity
# ---------------------------------------------------------------------------

def jaro_winkler(a, b) -> np.ndarray:
    """Jaro-Winkler similarity of aligned string arrays (prefix weight 0.1, up to 4 letters).

    rapidfuzz's batch function over the pairs, all cores; float64 so that
    thresholds are applied to exact values.
    """
    a = np.asarray(a, dtype=object)
    b = np.asarray(b, dtype=object)
    if a.size == 0:
        return np.zeros(0, dtype=np.float64)
    return process.cpdist(a, b, scorer=JaroWinkler.normalized_similarity, workers=-1, dtype=np.float64)


def _osa(a, b) -> np.ndarray:
    a = np.asarray(a, dtype=object)
    b = np.asarray(b, dtype=object)
    if a.size == 0:
        return np.zeros(0, dtype=np.int64)
    return process.cpdist(a, b, scorer=OSA.distance, workers=-1, dtype=np.int32).astype(np.int64)


# ---------------------------------------------------------------------------
# per-field value tables: record -> value code, code -> attributes
# ---------------------------------------------------------------------------

def column_codes(records: pd.DataFrame, col: str) -> tuple[np.ndarray, np.ndarray]:
    """Per record an integer code of the column's stripped text (-1 for missing or blank), and the
    distinct non-blank texts by code in first-seen order.

    One hash factorization of the column; stripping and the merge of values
    that differ only in surrounding blanks are done on the distinct values.
    """
    codes, uniques = pd.factorize(records[col].reset_index(drop=True), use_na_sentinel=True)
    uniques = np.asarray(uniques, dtype=object)
    clean = _strip_texts(uniques)
    if clean is uniques or uniques.size == 0:    # already clean (normalized records): the distinct values stand
        ccodes, cuniq = np.arange(uniques.size, dtype=np.int64), uniques
    else:
        if clean is None:
            clean = pd.Series(uniques).astype(str).str.strip()
        ccodes, cuniq = pd.factorize(clean)
        cuniq = np.asarray(cuniq, dtype=object)
    blank = np.flatnonzero(cuniq == "")
    if blank.size:                   # drop "" from the distinct texts, renumber the codes after it
        e = blank[0]
        ccodes = np.where(ccodes == e, -1, np.where(ccodes > e, ccodes - 1, ccodes))
        cuniq = np.delete(cuniq, e)
    lut = np.append(ccodes.astype(np.int64), -1)       # code -1 (missing) stays -1
    return lut[codes], cuniq


def _strip_texts(values: np.ndarray) -> np.ndarray | None:
    """The values stripped of surrounding whitespace when all are str (None otherwise);
    ``values`` itself when none changed (str.strip returns the same object then)."""
    if pd.api.types.infer_dtype(values, skipna=False) != "string":
        return None
    clean = [v.strip() for v in values]
    if not any(map(operator.is_not, clean, values)):
        return values
    return np.asarray(clean, dtype=object)


def _codes(records: pd.DataFrame, col: str | None, shared: dict | None) -> tuple[np.ndarray, np.ndarray]:
    """:func:`column_codes`, once per column within one :func:`prepare_fields` call (``shared``);
    an absent column name gives all missing."""
    if not col:
        return np.full(len(records), -1, dtype=np.int64), np.zeros(0, dtype=object)
    return _shared(shared, ("column", col), lambda: column_codes(records, col))


def _shared(shared: dict | None, key: tuple, make):
    """``make()``, computed once per key within one :func:`prepare_fields` call."""
    if shared is None:
        return make()
    if key not in shared:
        shared[key] = make()
    return shared[key]


def _merge_vocab(*coded: tuple[np.ndarray, np.ndarray]) -> tuple[list[np.ndarray], np.ndarray]:
    """Codes of several columns recoded into one vocabulary (the union of their distinct texts)."""
    codes, vocab = pd.factorize(np.concatenate([u for _, u in coded]) if coded else np.zeros(0, dtype=object))
    out, start = [], 0
    for c, u in coded:
        lut = np.append(codes[start:start + u.size].astype(np.int64), -1)
        out.append(lut[c])
        start += u.size
    return out, np.asarray(vocab, dtype=object)


def _flag(records: pd.DataFrame, col: str | None) -> np.ndarray:
    n = len(records)
    if not col or col not in records.columns:
        return np.zeros(n, dtype=bool)
    s = records[col].reset_index(drop=True)
    if s.dtype == bool:
        return s.to_numpy()
    codes, uniques = column_codes(records, col)
    yes = pd.Series(uniques, dtype=object).str.lower().isin(["true", "1", "yes", "y", "t"]).to_numpy()
    return np.append(yes, False)[codes]


def _row_codes(parts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Code per distinct row of a small-integer matrix (codes in first-seen order) and each code's first row."""
    key = parts[:, 0].astype(np.int64) + 1
    span = int(key.max()) + 1 if key.size else 1
    for c in range(1, parts.shape[1]):
        col = parts[:, c].astype(np.int64) + 1
        width = int(col.max()) + 1 if col.size else 1
        if span * width >= 2 ** 62:                 # renumber the rows so far before the key overflows
            key = pd.factorize(key)[0].astype(np.int64)
            span = int(key.max()) + 1 if key.size else 1
        key = key * width + col
        span *= width
    codes = pd.factorize(key)[0].astype(np.int64)
    first = np.full(int(codes.max()) + 1 if codes.size else 0, -1, dtype=np.int64)
    first[codes[::-1]] = np.arange(codes.size - 1, -1, -1)
    return codes, first


class _Table:
    """Distinct values of one field: per-record code (-1 = missing) and per-code attributes."""

    def __init__(self, codes: np.ndarray, attrs: dict[str, np.ndarray]):
        self.codes = codes
        self.attrs = attrs


def _prepare(records: pd.DataFrame, f: FieldComparison, shared: dict | None = None) -> _Table:
    """The field's table; ``shared`` (one prepare_fields call) lets fields on the same columns share the work."""
    kind = f.kind
    if kind == "reg_no":
        codes, uniques = _codes(records, f.columns[0], shared)
        if f.flag_column:                       # a number flagged as shared by several persons compares as missing
            codes = np.where(_flag(records, f.flag_column), -1, codes)
        if not f.status_column:
            return _Table(codes, {"value": uniques})
        if f.status_column not in records.columns:   # no status: every number counts as verified
            return _Table(codes, {"value": uniques, "valid": np.ones(uniques.size, dtype=bool)})
        scodes, suniq = _codes(records, f.status_column, shared)
        is_valid = np.append(suniq == "valid", False)[scodes]
        valid = np.zeros(uniques.size, dtype=bool)
        seen = codes >= 0
        valid[codes[seen]] = is_valid[seen]     # status is a function of the value
        return _Table(codes, {"value": uniques, "valid": valid})
    if kind == "name":
        # value and other name part share one vocabulary so that given <-> family can be compared as codes
        if f.swap_column:
            (vcode, ocode), vocab = _merge_vocab(_codes(records, f.columns[0], shared),
                                                 _codes(records, f.swap_column, shared))
        else:
            (vcode,), vocab = _merge_vocab(_codes(records, f.columns[0], shared))
            ocode = np.full(len(records), -1, dtype=np.int64)
        kcode, kvocab = _codes(records, f.key_column, shared)
        ktok = _shared(shared, ("tokens", f.key_column), lambda: _token_codes(kvocab))
        pcode, _ = _codes(records, f.phonetic_column, shared)
        # one code per distinct combination of the name columns, shared by the name fields over the same
        # columns (given and family name: the same record tuples, each field reading its own parts)
        cols = tuple(sorted({c for c in (f.columns[0], f.swap_column, f.key_column, f.phonetic_column) if c}))
        tuples, first = _shared(shared, ("rows", cols), lambda: _row_codes(
            np.stack([_codes(records, c, shared)[0] for c in cols], axis=1)))
        codes = np.where(vcode < 0, -1, tuples)
        at = np.stack([vcode, ocode, kcode, pcode], axis=1)[first]
        return _Table(codes, {"vcode": at[:, 0], "ocode": at[:, 1], "kcode": at[:, 2], "pcode": at[:, 3],
                              "vocab": vocab, "kvocab": kvocab, "ktokens": ktok[0], "kntok": ktok[1]})
    if kind == "date":
        cols = [f.columns[0], *(f.range_columns or (None, None))]
        coded = [_codes(records, c, shared) for c in cols]
        codes, first = _row_codes(np.stack([c for c, _ in coded], axis=1))
        d, a, b = (np.append(u, "")[c[first]] for c, u in coded)
        attrs = _date_attrs(d, a, b)
        missing_code = ~attrs["has_date"] & ~attrs["has_range"]
        codes = np.where(missing_code[codes], -1, codes)
        return _Table(codes, attrs)
    # single-value kinds
    codes, uniques = _codes(records, f.columns[0], shared)
    return _Table(codes, {"value": uniques})


def _dates(text: np.ndarray) -> pd.Series:
    """ISO date strings to datetimes (NaT when not a valid date)."""
    return pd.to_datetime(pd.Series(text, dtype=object), format="%Y-%m-%d", errors="coerce")


def _day_number(dt: pd.Series) -> np.ndarray:
    """Datetimes to day numbers since 1970-01-01 (float, NaN for NaT)."""
    return ((dt - pd.Timestamp("1970-01-01")).dt.days).to_numpy(dtype=np.float64, na_value=np.nan)


def _date_attrs(d: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> dict[str, np.ndarray]:
    dt = _dates(d)
    day = _day_number(dt)
    has_date = ~np.isnan(day)
    y, m, dd = (getattr(dt.dt, part).to_numpy(dtype=np.float64, na_value=np.nan) for part in ("year", "month", "day"))
    rlo, rhi = _day_number(_dates(lo)), _day_number(_dates(hi))
    has_range = ~np.isnan(rlo) & ~np.isnan(rhi)
    return {"day": day, "y": y, "m": m, "d": dd, "has_date": has_date,
            "rlo": rlo, "rhi": rhi, "has_range": has_range}


# ---------------------------------------------------------------------------
# scoring distinct code pairs (a <= b, both >= 0)
# ---------------------------------------------------------------------------

def _first_true(conditions: list[np.ndarray], n: int, last: int) -> np.ndarray:
    """Level = 1 + index of the first true condition, else ``last``."""
    out = np.full(n, last, dtype=np.int8)
    done = np.zeros(n, dtype=bool)
    for k, cond in enumerate(conditions):
        take = cond & ~done
        out[take] = k + 1
        done |= take
    return out


def _score_reg_no(t: _Table, f, a, b):
    va, vb = t.attrs["value"][a], t.attrs["value"][b]
    exact = a == b
    near = _osa(va, vb) <= 1
    if "valid" not in t.attrs:
        return _first_true([exact, near], a.size, 3)
    unverified = ~(t.attrs["valid"][a] & t.attrs["valid"][b])
    return _first_true([exact, near, unverified], a.size, 4)


def _score_string(t: _Table, f, a, b):
    va, vb = t.attrs["value"][a], t.attrs["value"][b]
    jw = jaro_winkler(va, vb)
    return _first_true([a == b, jw >= f.high, jw >= f.medium], a.size, 4)


def _score_exact(t: _Table, f, a, b):
    return _first_true([a == b], a.size, 2)


_MARK = "\x01"         # stands between values in the joined text :func:`_words` splits


def _words(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """All whitespace-separated words of the values in order, and the value each belongs to.

    One ``str.split`` over the values joined by a mark word (not per value),
    unless a value is not a str or holds the mark itself.
    """
    joined = f" {_MARK} ".join(values) if pd.api.types.infer_dtype(values, skipna=False) == "string" else None
    if joined is None or joined.count(_MARK) != len(values) - 1:
        split = [v.split() if isinstance(v, str) else [] for v in values]
        counts = np.fromiter(map(len, split), dtype=np.int64, count=len(split))
        words = np.fromiter(chain.from_iterable(split), dtype=object, count=int(counts.sum()))
        return words, np.repeat(np.arange(len(split)), counts)
    words = np.array(joined.split(), dtype=object)
    mark = words == _MARK
    return words[~mark], np.cumsum(mark)[~mark]


def _token_codes(values: np.ndarray, max_tokens: int = 6) -> tuple[np.ndarray, np.ndarray]:
    """Per value: a (n, T) matrix of token codes (-1 = no token) and the token count
    (tokens are the distinct whitespace-separated words, in order; one flat factorization of all tokens)."""
    n = len(values)
    mat = np.full((n, max_tokens), -1, dtype=np.int64)
    if n == 0:
        return mat, np.zeros(0, dtype=np.int64)
    words, owner = _words(np.asarray(values, dtype=object))
    if words.size == 0:
        return mat, np.zeros(n, dtype=np.int64)
    codes = pd.factorize(words)[0].astype(np.int64)
    # drop a word repeated within one value (keep its first place)
    first = np.zeros(words.size, dtype=bool)
    first[np.unique(owner * (int(codes.max()) + 1) + codes, return_index=True)[1]] = True
    owner, codes = owner[first], codes[first]
    counts = np.bincount(owner, minlength=n).astype(np.int64)
    pos = np.arange(owner.size) - np.repeat(np.cumsum(counts) - counts, counts)
    keep = pos < max_tokens
    mat[owner[keep], pos[keep]] = codes[keep]
    return mat, counts


def _jw_codes(vocab: np.ndarray, ca: np.ndarray, cb: np.ndarray) -> np.ndarray:
    """Jaro-Winkler of vocabulary codes (both >= 0), computed once per distinct code pair."""
    if ca.size == 0:
        return np.zeros(0, dtype=np.float64)
    width = np.int64(max(vocab.size, 1))
    inverse, uniq = pd.factorize(np.minimum(ca, cb) * width + np.maximum(ca, cb))
    sim = jaro_winkler(vocab[uniq // width], vocab[uniq % width])
    return sim[inverse]


def _key_subset(at: dict, ka: np.ndarray, kb: np.ndarray) -> np.ndarray:
    """Order-free keys of which one holds every token (at least two) of the other.

    Catches a full name split at the wrong place or a family name part
    dropped ("BAEZ | NUNEZ NICOLAS" / "NICOLAS | BAEZ").
    """
    out = np.zeros(ka.size, dtype=bool)
    idx = np.flatnonzero((ka >= 0) & (kb >= 0) & (ka != kb))
    if idx.size == 0:
        return out
    width = np.int64(max(at["kvocab"].size, 1))
    inverse, uniq = pd.factorize(np.minimum(ka[idx], kb[idx]) * width + np.maximum(ka[idx], kb[idx]))
    x, y = uniq // width, uniq % width
    tok, ntok = at["ktokens"], at["kntok"]
    hit = _holds_tokens(tok, ntok, x, y) | _holds_tokens(tok, ntok, y, x)
    out[idx] = hit[inverse]
    return out


def _holds_tokens(tok: np.ndarray, ntok: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Per pair: key ``y`` holds every token of key ``x``, and ``x`` has at least two
    (tested only where ``x`` has no more tokens than ``y`` -- tokens are distinct within a key, see
    :func:`_token_codes` -- and on as many token columns as the keys use)."""
    out = np.zeros(x.size, dtype=bool)
    nx, ny = ntok[x], ntok[y]
    idx = np.flatnonzero((nx >= 2) & (nx <= ny))
    if idx.size == 0:
        return out
    wx = int(min(nx[idx].max(), tok.shape[1]))
    wy = int(min(ny[idx].max(), tok.shape[1]))
    tx, ty = tok[x[idx], :wx], tok[y[idx], :wy]
    found = (tx[:, :, None] == ty[:, None, :]).any(axis=2) | (tx < 0)
    out[idx] = found.all(axis=1)
    return out


def _share_token(vocab: np.ndarray, xa: np.ndarray, xb: np.ndarray) -> np.ndarray:
    """Per pair of vocabulary codes: the two values share a word, one of them having several
    (tokens taken only of the values these pairs involve)."""
    part = np.zeros(xa.size, dtype=bool)
    if xa.size == 0:
        return part
    inverse, involved = pd.factorize(np.concatenate([xa, xb]))
    tok, ntok = _token_codes(vocab[involved])
    ia, ib = inverse[:xa.size], inverse[xa.size:]
    multi = np.flatnonzero((ntok[ia] > 1) | (ntok[ib] > 1))
    if multi.size:
        w = int(max(ntok[ia[multi]].max(), ntok[ib[multi]].max(), 1))
        ta, tb = tok[ia[multi], :w], tok[ib[multi], :w]
        part[multi] = ((ta[:, :, None] == tb[:, None, :]) & (ta[:, :, None] >= 0)).any(axis=(1, 2))
    return part


def _score_name(t: _Table, f, a, b):
    """Levels tested in order, each only on the pairs no earlier level took (the costly tests last)."""
    at = t.attrs
    n_levels = len(f.levels)
    out = np.full(a.size, n_levels - 1, dtype=np.int8)
    va, vb = at["vcode"][a], at["vcode"][b]
    rest = np.arange(a.size)

    def take(level: int, hit: np.ndarray) -> np.ndarray:
        out[rest[hit]] = level
        return rest[~hit]

    level = 1
    rest = take(level, va == vb)
    jw = _jw_codes(at["vocab"], va[rest], vb[rest])
    level += 1
    high = jw >= f.high
    rest, jw = take(level, high), jw[~high]
    if f.parts:
        level += 1
        part = _share_token(at["vocab"], va[rest], vb[rest])
        rest, jw = take(level, part), jw[~part]
    level += 1
    rest = take(level, jw >= f.medium)
    level += 1
    # a swap: this value equals the other side's other part, and the remaining cross pair is missing
    # or at least medium-similar (one shared word alone is not a swap); or equal order-free keys
    ra, rb = a[rest], b[rest]
    xa, xb = va[rest], vb[rest]
    oa, ob = at["ocode"][ra], at["ocode"][rb]
    ka, kb = at["kcode"][ra], at["kcode"][rb]
    swapped = (ka == kb) & (ka >= 0)
    swapped |= _key_subset(at, ka, kb)
    for hit, x, y in (((xa == ob) & (ob >= 0), oa, xb), ((oa == xb) & (oa >= 0), xa, ob)):
        idx = np.flatnonzero(hit & ~swapped)
        if idx.size:
            xi, yi = x[idx], y[idx]
            ok = (xi < 0) | (yi < 0)
            both = np.flatnonzero(~ok)
            ok[both] = _jw_codes(at["vocab"], xi[both], yi[both]) >= f.medium
            swapped[idx[ok]] = True
    rest = take(level, swapped)
    level += 1
    pa, pb = at["pcode"][a[rest]], at["pcode"][b[rest]]
    take(level, (pa == pb) & (pa >= 0))
    return out


def _score_date(t: _Table, f, a, b):
    at = t.attrs
    ha, hb = at["has_date"][a], at["has_date"][b]
    both = ha & hb
    ya, ma, da = at["y"][a], at["m"][a], at["d"][a]
    yb, mb, db = at["y"][b], at["m"][b], at["d"][b]
    exact = both & (at["day"][a] == at["day"][b])
    swap = both & (ya == yb) & (ma == db) & (da == mb) & (ma != da)
    same = (ya == yb).astype(int) + (ma == mb).astype(int) + (da == db).astype(int)
    one = both & (same == 2)
    within = both & (np.abs(at["day"][a] - at["day"][b]) <= f.days)
    # one side without a date but with an age range
    ra, rb = at["has_range"][a], at["has_range"][b]
    in_a = hb & ~ha & ra & (at["day"][b] >= at["rlo"][a]) & (at["day"][b] <= at["rhi"][a])
    in_b = ha & ~hb & rb & (at["day"][a] >= at["rlo"][b]) & (at["day"][a] <= at["rhi"][b])
    overlap = ~ha & ~hb & ra & rb & (at["rlo"][a] <= at["rhi"][b]) & (at["rlo"][b] <= at["rhi"][a])
    ranged = ~both  # codes >= 0, so each side has a date or a range
    consistent = ranged & (in_a | in_b | overlap)
    inconsistent = ranged & ~consistent
    return _first_true([exact, swap, one, within, consistent, inconsistent], a.size, 7)


_SCORERS = {"reg_no": _score_reg_no, "name": _score_name, "date": _score_date,
            "sex": _score_exact, "string": _score_string, "exact": _score_exact}


# ---------------------------------------------------------------------------
# public
# ---------------------------------------------------------------------------

def _pair_arrays(pairs) -> tuple[np.ndarray, np.ndarray]:
    if isinstance(pairs, pd.DataFrame):
        return pairs["left"].to_numpy(dtype=np.int64), pairs["right"].to_numpy(dtype=np.int64)
    left, right = pairs
    return np.asarray(left, dtype=np.int64), np.asarray(right, dtype=np.int64)


def prepare_fields(records: pd.DataFrame, fields: Sequence[FieldComparison] = DEFAULT_PERSON_FIELDS) -> dict:
    """Per field, the records' value codes and the distinct values' attributes ({field name: table}).

    Computed once per record table and handed to :func:`compare` (``prepared=``)
    when the same records are compared several times (candidate pairs, random
    pairs for u, a reviewer's pairs): explicit state, no hidden cache.
    """
    fields = list(fields)
    _check_fields(records, fields)
    shared: dict = {}
    return {f.name: _prepare(records, f, shared) for f in fields}


def _check_fields(records: pd.DataFrame, fields: list) -> None:
    names = [f.name for f in fields]
    if len(set(names)) != len(names):
        raise ValueError(f"compare: field names must be unique, got {names}")
    need = sorted({c for f in fields for c in f.required_columns()} - set(records.columns))
    if need:
        raise ValueError(f"compare: records lack column(s) {need} named by the field comparisons")


def compare(records: pd.DataFrame, pairs, fields: Sequence[FieldComparison] = DEFAULT_PERSON_FIELDS,
            *, chunk_size: int = 2_000_000, prepared: dict | None = None,
            workers: int | None = None) -> np.ndarray:
    """Comparison level matrix for candidate pairs.

    Parameters
    ----------
    records : DataFrame
        Normalized records holding every column the fields name (an absent
        ``flag_column`` counts as all false).  Addressed by position.
    pairs : DataFrame with ``left``/``right`` or a (left, right) tuple of arrays
        Integer positions into ``records``.
    fields : sequence of FieldComparison
    chunk_size : int
        Pairs handled at a time: memory grows with it, not with the pair count.
    prepared : dict, optional
        :func:`prepare_fields` of these records and fields (computed when None).
    workers : int, optional
        Threads comparing fields side by side (default: the machine's cores);
        the result does not depend on it.

    Returns
    -------
    ndarray of int8, shape (n_pairs, n_fields); level 0 = missing.
    """
    fields = list(fields)
    workers = (os.cpu_count() or 1) if workers is None else int(workers)
    if prepared is None:
        prepared = prepare_fields(records, fields)
    left, right = _pair_arrays(pairs)
    n_pairs = left.size
    n = len(records)
    if n_pairs and (min(left.min(), right.min()) < 0 or max(left.max(), right.max()) >= n):
        raise ValueError(f"compare: pair positions must lie in 0..{n - 1}")
    out = np.zeros((n_pairs, len(fields)), dtype=np.int8)
    step = max(int(chunk_size), 1)

    def one_field(j: int) -> None:
        f = fields[j]
        table = prepared[f.name]
        codes = table.codes
        width = np.int64(max(int(codes.max()) + 1, 1)) if codes.size else np.int64(1)
        for s in range(0, n_pairs, step):
            ca, cb = codes[left[s:s + step]], codes[right[s:s + step]]
            lo, hi = np.minimum(ca, cb), np.maximum(ca, cb)
            key = lo * width + hi
            key[lo < 0] = -1
            # each distinct value pair of the chunk is scored once (hash factorization, no sort)
            kcodes, uniq = pd.factorize(key, use_na_sentinel=False)
            uniq = np.asarray(uniq, dtype=np.int64)
            levels = np.zeros(uniq.size, dtype=np.int8)
            ok = uniq >= 0
            if ok.any():
                levels[ok] = _SCORERS[f.kind](table, f, uniq[ok] // width, uniq[ok] % width)
            out[s:s + step, j] = levels[kcodes]

    # fields are independent (each writes its own column of ``out``): run them on the cores
    if workers > 1 and len(fields) > 1 and n_pairs >= 50_000:
        with ThreadPoolExecutor(max_workers=workers) as pool:
            list(pool.map(one_field, range(len(fields))))
    else:
        for j in range(len(fields)):
            one_field(j)
    return out


def level_frame(levels: np.ndarray, fields: Sequence[FieldComparison]) -> pd.DataFrame:
    """The level matrix as a frame of level names (for reading, not for hot paths)."""
    cols = {}
    for j, f in enumerate(fields):
        cols[f.name] = pd.Categorical.from_codes(levels[:, j].astype(np.int64), categories=list(f.levels))
    return pd.DataFrame(cols)
