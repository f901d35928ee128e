"""Normalize stage: raw person-records (cell values as delivered) -> the record table.

Pandas in, pandas out.  Every column is factorized once over the whole
delivery (cells told apart by type and value, so ``1``, ``1.0`` and ``True``
stay three values); the normalizers of :mod:`linker.normalize` run once per
distinct value, or once per distinct (sheet setting, value) pair where a
sheet setting matters (date order, full-name order, sex codes), and the
results are taken back by the codes.  A column of 200,000 cells with 3,000
distinct values costs 3,000 calls.  Where the distinct values themselves are
many, the work is split further:

* registration numbers: the steps of :func:`linker.normalize.normalize_reg_no`
  run column-wise over the distinct texts and numbers (the clean common forms
  -- digits, a known prefix, separators -- recognised in one pass), with the
  check digits in numpy; the values those steps do not settle (non-ASCII
  text, leftover letters, unusual cell types) go through
  ``normalize_reg_no`` itself;
* names: each distinct word of the name cells is folded once (folding works
  character by character, never across whitespace), full names are split per
  distinct text, and only the order-free name key is built per distinct
  (given, family) pair;
* dates written plainly as ISO ``YYYY-MM-DD`` and whole-month age ranges are
  checked and worked in numpy.

Per-field notes are columns joined column-wise, in the order of the fields.
Records come out sheet by sheet (in the order the sheets first appear), each
sheet's rows in their input order.
"""

from __future__ import annotations

import datetime as dt
import json
import re

import numpy as np
import pandas as pd

from .config import LinkConfig
from .ingest import cell_text
from .normalize import (_DAMM, _FLOAT_TEXT, _LARGEST_EXACT_FLOAT, _NAME_PLACEHOLDERS, _PARTICLE_TOKENS,
                        _PLACEHOLDERS, _SCIENTIFIC, _VERHOEFF_D, _VERHOEFF_P, IdScheme, _key,
                        _order_free_key, _soundex, _split_tokens, _whole, age_to_birth_range, fold_text,
                        infer_date_order, normalize_name, normalize_reg_no, normalize_sex, parse_age,
                        parse_date)
from .schema import DATE_FIELDS, RECORD_COLUMNS

_CELL_FIELDS = ("reg_no", "given_name", "family_name", "full_name", "birth_date", "age", "sex",
                *DATE_FIELDS[1:], "location", "status")
_PROVENANCE_COLUMNS = ("record_id", "row_key", "source_file", "sheet", "row", "slot", "extras")
_SHARED_NOTE = "reg_no: the row shows this number for another person too"


# ---------------------------------------------------------------------------
# Distinct values and broadcasting
# ---------------------------------------------------------------------------

def _objects(items, count: int) -> np.ndarray:
    """A 1-d object array of ``count`` items (tuples stay single elements)."""
    return np.fromiter(items, dtype=object, count=count)


def _each(fn, values) -> np.ndarray:
    """``fn`` of every value, as an object array."""
    return _objects((fn(v) for v in values), len(values))


def _attr(items: np.ndarray, name: str) -> np.ndarray:
    return _objects((getattr(x, name) for x in items), len(items))


def _types(values: np.ndarray) -> np.ndarray:
    return np.fromiter(map(type, values), dtype=object, count=len(values))


def _dict_codes(keys: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Codes of ``values`` by Python equality of their ``keys`` (a dict); unhashable keys
    are each their own value.  Uniques are the first value of each key."""
    seen: dict = {}
    first: list = []
    codes = np.empty(len(values), dtype=np.intp)
    for i, key in enumerate(keys):
        try:
            c = seen.get(key)
            if c is None:
                c = seen[key] = len(first)
                first.append(i)
        except TypeError:
            c = len(first)
            first.append(i)
        codes[i] = c
    return codes, values[np.array(first, dtype=np.intp)]


def _distinct(column: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """``(codes, uniques)`` of a column of cell values, told apart by type name and value.

    ``uniques[codes]`` gives back the cells as ``column.tolist()`` has them
    (each equal to its first occurrence and of the same type), so a function
    of one cell applied to ``uniques`` and taken by ``codes`` is that function
    applied cell by cell.
    """
    dtype = column.dtype
    if isinstance(dtype, np.dtype) and dtype.kind in "biuf":
        codes, uniq = pd.factorize(column.to_numpy(), use_na_sentinel=False)
        return codes.astype(np.intp, copy=False), _objects(uniq.tolist(), len(uniq))
    if dtype == object:
        values = column.to_numpy()
    else:
        values = _objects(column.tolist(), len(column))
    n = len(values)
    if not n:
        return np.empty(0, dtype=np.intp), np.empty(0, dtype=object)
    types = _types(values)
    is_str = types == str
    if is_str.all():
        codes, uniq = pd.factorize(values)
        return codes.astype(np.intp, copy=False), uniq
    is_float = types == float
    other = np.flatnonzero(~(is_str | is_float))
    if len(other) and {t.__name__ for t in set(types[other])} & {"str", "float"}:
        return _dict_codes(_objects(((type(v).__name__, v) for v in values), n), values)
    codes = np.empty(n, dtype=np.intp)
    parts: list[np.ndarray] = []
    offset = 0
    for kind, idx in (("str", np.flatnonzero(is_str)), ("float", np.flatnonzero(is_float)),
                      ("other", other)):
        if not len(idx):
            continue
        sub = values[idx]
        if kind == "str":
            local, uniq = pd.factorize(sub)
        elif kind == "float":
            local, fu = pd.factorize(sub.astype(float), use_na_sentinel=False)
            uniq = _objects(fu.tolist(), len(fu))
        else:                                   # keyed by type name and value
            local, uniq = _dict_codes(_objects(((type(v).__name__, v) for v in sub), len(sub)), sub)
        codes[idx] = local + offset
        parts.append(uniq)
        offset += len(uniq)
    return codes, np.concatenate(parts)


def _pairs(setting: np.ndarray, codes: np.ndarray, size: int):
    """Distinct (setting, code) pairs: ``(pair codes, setting per pair, code per pair)``."""
    key = setting.astype(np.int64) * max(size, 1) + codes
    pair_codes, pairs = pd.factorize(key)
    return pair_codes.astype(np.intp, copy=False), pairs // max(size, 1), pairs % max(size, 1)


def _cell_texts(values: np.ndarray) -> np.ndarray:
    """:func:`linker.ingest.cell_text` of every value (text cells: stripped)."""
    out = np.empty(len(values), dtype=object)
    is_str = _types(values) == str
    out[is_str] = _objects((v.strip() for v in values[is_str]), int(is_str.sum()))
    out[~is_str] = _each(cell_text, values[~is_str])
    return out


def _is_blank(v) -> bool:
    return v is None or (isinstance(v, float) and v != v) or (isinstance(v, str) and not v.strip())


def _join_notes(columns, n: int) -> np.ndarray:
    """Per-row ``"; "``-joined notes from ``(note per distinct value, codes)`` columns, in order."""
    acc = np.full(n, "", dtype=object)
    have = np.zeros(n, dtype=bool)
    for note_u, codes in columns:
        has_u = note_u != ""
        if not has_u.any():
            continue
        rows = np.flatnonzero(has_u[codes])
        add = note_u[codes[rows]]
        acc[rows] = np.where(have[rows], acc[rows] + "; " + add, add)
        have[rows] = True
    return acc


# ---------------------------------------------------------------------------
# Registration numbers, column-wise
# ---------------------------------------------------------------------------

_DAMM_T = np.array(_DAMM, dtype=np.int8)
_VERHOEFF_DT = np.array(_VERHOEFF_D, dtype=np.int8)
_VERHOEFF_PT = np.array(_VERHOEFF_P, dtype=np.int8)


def _check_digits_valid(d: np.ndarray, algorithm: str) -> np.ndarray:
    """``check_digit_valid`` of each row of a (numbers, digits) matrix of digit values."""
    m, width = d.shape
    if algorithm == "none" or m == 0:
        return np.ones(m, dtype=bool)
    if algorithm == "luhn":
        rev = d[:, ::-1].astype(np.int64)
        doubled = rev[:, 1::2] * 2
        doubled -= 9 * (doubled > 9)
        return (rev[:, 0::2].sum(axis=1) + doubled.sum(axis=1)) % 10 == 0
    c = np.zeros(m, dtype=np.intp)
    if algorithm == "verhoeff":
        for i in range(width):
            c = _VERHOEFF_DT[c, _VERHOEFF_PT[i % 8, d[:, width - 1 - i]]]
        return c == 0
    for i in range(width):                      # damm
        c = _DAMM_T[c, d[:, i]]
    return c == 0


def _reg_from_digits_cols(digits: np.ndarray, numeric: np.ndarray, scheme: IdScheme):
    """``_reg_from_digits`` (no earlier notes) over non-empty ASCII digit strings.

    Returns (reg_no, status, note) object arrays.
    """
    m = len(digits)
    want, algorithm = scheme.digits, scheme.check_digit
    reg = digits.copy()
    status = np.full(m, "", dtype=object)
    note = np.full(m, "", dtype=object)
    if m == 0:
        return reg, status, note
    lens = np.fromiter(map(len, digits), dtype=np.int64, count=m)
    buf = np.frombuffer("".join(digits).encode("ascii"), dtype=np.uint8)
    starts = np.cumsum(lens) - lens
    zeros = np.add.reduceat(buf != 48, starts) == 0
    short = ~zeros & (lens < want)
    long_ = ~zeros & (lens > want)
    exact = ~zeros & (lens == want)
    cand = np.flatnonzero(exact | (short & (numeric | (algorithm != "none"))))
    ok = np.zeros(m, dtype=bool)
    if len(cand):                                # digits right-aligned, zero-padded on the left
        col = np.arange(want)
        pad = (want - lens[cand])[:, None]
        inside = col >= pad
        src = np.where(inside, starts[cand][:, None] + col - pad, 0)
        ok[cand] = _check_digits_valid(np.where(inside, buf[src] - 48, 0).astype(np.int8), algorithm)

    status[zeros] = "invalid"
    reg[zeros] = ""
    note[zeros] = "all zeros"
    wi = np.flatnonzero(long_ | (short & ~numeric & ~ok))
    status[wi] = "wrong_length"
    note[wi] = _objects((f"{k} digits, expected {want}" for k in lens[wi].tolist()), len(wi))
    restored = short & (numeric | ok)
    ri = np.flatnonzero(restored)
    reg[ri] = _objects((x.zfill(want) for x in digits[ri]), len(ri))
    failed = f"{algorithm} check digit does not match"
    status[restored & ok] = "valid"
    note[restored & ok] = "leading zeros restored"
    status[restored & ~ok] = "check_failed"
    note[restored & ~ok] = "leading zeros restored; " + failed
    status[exact & ok] = "valid"
    status[exact & ~ok] = "check_failed"
    note[exact & ~ok] = failed
    return reg, status, note


def _segments(texts: np.ndarray):
    """The bytes of non-empty ASCII texts end to end: (bytes, lengths, starts, text of each byte,
    position of each byte in its text)."""
    lens = np.fromiter(map(len, texts), dtype=np.int64, count=len(texts))
    buf = np.frombuffer("".join(texts).encode("ascii"), dtype=np.uint8)
    starts = np.cumsum(lens) - lens
    owner = np.repeat(np.arange(len(texts)), lens)
    return buf, lens, starts, owner, np.arange(len(buf)) - starts[owner]


def _byte_set(chars: str) -> np.ndarray:
    table = np.zeros(256, dtype=bool)
    table[list(chars.encode("ascii"))] = True
    return table


_SPACE_BYTES = _byte_set(" \t\n\r\x0b\x0c")
_DIGIT_BYTES = _byte_set("0123456789")
_LETTER_BYTES = _byte_set("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz")


def _clean_scheme(scheme: IdScheme) -> bool:
    """Whether :func:`_clean_reg_texts` applies: letter prefixes, one-character punctuation separators."""
    return (all(p.isascii() and p.isalpha() for p in scheme.prefixes)
            and all(len(s) == 1 and s.isascii() and not s.isalnum() for s in scheme.separators))


def _clean_reg_texts(texts: np.ndarray, scheme: IdScheme):
    """Which texts ``normalize_reg_no`` reads as a known prefix and digits with separators.

    ``texts``: stripped, non-empty ASCII texts; ``scheme`` as
    :func:`_clean_scheme` allows.  A clean text is an optional known prefix
    (any case) and whitespace after it, then digits (at least one) and
    separators only (and whitespace when a space is a separator); not
    starting with ``'`` and not of the "12345678.0" form.  The function then
    removes the prefix and separators and keeps the digits, as here.  (It
    would also read a few other texts so, e.g. with other whitespace
    characters; those take the step-by-step path.)

    Returns (clean mask, digits of the clean texts, their prefixes).
    """
    m = len(texts)
    if not m:
        return np.zeros(0, dtype=bool), np.empty(0, dtype=object), np.empty(0, dtype=object)
    buf, lens, starts, owner, pos = _segments(texts)
    body = _DIGIT_BYTES | _byte_set("".join(scheme.separators))
    if " " in scheme.separators:
        body = body | _SPACE_BYTES
    # the leading letters must be a known prefix (the body has no letters)
    lead = np.minimum.reduceat(np.where(_LETTER_BYTES[buf], lens[owner], pos), starts)
    prefixes = sorted(scheme.prefixes, key=len, reverse=True)
    which = np.full(m, -1, dtype=np.int64)
    for j, known in enumerate(prefixes):
        cand = np.flatnonzero((lead == len(known)) & (which < 0))
        if len(cand):
            got = buf[starts[cand][:, None] + np.arange(len(known))] & 0xDF      # upper case
            which[cand[(got == np.frombuffer(known.encode("ascii"), dtype=np.uint8)).all(axis=1)]] = j
    plen = np.where(which >= 0, lead, 0)
    ok = (lead == 0) | (which >= 0)
    after = pos >= plen[owner]
    # whitespace right after the prefix is stripped; everything else must be digits or separators
    first_solid = np.minimum.reduceat(np.where(after & ~_SPACE_BYTES[buf], pos, lens[owner]), starts)
    leading_space = after & (pos < first_solid[owner])
    ok &= ~np.logical_or.reduceat(after & ~leading_space & ~body[buf], starts)
    digit = _DIGIT_BYTES[buf]
    ok &= np.logical_or.reduceat(digit, starts)
    ok &= buf[starts] != ord("'")
    # "12345678.0" / "12345678,00" is read as a number cell
    point = (buf == ord(".")) | (buf == ord(","))
    points = np.add.reduceat(point.astype(np.int64), starts)
    others = np.add.reduceat((~digit & ~point).astype(np.int64), starts)
    at = np.maximum.reduceat(np.where(point, pos, -1), starts)
    tail = lens - at - 1
    zeros = np.add.reduceat(((buf == ord("0")) & (pos > at[owner])).astype(np.int64), starts)
    ok &= ~((points == 1) & (others == 0) & (at >= 1) & (tail >= 1) & (tail <= 2) & (zeros == tail))
    # the digits of the clean texts
    keep = digit & after & ok[owner]
    counts = np.add.reduceat(keep.astype(np.int64), starts)[ok]
    joined = buf[keep].tobytes().decode("ascii")
    ends = np.cumsum(counts)
    digits = _objects((joined[a:b] for a, b in zip((ends - counts).tolist(), ends.tolist())), len(counts))
    names = np.array(prefixes + [""], dtype=object)
    return ok, digits, names[which[ok]]


def _clean_reg_form_usable(scheme: IdScheme) -> bool:
    """The clean-text path applies and no placeholder text ("N/A", "-") would pass for clean."""
    if not _clean_scheme(scheme):
        return False
    probe = _objects(sorted(_PLACEHOLDERS), len(_PLACEHOLDERS))
    return not _clean_reg_texts(probe, scheme)[0].any()


def _reg_nos(values: np.ndarray, scheme: IdScheme, texts: np.ndarray | None = None):
    """:func:`linker.normalize.normalize_reg_no` of every value, column-wise.

    ``texts``, optional: ``cell_text`` of the values (text cells stripped),
    when already at hand.  Returns four object arrays: reg_no, prefix,
    status, note.  ASCII text and Python int/float cells go through the same
    steps as the per-value function, in the same order; anything else
    (non-ASCII text, text that leaves other characters than digits, other
    cell types) is handed to it.
    """
    k = len(values)
    reg = np.full(k, "", dtype=object)
    prefix = np.full(k, "", dtype=object)
    status = np.full(k, "", dtype=object)
    note = np.full(k, "", dtype=object)
    pending = np.ones(k, dtype=bool)
    types = _types(values)
    dig_at: list[np.ndarray] = []      # where, digit strings, from a number, prefix
    dig_txt: list[np.ndarray] = []
    dig_num: list[np.ndarray] = []
    dig_pre: list[np.ndarray] = []

    def settle(at, st, nt="", pre=""):
        status[at] = st
        note[at] = nt
        prefix[at] = pre
        pending[at] = False

    def to_digits(at, txt, num, pre=""):
        dig_at.append(at)
        dig_txt.append(txt)
        dig_num.append(np.full(len(at), num, dtype=bool))
        dig_pre.append(pre if isinstance(pre, np.ndarray) else np.full(len(at), pre, dtype=object))

    def flags(gen, count):
        return np.fromiter(gen, dtype=bool, count=count)

    # Text cells: stripped; for ASCII text that is the text the function reads on
    ti = np.flatnonzero(types == str)
    t = texts[ti] if texts is not None else _objects((v.strip() for v in values[ti]), len(ti))
    blank = t == ""
    settle(ti[blank], "missing")
    ti, t = ti[~blank], t[~blank]
    if not "".join(t).isascii():
        ascii_ = flags((x.isascii() for x in t), len(t))
        ti, t = ti[ascii_], t[ascii_]                 # other text: the function
    # known prefix + digits and separators: all at once
    if len(t) and _clean_reg_form_usable(scheme):
        clean, digits, pre = _clean_reg_texts(t, scheme)
        to_digits(ti[clean], digits, False, pre)
        ti, t = ti[~clean], t[~clean]
    # step by step, as the per-value function does
    placeholder = flags((x.upper() in _PLACEHOLDERS for x in t), len(t))
    settle(ti[placeholder], "missing", "placeholder text")
    ti, t = ti[~placeholder], t[~placeholder]
    quoted = np.flatnonzero(flags((x.startswith("'") for x in t), len(t)))
    t[quoted] = _objects((x[1:].strip() for x in t[quoted]), len(quoted))
    sci = flags((_SCIENTIFIC.match(x) is not None for x in t), len(t))
    settle(ti[sci], "unrecoverable", "scientific notation: digits lost")
    ti, t = ti[~sci], t[~sci]
    flt = [_FLOAT_TEXT.match(x) for x in t]
    fi = flags((m is not None for m in flt), len(t))
    to_digits(ti[fi], _objects((m.group(1) for m in flt if m is not None), int(fi.sum())), True)
    ti, t = ti[~fi], t[~fi]
    pre = np.full(len(t), "", dtype=object)
    open_ = np.ones(len(t), dtype=bool)
    for known in sorted(scheme.prefixes, key=len, reverse=True):
        cut = len(known)
        hit = np.flatnonzero(open_ & flags((x[:cut].upper() == known for x in t), len(t)))
        pre[hit] = known
        t[hit] = _objects((x[cut:].lstrip() for x in t[hit]), len(hit))
        open_[hit] = False
    for sep in scheme.separators:
        t = _objects((x.replace(sep, "") for x in t), len(t))
    if " " in scheme.separators:
        t = _objects(("".join(x.split()) for x in t), len(t))
    empty = t == ""
    settle(ti[empty], "invalid", "no digits", pre[empty])
    digits = ~empty & flags((x.isdigit() for x in t), len(t))
    to_digits(ti[digits], t[digits], False, pre[digits])

    # Number cells (Python int and float; bool and numpy scalars are left to the function)
    ii = np.flatnonzero(types == int)
    neg = flags((v < 0 for v in values[ii]), len(ii))
    settle(ii[neg], "invalid", "negative number")
    to_digits(ii[~neg], _each(str, values[ii[~neg]]), True)
    fi = np.flatnonzero(types == float)
    nums = values[fi].astype(float)
    nan = np.isnan(nums)
    inf = np.isinf(nums)
    big = ~nan & ~inf & (np.abs(np.where(nan | inf, 0, nums)) >= _LARGEST_EXACT_FLOAT)
    whole_ok = ~nan & ~inf & ~big
    frac = whole_ok & (nums != np.floor(np.where(whole_ok, nums, 0)))
    settle(fi[nan], "missing")
    settle(fi[inf], "unrecoverable", "not a finite number")
    settle(fi[big], "unrecoverable", "number too large for exact digits: digits lost")
    settle(fi[frac], "unrecoverable", "number with a fraction: digits lost")
    whole = whole_ok & ~frac
    neg = whole & (nums < 0)                         # -0.0 reads as 0
    settle(fi[neg], "invalid", "negative number")
    ok = whole & ~neg
    to_digits(fi[ok], _objects((str(int(v)) for v in nums[ok].tolist()), int(ok.sum())), True)

    # Digit strings
    at = np.concatenate(dig_at)
    if len(at):
        d_reg, d_status, d_note = _reg_from_digits_cols(np.concatenate(dig_txt),
                                                        np.concatenate(dig_num), scheme)
        reg[at] = d_reg
        status[at] = d_status
        note[at] = d_note
        prefix[at] = np.concatenate(dig_pre)
        pending[at] = False

    # Everything else: the per-value function
    for j in np.flatnonzero(pending):
        r = normalize_reg_no(values[j], scheme)
        reg[j], prefix[j], status[j], note[j] = r.reg_no, r.prefix, r.status, r.note
    return reg, prefix, status, note


# ---------------------------------------------------------------------------
# Names, per distinct part
# ---------------------------------------------------------------------------

class _NameParts:
    """``_name_part`` of cell texts, folding each distinct whitespace-separated token once.

    :func:`linker.normalize.fold_text` works character by character (its
    Unicode decomposition and case mapping never reach across whitespace), so
    the fold of a text is the space-joined non-empty folds of its tokens.
    """

    def __init__(self):
        self._folds: dict[str, str] = {}

    def fold(self, text: str) -> str:
        folds = self._folds
        out = []
        for tok in text.split():
            f = folds.get(tok)
            if f is None:
                f = folds[tok] = fold_text(tok)
            if f:
                out.append(f)
        return " ".join(out)

    def part(self, text: str) -> str:
        """``_name_part`` of a cell text."""
        if text.strip().upper() in _PLACEHOLDERS:
            return ""
        folded = self.fold(text)
        return "" if folded in _NAME_PLACEHOLDERS else folded

    def split_full(self, text: str, order: str) -> tuple[str, str]:
        """``split_full_name`` of a cell text (``order`` already checked)."""
        if "," in text:
            family, given = text.split(",", 1)
            return self.part(given), self.part(family)
        return _split_tokens(self.part(text).split(), order)


def _name_columns(given, family, full, order_of_row: np.ndarray, orders: list) -> dict[str, np.ndarray]:
    """The :class:`linker.normalize.Name` fields per row.

    ``given``, ``family``, ``full``: ``(codes, texts)`` of the name columns;
    ``order_of_row`` indexes ``orders``, the full-name orders of the sheets.
    The same as :func:`linker.normalize.normalize_name` row by row: a row's
    given and family parts are its folded given and family cells, or, when
    both are empty, its full name split in its sheet's order.
    """
    for order in orders:
        normalize_name(full_order=order)        # an unknown order raises as the function does
    (gc, g_texts), (fc, f_texts), (uc, u_texts) = given, family, full
    parts = _NameParts()
    g_part = _each(parts.part, g_texts)
    f_part = _each(parts.part, f_texts)
    from_full = np.flatnonzero((g_part == "")[gc] & (f_part == "")[fc])
    split_codes, split_order, split_text = _pairs(order_of_row[from_full], uc[from_full], len(u_texts))
    splits = [parts.split_full(u_texts[j], orders[o])
              for o, j in zip(split_order.tolist(), split_text.tolist())]
    g2 = _objects((s[0] for s in splits), len(splits))
    f2 = _objects((s[1] for s in splits), len(splits))

    def ids(part, codes, split):
        vocab_codes, vocab = pd.factorize(np.concatenate([part, split]))
        row = codes.copy()
        row[from_full] = len(part) + split_codes
        return vocab_codes[row], vocab

    g_id, g_vocab = ids(g_part, gc, g2)
    f_id, f_vocab = ids(f_part, fc, f2)
    g_tokens = [s.split() for s in g_vocab]
    f_tokens = [s.split() for s in f_vocab]
    g_keys = [_key(tk) for tk in g_tokens]
    f_keys = [_key(tk) for tk in f_tokens]
    pair_codes, pg, pf = _pairs(g_id, f_id, len(f_vocab))
    name_key = _name_keys(pg, pf, g_tokens, f_tokens)
    return {
        "given_name": g_vocab.astype(object)[g_id],
        "family_name": f_vocab.astype(object)[f_id],
        "given_key": _objects((" ".join(x) for x in g_keys), len(g_keys))[g_id],
        "family_key": _objects((" ".join(x) for x in f_keys), len(f_keys))[f_id],
        "name_key": name_key[pair_codes],
        "given_soundex": _objects((_soundex(x) for x in g_keys), len(g_keys))[g_id],
        "family_soundex": _objects((_soundex(x) for x in f_keys), len(f_keys))[f_id],
    }


def _name_keys(gi: np.ndarray, fi: np.ndarray, g_tokens: list, f_tokens: list) -> np.ndarray:
    """``_order_free_key(given tokens + family tokens)`` per (given, family) pair.

    A pair of one non-particle token on each side (each maybe repeated), or
    with no token on one side, takes a shortcut; the rest is built token by
    token.
    """
    def single(tokens):
        return [t[0] if len(set(t)) == 1 and t[0] not in _PARTICLE_TOKENS else None for t in tokens]

    g_one, f_one = single(g_tokens), single(f_tokens)

    def slow(g, f):
        if not g_tokens[g]:
            return _order_free_key(f_tokens[f])
        if not f_tokens[f]:
            return _order_free_key(g_tokens[g])
        return _order_free_key(g_tokens[g] + f_tokens[f])

    return _objects(((a if a == b else (a + " " + b if a < b else b + " " + a))
                     if (a := g_one[g]) is not None and (b := f_one[f]) is not None else slow(g, f)
                     for g, f in zip(gi.tolist(), fi.tolist())), len(gi))


# ---------------------------------------------------------------------------
# Dates and ages, column-wise
# ---------------------------------------------------------------------------

_ISO_TEXT = re.compile(r"[0-9]{4}-[0-9]{2}-[0-9]{2}")


def _iso_dates(values: np.ndarray, min_year: int, max_year: int) -> np.ndarray:
    """Where ``parse_date`` reads a value as a plain valid ISO date: True.

    That is text written exactly ``YYYY-MM-DD`` naming a real day with a
    year in ``min_year..max_year``; ``parse_date`` then gives the text itself
    with no flag, whatever the date order.
    """
    k = len(values)
    out = np.zeros(k, dtype=bool)
    ti = np.flatnonzero(_types(values) == str)
    form = np.fromiter((_ISO_TEXT.fullmatch(v) is not None for v in values[ti]), dtype=bool, count=len(ti))
    ti = ti[form]
    if not len(ti):
        return out
    b = (np.frombuffer("".join(values[ti]).encode("ascii"), dtype=np.uint8)
         .reshape(len(ti), 10).astype(np.int64) - 48)
    y = b[:, 0] * 1000 + b[:, 1] * 100 + b[:, 2] * 10 + b[:, 3]
    m = b[:, 5] * 10 + b[:, 6]
    d = b[:, 8] * 10 + b[:, 9]
    ok = (y >= max(min_year, 1)) & (y <= min(max_year, 9999)) & (m >= 1) & (m <= 12) & (d >= 1)
    month = (np.where(ok, y, 2000) - 1970).astype("datetime64[Y]").astype("datetime64[M]") + \
        (np.where(ok, m, 1) - 1).astype("timedelta64[M]")
    length = ((month + 1).astype("datetime64[D]") - month.astype("datetime64[D]")).astype(np.int64)
    out[ti] = ok & (d <= length)
    return out


def _ymd(days: np.ndarray):
    """Year, month, day numbers of datetime64[D] values."""
    years = days.astype("datetime64[Y]")
    months = days.astype("datetime64[M]")
    return (years.astype(np.int64) + 1970,
            (months - years.astype("datetime64[M]")).astype(np.int64) + 1,
            (days - months.astype("datetime64[D]")).astype(np.int64) + 1)


def _add_months_cols(days: np.ndarray, months: np.ndarray) -> np.ndarray:
    """``_add_months`` over datetime64[D] values: the day clamped to the month's end."""
    y, m, d = _ymd(days)
    month = (np.zeros(len(days), dtype="datetime64[M]")
             + ((y - 1970) * 12 + m - 1 + months).astype("timedelta64[M]"))
    length = ((month + 1).astype("datetime64[D]") - month.astype("datetime64[D]")).astype(np.int64)
    return month.astype("datetime64[D]") + (np.minimum(d, length) - 1).astype("timedelta64[D]")


def _birth_ranges(ranges: list, days: list) -> tuple[np.ndarray, np.ndarray]:
    """``age_to_birth_range(ranges[i], days[i])`` for every i, as (earliest, latest) arrays.

    Whole-month ranges at reference dates well inside the calendar (years
    1123-9998) are worked column-wise, with the same month-end steps; any
    other pair goes through the function.
    """
    k = len(ranges)
    earliest = np.full(k, "", dtype=object)
    latest = np.full(k, "", dtype=object)
    low = np.fromiter((_whole_or(r[0]) for r in ranges), dtype=np.int64, count=k)
    high = np.fromiter((_whole_or(r[1]) for r in ranges), dtype=np.int64, count=k)
    year = np.fromiter((d.year if type(d) is dt.date else 0 for d in days), dtype=np.int64, count=k)
    fast = (low >= 0) & (high >= 0) & (year <= 9998) & (year * 12 - high >= 1124 * 12)
    fi = np.flatnonzero(fast)
    if len(fi):
        as_of = np.array([days[i].isoformat() for i in fi], dtype="datetime64[D]")
        one = np.timedelta64(1, "D")
        lo_m, hi_m = low[fi], high[fi]
        born = _add_months_cols(as_of, -lo_m)                     # latest birth
        step = np.ones(len(fi), dtype=bool)
        while step.any():
            step &= _add_months_cols(born + one, lo_m) <= as_of
            born = np.where(step, born + one, born)
        first = _add_months_cols(as_of, -hi_m) + one             # earliest birth
        step = np.ones(len(fi), dtype=bool)
        while step.any():
            step &= _add_months_cols(first, hi_m) <= as_of
            first = np.where(step, first + one, first)
        first = np.minimum(first, born)                          # a range narrower than one day
        earliest[fi] = first.astype(str).astype(object)
        latest[fi] = born.astype(str).astype(object)
    for i in np.flatnonzero(~fast):
        earliest[i], latest[i] = age_to_birth_range(ranges[i], days[i])
    return earliest, latest


def _whole_or(x: float) -> int:
    """``_whole(x)``, or -1 when ``x`` is no whole number of months."""
    w = _whole(float(x))
    return -1 if w is None else w


# ---------------------------------------------------------------------------
# The stage
# ---------------------------------------------------------------------------

def normalize_records(raw: pd.DataFrame, cfg: LinkConfig,
                      corrections: pd.DataFrame | None = None) -> pd.DataFrame:
    """Turn raw records (from :mod:`linker.ingest`) into the normalized record table.

    Parameters
    ----------
    raw : DataFrame
        Columns ``record_id, row_key, source_file, sheet, row, slot, extras``,
        ``<field>_obj`` per canonical field, and the per-sheet settings
        ``date_order, full_name_order, sex_codes`` (read from each sheet's
        first row).
    cfg : LinkConfig
    corrections : DataFrame, optional
        Lines of a corrections file (:func:`linker.corrections.read_corrections`),
        applied as :func:`linker.corrections.apply_corrections` says.  That
        function also returns the corrections that matched no record; call it
        directly when those are needed.

    Returns
    -------
    DataFrame with the columns of :data:`linker.schema.RECORD_COLUMNS`, the
    records of each sheet (``source_file``, ``sheet``) together, sheets in the
    order they first appear.
    """
    if corrections is not None and len(corrections):
        from .corrections import apply_corrections   # it normalizes through this module
        return apply_corrections(raw, corrections, cfg).records
    if raw.empty:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in RECORD_COLUMNS})
    sheet = raw.groupby(["source_file", "sheet"], sort=False, dropna=False).ngroup().to_numpy()
    if (np.diff(sheet) < 0).any():
        order = np.argsort(sheet, kind="stable")
        raw, sheet = raw.take(order), sheet[order]
    out = _normalize(raw, sheet, cfg)
    return pd.DataFrame({c: out[c] for c in RECORD_COLUMNS}, copy=False)


def _prefixed(field: str, texts: np.ndarray) -> np.ndarray:
    return _objects((f"{field}: {x}" if x else "" for x in texts), len(texts))


def _sheet_setting(raw: pd.DataFrame, column: str, first: np.ndarray, sheet: np.ndarray):
    """A per-sheet setting (from each sheet's first row): (code per row, distinct settings)."""
    codes, settings = pd.factorize(_objects(raw[column].to_numpy()[first].tolist(), len(first)),
                                   use_na_sentinel=False)
    return codes[sheet], list(settings)


def _normalize(raw: pd.DataFrame, sheet: np.ndarray, cfg: LinkConfig) -> dict[str, np.ndarray]:
    """The record columns of raw records whose sheets (``sheet``: 0, 1, ... per row) are contiguous."""
    n = len(raw)
    first = np.flatnonzero(np.r_[True, sheet[1:] != sheet[:-1]])
    out = {c: raw[c].to_numpy(copy=True) for c in _PROVENANCE_COLUMNS}
    cells = {fld: _distinct(raw[fld + "_obj"]) for fld in _CELL_FIELDS}
    texts = {}
    for fld, (codes, uniq) in cells.items():
        texts[fld] = _cell_texts(uniq)
        out[fld + "_raw"] = texts[fld][codes]
    notes = []        # (note per distinct value, codes), in the order the notes are written

    # Registration numbers
    codes, uniq = cells["reg_no"]
    reg, prefix, status, note = _reg_nos(uniq, cfg.scheme, texts["reg_no"])
    out["reg_no"] = reg[codes]
    out["reg_no_prefix"] = prefix[codes]
    out["reg_no_status"] = status[codes]
    notes.append((_prefixed("reg_no", note), codes))

    # Names
    order_of_row, orders = _sheet_setting(raw, "full_name_order", first, sheet)
    out.update(_name_columns(*((cells[f][0], texts[f]) for f in ("given_name", "family_name", "full_name")),
                             order_of_row=order_of_row, orders=orders))

    # Dates: the column's d/m order is inferred from its unambiguous values unless set
    sheet_orders = raw["date_order"].to_numpy()[first].tolist()
    max_year = cfg.as_of.year + 1
    iso = {}          # field -> (codes, iso per distinct (setting, value))
    for fld in DATE_FIELDS:
        codes, uniq = cells[fld]
        limit = cfg.as_of.year if fld == "birth_date" else max_year
        plain = _iso_dates(uniq, cfg.min_year, limit)    # the same whatever the order
        pcodes, psheet, pvalue = _pairs(sheet, codes, len(uniq))
        by_sheet = np.argsort(psheet, kind="stable")
        bounds = np.searchsorted(psheet[by_sheet], np.arange(len(first) + 1))
        setting = []
        for s, sheet_order in enumerate(sheet_orders):
            if sheet_order == "auto":
                seen = pvalue[by_sheet[bounds[s]:bounds[s + 1]]]
                seen = uniq[seen[~plain[seen]]]            # ISO dates say nothing about d/m order
                inferred, _why = infer_date_order([v for v in seen if isinstance(v, str)])
                setting.append((inferred or cfg.fallback_order, inferred is None))
            else:
                setting.append((sheet_order, False))
        setting_codes, settings = pd.factorize(_objects(setting, len(setting)))
        for col_order, _assumed in settings:
            parse_date(None, order=col_order)        # an unknown order raises as the function does
        vcodes, vset, vvalue = _pairs(setting_codes[psheet], pvalue, len(uniq))
        fast = plain[vvalue]
        day = np.empty(len(vset), dtype=object)
        flag = np.full(len(vset), "", dtype=object)
        day[fast] = uniq[vvalue[fast]]
        slow = np.flatnonzero(~fast)
        res = _objects((parse_date(uniq[v], order=settings[s][0], min_year=cfg.min_year,
                                   max_year=limit, assumed=settings[s][1], pivot_year=cfg.as_of.year)
                        for s, v in zip(vset[slow].tolist(), vvalue[slow].tolist())), len(slow))
        day[slow] = _attr(res, "iso")
        flag[slow] = _objects((f"{fld}: {r.flag}" if r.flag and not _is_blank(uniq[v]) else ""
                               for r, v in zip(res, vvalue[slow].tolist())), len(slow))
        row_codes = vcodes[pcodes]
        iso[fld] = (row_codes, day)
        out[fld] = day[row_codes]
        notes.append((flag, row_codes))
    bcodes, biso = iso["birth_date"]
    years = np.fromiter((int(d[:4]) if d else 0 for d in biso), dtype=np.int64, count=len(biso))
    out["birth_year"] = pd.arrays.IntegerArray(years[bcodes], (biso == "")[bcodes])

    # Ages -> birth-date ranges at the row's own reference date
    acodes, auniq = cells["age"]
    ranges = _each(parse_age, auniq)
    unread = np.fromiter((r is None for r in ranges), dtype=bool, count=len(ranges))
    notes.append((_objects((f"age: cannot read {t!r} as an age" if r is None and not _is_blank(v) else ""
                            for r, v, t in zip(ranges, auniq, texts["age"])), len(auniq)), acodes))
    refs = list(cfg.age_reference)
    for k, fld in enumerate(refs):
        if fld not in iso:                               # an event field without dates
            reached = ~unread[acodes]
            for earlier in refs[:k]:
                reached &= (iso[earlier][1] == "")[iso[earlier][0]]
            if reached.any():
                raise KeyError(fld)                      # as the row-by-row reading failed there
            refs = refs[:k]
            break
    ref = np.full(n, -1, dtype=np.int64)                 # -1: the config's as-of date
    ref_vocab = np.empty(0, dtype=object)
    if refs:
        ref_codes, ref_vocab = pd.factorize(np.concatenate([iso[f][1] for f in refs]))
        starts = np.cumsum([0] + [len(iso[f][1]) for f in refs])
        for k in range(len(refs) - 1, -1, -1):           # the first field with a date wins
            fcodes, fiso = iso[refs[k]]
            ref = np.where((fiso != "")[fcodes], ref_codes[starts[k]:starts[k + 1]][fcodes], ref)
    read = np.flatnonzero(~unread[acodes])
    pair_codes, pa, pr = _pairs(acodes[read], ref[read] + 1, len(ref_vocab) + 1)
    ref_days = [cfg.as_of] + [dt.date.fromisoformat(d) if d else None for d in ref_vocab]
    lo_u, hi_u = _birth_ranges([ranges[a] for a in pa.tolist()], [ref_days[r] for r in pr.tolist()])
    bmin = np.full(n, "", dtype=object)
    bmax = np.full(n, "", dtype=object)
    bmin[read] = lo_u[pair_codes]
    bmax[read] = hi_u[pair_codes]
    out["birth_date_min"] = bmin
    out["birth_date_max"] = bmax
    months = np.fromiter((np.nan if r is None else float(r[0]) for r in ranges), dtype=float,
                         count=len(ranges))
    out["age_months"] = months[acodes]

    # Sex
    codes, uniq = cells["sex"]
    code_of_row, code_sets = _sheet_setting(raw, "sex_codes", first, sheet)
    code_maps = [json.loads(c) for c in code_sets]
    pcodes, pset, pvalue = _pairs(code_of_row, codes, len(uniq))
    pairs = list(zip(pset.tolist(), pvalue.tolist()))
    sexes = _objects((normalize_sex(uniq[v], code_maps[s]) for s, v in pairs), len(pairs))
    out["sex"] = sexes[pcodes]
    sex_texts = texts["sex"]
    notes.append((_objects((f"sex: unknown code {sex_texts[v]!r}" if not x and sex_texts[v] and
                            fold_text(sex_texts[v]).lower() not in code_maps[s] else ""
                            for x, (s, v) in zip(sexes, pairs)), len(pairs)), pcodes))

    # Event text fields
    for fld in ("location", "status"):
        out[fld] = _each(fold_text, texts[fld])[cells[fld][0]]

    out["notes"] = _join_notes(notes, n)
    out["corrections"] = np.full(n, "", dtype=object)

    # A number the row shows for two of its persons
    reg_ids, reg_vocab = pd.factorize(reg)
    row_reg = reg_ids[cells["reg_no"][0]]
    rows = np.flatnonzero((reg_vocab.astype(object) != "")[row_reg])
    shared = np.zeros(n, dtype=bool)
    key_ids, _keys = pd.factorize(out["row_key"][rows])      # a missing row key is in no group
    rows, key_ids = rows[key_ids >= 0], key_ids[key_ids >= 0]
    if len(rows):
        group = _pairs(key_ids, row_reg[rows], len(reg_vocab))[0]
        shared[rows] = np.bincount(group)[group] > 1
    out["reg_no_shared"] = shared
    if shared.any():
        at = np.flatnonzero(shared)
        had = out["notes"][at]
        out["notes"][at] = np.where(had != "", had + ("; " + _SHARED_NOTE), _SHARED_NOTE)
    return out
