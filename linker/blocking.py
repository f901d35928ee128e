"""Candidate pairs from the union of blocking rules.

A blocking rule names record pairs worth comparing.  Three kinds:

``exact``
    Records whose values agree on every listed column (``reg_no``;
    ``family_soundex`` + ``birth_year``; ``given_key`` + ``birth_date``).  A
    record missing any listed value takes no part in the rule.
``near_id``
    Records whose identifier (one column) is equal or one digit substitution
    or one adjacent transposition away.  Each distinct identifier emits
    variant keys: ``12?45678`` (position masked, one per position) for
    substitutions and ``12<34>5678`` (an adjacent pair put in sorted order) for
    transpositions.  Two different identifiers share a variant key exactly when
    they are one such edit apart, so the keys are joined, never all pairs.
    Different lengths (a dropped digit) are left to the comparison stage.
``sorted_window``
    Records sorted by one key column (ties in record order); each record is
    paired with the ``window - 1`` records after it.  The window bounds the
    work, so ``cap`` does not apply to this kind.

Every join runs on integer codes (:func:`pandas.factorize`) with numpy sorts and
group boundaries.  A block (the records sharing a key) larger than the rule's
``cap`` is not expanded into pairs; it is reported with its rule, key and size
and announced by an :class:`OversizedBlockWarning` that names the rule and the
size only (key values are personal data and stay out of messages).

Positions: ``left`` and ``right`` are integer positions (0-based) into the
records frame given to :func:`block`; the frame's index is not used.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

__all__ = [
    "BlockRule",
    "OversizedBlockWarning",
    "DEFAULT_PERSON_RULES",
    "block",
    "rule_mask",
    "reduction_ratio",
    "pair_completeness",
]

KINDS = ("exact", "near_id", "sorted_window")


class OversizedBlockWarning(UserWarning):
    """A block exceeded its rule's cap and was left unexpanded (see the capped report)."""


@dataclass(frozen=True)
class BlockRule:
    """One blocking rule.

    Parameters
    ----------
    name : str
        Label used in reports and in :func:`rule_mask`.
    kind : {"exact", "near_id", "sorted_window"}
    columns : tuple of str
        Columns the key is built from (``near_id`` and ``sorted_window`` take one).
    window : int, optional
        Window size for ``sorted_window`` (>= 2).
    cap : int or None
        Largest block (in records) that is expanded into pairs; None = no cap.
    """

    name: str
    kind: str
    columns: tuple[str, ...]
    window: int | None = None
    cap: int | None = 1000

    def __post_init__(self):
        if isinstance(self.columns, str):
            object.__setattr__(self, "columns", (self.columns,))
        else:
            object.__setattr__(self, "columns", tuple(self.columns))
        if self.kind not in KINDS:
            raise ValueError(f"BlockRule {self.name!r}: kind must be one of {KINDS}, got {self.kind!r}")
        if not self.columns:
            raise ValueError(f"BlockRule {self.name!r}: columns must name at least one column")
        if self.kind in ("near_id", "sorted_window") and len(self.columns) != 1:
            raise ValueError(f"BlockRule {self.name!r}: kind {self.kind!r} takes exactly one column, "
                             f"got {len(self.columns)}")
        if self.kind == "sorted_window" and (self.window is None or int(self.window) < 2):
            raise ValueError(f"BlockRule {self.name!r}: sorted_window needs window >= 2, got {self.window!r}")
        if self.cap is not None and int(self.cap) < 2:
            raise ValueError(f"BlockRule {self.name!r}: cap must be >= 2 or None, got {self.cap!r}")


# Person records: identifiers, phonetic family and given names with birth year,
# given name with birth date, and a sorted window over the order-free name key.
# (Soundex of the family name and the year alone makes blocks that grow with the
# register: pairs rise with the square of its size.)
DEFAULT_PERSON_RULES = (
    BlockRule("reg_no", "exact", ("reg_no",), cap=50),
    BlockRule("reg_no_near", "near_id", ("reg_no",), cap=50),
    BlockRule("names_sx_year", "exact", ("family_soundex", "given_soundex", "birth_year"), cap=500),
    BlockRule("given_dob", "exact", ("given_key", "birth_date"), cap=500),
    BlockRule("name_window", "sorted_window", ("name_key",), window=5),
)


def _merge_sorted(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Sorted union of two sorted arrays without common values (stable sort merges the two runs)."""
    out = np.concatenate([a, b])
    out.sort(kind="stable")
    return out


def _unique(x: np.ndarray) -> np.ndarray:
    """Sorted distinct values by sorting (numpy 2's hash-based ``np.unique`` is far slower on int64 keys)."""
    x = np.sort(np.asarray(x).ravel())
    if x.size == 0:
        return x
    return x[np.concatenate(([True], x[1:] != x[:-1]))]


# ---------------------------------------------------------------------------
# integer-coded keys
# ---------------------------------------------------------------------------

def _column_codes(values: pd.Series, sort: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Codes for one column (-1 = missing: NA or empty text; text is stripped) and the distinct values
    (in first-seen order, or sorted with ``sort``).  The text is cleaned once per distinct value."""
    codes, uniques = pd.factorize(pd.Series(values).reset_index(drop=True), use_na_sentinel=True)
    u = pd.Series(uniques)
    if u.dtype == object or pd.api.types.is_string_dtype(u.dtype):
        u = u.astype(object).astype(str).str.strip()
        u = u.where(u != "", None)
    ucodes, clean = pd.factorize(u, sort=sort, use_na_sentinel=True)   # values equal once stripped merge
    return np.append(ucodes.astype(np.int64), -1)[codes], np.asarray(clean, dtype=object)


def _combine_codes(code_list: list[np.ndarray]) -> np.ndarray:
    """One code per record for a tuple of column codes (-1 if any part is missing)."""
    key = code_list[0].copy()
    for c in code_list[1:]:
        missing = (key < 0) | (c < 0)
        width = int(c.max()) + 1 if c.size else 1
        key = key * max(width, 1) + c
        key[missing] = -1
        key = pd.factorize(key, use_na_sentinel=True)[0].astype(np.int64)
        key[missing] = -1
    return key


def _key_text(records: pd.DataFrame, columns: Sequence[str], position: int) -> str:
    """The key of a block as text (for the capped report), from one member record."""
    parts = [str(records[c].iloc[position]) for c in columns]
    return "|".join(parts)


# ---------------------------------------------------------------------------
# pair expansion (pure numpy)
# ---------------------------------------------------------------------------

def _groups(codes: np.ndarray):
    """Members sorted by group, with group codes, starts and sizes (missing codes dropped)."""
    members = np.flatnonzero(codes >= 0)
    order = members[np.argsort(codes[members], kind="stable")]
    sorted_codes = codes[order]
    if sorted_codes.size == 0:
        empty = np.zeros(0, dtype=np.int64)
        return order, empty, empty, empty
    boundary = np.flatnonzero(np.diff(sorted_codes)) + 1
    starts = np.concatenate(([0], boundary)).astype(np.int64)
    sizes = np.diff(np.concatenate((starts, [sorted_codes.size]))).astype(np.int64)
    return order, sorted_codes[starts], starts, sizes


def _pairs_within(order: np.ndarray, starts: np.ndarray, sizes: np.ndarray):
    """All pairs inside each group: (a, b) item ids, a before b in ``order``."""
    keep = sizes >= 2
    starts, sizes = starts[keep], sizes[keep]
    if starts.size == 0:
        e = np.zeros(0, dtype=np.int64)
        return e, e
    # every sorted slot q of a group of size s, with offset k, pairs with the s-1-k slots after it
    slot_group = np.repeat(np.arange(starts.size), sizes)
    slots = np.repeat(starts, sizes) + (np.arange(slot_group.size) - np.repeat(np.cumsum(sizes) - sizes, sizes))
    offset = slots - starts[slot_group]
    partners = sizes[slot_group] - 1 - offset
    left_slot = np.repeat(slots, partners)
    total = int(partners.sum())
    run_start = np.repeat(np.cumsum(partners) - partners, partners)
    right_slot = left_slot + 1 + (np.arange(total, dtype=np.int64) - run_start)
    return order[left_slot], order[right_slot]


def _cross_pairs(order, starts, sizes, ga: np.ndarray, gb: np.ndarray):
    """All record pairs between group ``ga[k]`` and group ``gb[k]`` (groups indexed by position)."""
    na, nb = sizes[ga], sizes[gb]
    counts = na * nb
    total = int(counts.sum())
    if total == 0:
        e = np.zeros(0, dtype=np.int64)
        return e, e
    pair_of = np.repeat(np.arange(ga.size), counts)
    t = np.arange(total, dtype=np.int64) - np.repeat(np.cumsum(counts) - counts, counts)
    nb_rep = nb[pair_of]
    left = order[starts[ga][pair_of] + t // nb_rep]
    right = order[starts[gb][pair_of] + t % nb_rep]
    return left, right


# ---------------------------------------------------------------------------
# rule kinds
# ---------------------------------------------------------------------------

def _capped_rows(rule: BlockRule, keys: list[str], sizes: np.ndarray) -> list[dict]:
    return [{"rule": rule.name, "key": k, "size": int(s)} for k, s in zip(keys, sizes)]


def _exact_rule(records: pd.DataFrame, rule: BlockRule):
    codes = _combine_codes([_column_codes(records[c])[0] for c in rule.columns])
    order, _, starts, sizes = _groups(codes)
    capped = []
    if rule.cap is not None:
        over = sizes > rule.cap
        if over.any():
            keys = [_key_text(records, rule.columns, int(order[s])) for s in starts[over]]
            capped = _capped_rows(rule, keys, sizes[over])
            starts, sizes = starts[~over], sizes[~over]
    left, right = _pairs_within(order, starts, sizes)
    return left, right, capped


def _variant_keys(ids: np.ndarray):
    """Substitution and transposition variant keys of distinct ids.

    Returns (owner, key): ``owner[k]`` is the index into ``ids`` of the id that
    emitted key text ``key[k]``.  Built per id length on character matrices.
    """
    owners, keys = [], []
    ids = np.asarray(ids, dtype=object)
    lengths = pd.Series(ids, dtype=object).str.len().to_numpy(dtype=np.int64)
    for length in np.unique(lengths):
        if length == 0:
            continue
        idx = np.flatnonzero(lengths == length)
        mat = np.asarray(ids[idx].astype(str), dtype=f"<U{length}").view("<U1").reshape(idx.size, length)
        for p in range(length):
            masked = mat.copy()
            masked[:, p] = "?"
            owners.append(idx)
            keys.append(_join_rows(masked))
        for p in range(length - 1):
            a, b = mat[:, p], mat[:, p + 1]
            differ = a != b
            if not differ.any():
                continue
            sub = mat[differ]
            marked = np.empty((sub.shape[0], length + 2), dtype="<U1")
            marked[:, :p] = sub[:, :p]
            marked[:, p] = "<"
            a_d, b_d = a[differ], b[differ]
            swap = a_d > b_d
            marked[:, p + 1] = np.where(swap, b_d, a_d)
            marked[:, p + 2] = np.where(swap, a_d, b_d)
            marked[:, p + 3] = ">"
            marked[:, p + 4:] = sub[:, p + 2:]
            owners.append(idx[differ])
            keys.append(_join_rows(marked))
    if not owners:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=object)
    return np.concatenate(owners), np.concatenate(keys)


def _variant_codes(ids: np.ndarray):
    """Variant groups of distinct ids: (owner, code, text).

    ``owner[k]`` is the index into ``ids`` of the id that emitted variant ``k``
    and ``code[k]`` its group (ids sharing a code are one substitution or one
    adjacent transposition apart), codes in first-seen order as
    :func:`_variant_keys` would give.  Ids of only digits (up to 16) are worked
    as integers (no strings built); others through :func:`_variant_keys`.
    ``text(k)`` gives the key text of variant ``k`` (for the capped-block report).
    """
    ids = np.asarray(ids, dtype=object).astype(str).astype(object)
    lengths = pd.Series(ids, dtype=object).str.len().to_numpy(dtype=np.int64)
    digit = pd.Series(ids, dtype=object).str.fullmatch(r"[0-9]+").to_numpy(dtype=bool)
    owners, codes, tags = [], [], []
    offset = 0
    for length in np.unique(lengths):
        if length == 0:
            continue
        idx = np.flatnonzero(lengths == length)
        if length <= 16 and digit[idx].all():
            num = ids[idx].astype(np.int64)
            place = 10 ** np.arange(length - 1, -1, -1, dtype=np.int64)          # left to right
            dig = (num[:, None] // place[None, :]) % 10
            own, keys, tag = [], [], []
            for p in range(length):
                own.append(idx)
                keys.append((num - dig[:, p] * place[p]) * 32 + p)
                tag.append(np.full(idx.size, p, dtype=np.int64))
            for p in range(length - 1):
                a, b = dig[:, p], dig[:, p + 1]
                differ = a != b
                if not differ.any():
                    continue
                lo, hi = np.minimum(a, b)[differ], np.maximum(a, b)[differ]
                canon = (num[differ] - a[differ] * place[p] - b[differ] * place[p + 1]
                         + lo * place[p] + hi * place[p + 1])
                own.append(idx[differ])
                keys.append(canon * 32 + 16 + p)
                tag.append(np.full(int(differ.sum()), 16 + p, dtype=np.int64))
            key = np.concatenate(keys)
            owner_g, tag_g = np.concatenate(own), np.concatenate(tag)
        else:
            owner_local, key = _variant_keys(ids[idx])
            owner_g, tag_g = idx[owner_local], np.full(owner_local.size, -1, dtype=np.int64)
            key = np.asarray(key, dtype=object)
            texts_g = key
        c, u = pd.factorize(key)
        owners.append(owner_g)
        codes.append(c.astype(np.int64) + offset)
        tags.append((tag_g, texts_g if tag_g.size and tag_g[0] < 0 else None))
        offset += len(u)
    if not owners:
        e = np.zeros(0, dtype=np.int64)
        return e, e, lambda k: ""
    owner = np.concatenate(owners)
    code = np.concatenate(codes)
    tag = np.concatenate([t for t, _ in tags])
    bounds = np.cumsum([o.size for o in owners])

    def text(k: int) -> str:
        g = int(np.searchsorted(bounds, k, side="right"))
        t, strings = tags[g]
        if strings is not None:
            return str(strings[k - (bounds[g - 1] if g else 0)])
        v, p = str(ids[owner[k]]), int(tag[k])
        if p < 16:
            return v[:p] + "?" + v[p + 1:]
        p -= 16
        x, y = sorted((v[p], v[p + 1]))
        return v[:p] + "<" + x + y + ">" + v[p + 2:]

    return owner, code, text


def _join_rows(mat: np.ndarray) -> np.ndarray:
    """Join the characters of each row of a 2-d ``<U1`` array into one string (object array)."""
    if mat.shape[1] == 0:
        return np.full(mat.shape[0], "", dtype=object)
    joined = np.ascontiguousarray(mat).view(f"<U{mat.shape[1]}").ravel()
    return joined.astype(object)


def _near_id_rule(records: pd.DataFrame, rule: BlockRule):
    col = rule.columns[0]
    rec_codes, ids = _column_codes(records[col])
    order, gcodes, starts, sizes = _groups(rec_codes)
    # group position of each distinct id (every distinct id has at least one record)
    pos_of_id = np.full(ids.size, -1, dtype=np.int64)
    pos_of_id[gcodes] = np.arange(gcodes.size)
    capped = []

    # identical ids: pairs within the id's own block
    same_sizes = sizes.copy()
    if rule.cap is not None:
        over = same_sizes > rule.cap
        if over.any():
            capped += _capped_rows(rule, [str(ids[c]) for c in gcodes[over]], same_sizes[over])
            same_sizes[over] = 0
    l_same, r_same = _pairs_within(order, starts, same_sizes)

    # distinct ids one edit apart: join the variant keys
    owner, vcodes, vtext = _variant_codes(ids)
    vorder, vgcodes, vstarts, vsizes = _groups(vcodes)
    if rule.cap is not None and vsizes.size:
        # block size in records = records holding any id of the variant group
        rec_per_id = sizes[pos_of_id[owner[vorder]]]
        rec_sum = np.add.reduceat(rec_per_id, vstarts) if vorder.size else np.zeros(0, dtype=np.int64)
        over = (rec_sum > rule.cap) & (vsizes >= 2)
        if over.any():
            capped += _capped_rows(rule, [vtext(int(vorder[st])) for st in vstarts[over]], rec_sum[over])
            vsizes = np.where(over, 0, vsizes)
    a_items, b_items = _pairs_within(vorder, vstarts, vsizes)
    ida, idb = owner[a_items], owner[b_items]
    l_near, r_near = _cross_pairs(order, starts, sizes, pos_of_id[ida], pos_of_id[idb])
    return np.concatenate([l_same, l_near]), np.concatenate([r_same, r_near]), capped


def _window_rule(records: pd.DataFrame, rule: BlockRule):
    codes, _ = _column_codes(records[rule.columns[0]], sort=True)
    members = np.flatnonzero(codes >= 0)
    order = members[np.argsort(codes[members], kind="stable")]
    lefts, rights = [], []
    for d in range(1, int(rule.window)):
        if d >= order.size:
            break
        lefts.append(order[:-d])
        rights.append(order[d:])
    if not lefts:
        e = np.zeros(0, dtype=np.int64)
        return e, e, []
    return np.concatenate(lefts), np.concatenate(rights), []


_RUNNERS = {"exact": _exact_rule, "near_id": _near_id_rule, "sorted_window": _window_rule}


# ---------------------------------------------------------------------------
# public
# ---------------------------------------------------------------------------

def _canonical(left: np.ndarray, right: np.ndarray):
    left = np.asarray(left, dtype=np.int64)
    right = np.asarray(right, dtype=np.int64)
    lo, hi = np.minimum(left, right), np.maximum(left, right)
    keep = lo != hi
    return lo[keep], hi[keep]


def block(records: pd.DataFrame, rules: Sequence[BlockRule], *, return_capped: bool = False):
    """Candidate pairs from the union of ``rules``.

    Parameters
    ----------
    records : DataFrame
        Normalized records; must hold every column the rules name.  Rows are
        addressed by position; the index is ignored.
    rules : sequence of BlockRule
        At most 63 rules; names must be unique.
    return_capped : bool
        Also return the capped-block detail frame.

    Returns
    -------
    pairs : DataFrame
        ``left``, ``right`` (int64 positions, left < right, unique, sorted) and
        ``rules`` (int64 bitmask: bit k set when ``rules[k]`` produced the pair).
    report : DataFrame
        One row per rule: ``rule``, ``kind``, ``pairs`` (pairs the rule produced),
        ``new_pairs`` (not produced by an earlier rule), ``capped_blocks``,
        ``capped_records``; then a ``(union)`` row.
    capped : DataFrame, only with ``return_capped``
        ``rule``, ``key``, ``size`` of every block left unexpanded.
    """
    rules = list(rules)
    names = [r.name for r in rules]
    if len(set(names)) != len(names):
        raise ValueError(f"block: rule names must be unique, got {names}")
    if len(rules) > 63:
        raise ValueError(f"block: at most 63 rules, got {len(rules)}")
    missing = sorted({c for r in rules for c in r.columns} - set(records.columns))
    if missing:
        raise ValueError(f"block: records lack column(s) {missing} named by the rules")
    n = len(records)
    keys, rows, capped_all = [], [], []
    seen = np.zeros(0, dtype=np.int64)
    for k, rule in enumerate(rules):
        left, right, capped = _RUNNERS[rule.kind](records, rule)
        lo, hi = _canonical(left, right)
        key = _unique(lo * n + hi)
        new = key[~np.isin(key, seen, assume_unique=True)] if seen.size else key
        seen = _merge_sorted(seen, new)
        keys.append(key)
        rows.append({"rule": rule.name, "kind": rule.kind, "pairs": int(key.size), "new_pairs": int(new.size),
                     "capped_blocks": len(capped), "capped_records": int(sum(c["size"] for c in capped))})
        capped_all += capped
        if capped:
            warnings.warn(OversizedBlockWarning(
                f"blocking rule {rule.name!r}: {len(capped)} block(s) over the cap of {rule.cap} records "
                f"left unexpanded (largest {max(c['size'] for c in capped)} records)"), stacklevel=2)
    uniq = seen
    mask = np.zeros(uniq.size, dtype=np.int64)
    for k, key in enumerate(keys):
        mask[np.searchsorted(uniq, key)] |= np.int64(1 << k)
    pairs = pd.DataFrame({"left": uniq // max(n, 1), "right": uniq % max(n, 1), "rules": mask})
    rows.append({"rule": "(union)", "kind": "", "pairs": int(uniq.size), "new_pairs": int(uniq.size),
                 "capped_blocks": sum(r["capped_blocks"] for r in rows),
                 "capped_records": sum(r["capped_records"] for r in rows)})
    report = pd.DataFrame(rows, columns=["rule", "kind", "pairs", "new_pairs", "capped_blocks", "capped_records"])
    if return_capped:
        capped_df = pd.DataFrame(capped_all, columns=["rule", "key", "size"])
        return pairs, report, capped_df
    return pairs, report


def rule_mask(pairs: pd.DataFrame, rules: Sequence[BlockRule], name: str) -> np.ndarray:
    """Boolean array: which pairs the rule called ``name`` produced."""
    names = [r.name for r in rules]
    if name not in names:
        raise ValueError(f"rule_mask: no rule named {name!r}; rules are {names}")
    bit = 1 << names.index(name)
    return (pairs["rules"].to_numpy(dtype=np.int64) & bit) != 0


def reduction_ratio(n_pairs: int, n_records: int) -> float:
    """1 - candidate pairs / all n(n-1)/2 pairs (common practice; Christen 2012)."""
    total = n_records * (n_records - 1) / 2
    if total <= 0:
        return 0.0
    return 1.0 - n_pairs / total


def _true_pair_count(truth: np.ndarray) -> int:
    _, counts = np.unique(truth, return_counts=True)
    return int((counts * (counts - 1) // 2).sum())


def pair_completeness(pairs: pd.DataFrame, truth_ids, rules: Sequence[BlockRule] | None = None):
    """Share of true matching pairs among the candidates.

    ``truth_ids`` holds one entity label per record (by position).  Without
    ``rules`` returns one float for all pairs; with ``rules`` returns a
    DataFrame with ``rule``, ``pairs``, ``true_pairs``, ``pair_completeness``
    and ``reduction_ratio`` per rule and for the union.
    """
    truth = pd.factorize(pd.Series(np.asarray(truth_ids)))[0]
    n_true = _true_pair_count(truth)
    left = pairs["left"].to_numpy(dtype=np.int64)
    right = pairs["right"].to_numpy(dtype=np.int64)
    hit = truth[left] == truth[right]

    def pc(mask):
        return float(hit[mask].sum() / n_true) if n_true else 1.0

    if rules is None:
        return pc(np.ones(hit.size, dtype=bool))
    rows = []
    n = truth.size
    for r in list(rules):
        m = rule_mask(pairs, rules, r.name)
        rows.append({"rule": r.name, "pairs": int(m.sum()), "true_pairs": int(hit[m].sum()),
                     "pair_completeness": pc(m), "reduction_ratio": reduction_ratio(int(m.sum()), n)})
    rows.append({"rule": "(union)", "pairs": int(hit.size), "true_pairs": int(hit.sum()),
                 "pair_completeness": pc(np.ones(hit.size, dtype=bool)),
                 "reduction_ratio": reduction_ratio(int(hit.size), n)})
    return pd.DataFrame(rows)
