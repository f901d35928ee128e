"""Ingest: every sheet of every delivery file into raw person-records, with a ledger.

For each sheet the stage finds the header row (even under title or notes
rows), maps header cells to (slot, field) through the config vocabularies,
and classifies every row: it becomes one record per person slot it names,
or a ledger line saying why not (blank, above the header, repeated header,
total or notes row, no person data).  Nothing is dropped without a line.

The output of :func:`ingest_sheet` is one frame of *raw* person-records (the
cell values as delivered, in ``<field>_obj`` columns) that
:mod:`linker.normalize_records` turns into the normalized record table.
"""

from __future__ import annotations

import hashlib
import json
import json.encoder
import re
from dataclasses import dataclass, field
from itertools import count, repeat

import numpy as np
import pandas as pd

from .config import LinkConfig, SheetSettings
from .io import FileData, SheetData
from .normalize import fold_header, fold_text
from .schema import (CLAIM_COLUMNS, EVENT_FIELDS, OUTCOME_EMPTY_SHEET, OUTCOME_HEADER, OUTCOME_RECORD,
                     OUTCOME_SKIPPED, PERSON_FIELDS, CANONICAL_FIELDS)

HEADER_SCAN_ROWS = 30
# Person fields that make a slot "present" on a row (sex alone does not).
IDENTITY_FIELDS = ("reg_no", "given_name", "family_name", "full_name", "birth_date", "age")
ALL_SLOTS = "*"   # owner of generic event fields: every person on the row
# A cell that reads as a total label: "Total", "TOTALS", "Total: 57", "Total children",
# "Grand total", "Sub-total", "Totaux" (not "Totaro" or "Totten").
_TOTAL_LABEL = re.compile(r"^\W*(?:grand|sub)?\W*tot(?:al|aux|ale|aal)s?(?![a-z])", re.IGNORECASE)


@dataclass
class SheetResult:
    """What one sheet gave: raw person-records, ledger lines, column report, relation claims."""

    records: pd.DataFrame
    ledger: pd.DataFrame
    columns: pd.DataFrame
    claims: pd.DataFrame
    warnings: list[str] = field(default_factory=list)


def stable_id(*parts, prefix: str = "R", length: int = 12) -> str:
    """A short, stable id from provenance parts (the same inputs give the same id)."""
    digest = hashlib.sha1("\x1f".join(str(p) for p in parts).encode("utf-8")).hexdigest()
    return prefix + digest[:length]


def column_letter(index: int) -> str:
    """0-based column index -> spreadsheet letters (0 -> A, 26 -> AA)."""
    letters = ""
    index += 1
    while index:
        index, rem = divmod(index - 1, 26)
        letters = chr(65 + rem) + letters
    return letters


def cell_text(value) -> str:
    """How a cell reads as text: dates as ISO, whole floats without '.0', blanks as ''."""
    if value is None:
        return ""
    if isinstance(value, float):
        if value != value:  # NaN
            return ""
        if value.is_integer() and abs(value) < 1e15:
            return str(int(value))
        return repr(value)
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if hasattr(value, "isoformat"):
        text = value.isoformat()
        return text[:10] if text.endswith("T00:00:00") else text
    return str(value).strip()


def _vocabulary(settings: SheetSettings) -> dict[str, list[tuple[str, str]]]:
    """folded header -> [(owner, field)]; owner is a slot, '' (generic person) or '*' (event)."""
    vocab: dict[str, list[tuple[str, str]]] = {}
    for slot, cols in settings.slot_columns.items():
        for fld, names in cols.items():
            for name in names:
                vocab.setdefault(name, []).append((slot, fld))
    for fld, names in settings.generic_columns.items():
        owner = ALL_SLOTS if fld in EVENT_FIELDS else ""
        for name in names:
            vocab.setdefault(name, []).append((owner, fld))
    return vocab


def find_header(texts: list[list[str]], vocab: dict, settings: SheetSettings,
                min_matches: int) -> tuple[int | None, int]:
    """Index (0-based) of the header row and its number of recognised cells.

    The header is the row, among the first ``HEADER_SCAN_ROWS``, with the most
    cells naming a known field (at least ``min_matches``); ties go to the
    earliest.  A forced ``header_row`` in the config wins.
    """
    if settings.header_row:
        idx = settings.header_row - 1
        return (idx, 0) if idx < len(texts) else (None, 0)
    best, best_n = None, 0
    scan = texts[:HEADER_SCAN_ROWS]
    names = {t for row in scan for t in row if t}       # each distinct cell folded once
    known = {t for t in names if (key := fold_header(t)) in vocab or
             (settings.slot_column and key == settings.slot_column)}
    for i, row in enumerate(scan):
        n = sum(1 for t in row if t in known)
        if n > best_n:
            best, best_n = i, n
    if best_n < min_matches:
        return None, best_n
    return best, best_n


def map_columns(header: list[str], vocab: dict, settings: SheetSettings):
    """Map header cells to (owner, field).

    Returns
    -------
    mapping : dict[int, tuple[str, str]]
        column index -> (owner, field) for mapped columns.
    report : list[dict]
        one line per non-empty header cell (column, header, mapped_to, note).
    slot_col : int | None
        index of the column whose value decides the slot, if the sheet has one.
    """
    mapping: dict[int, tuple[str, str]] = {}
    report = []
    taken: set[tuple[str, str]] = set()
    slot_col = None
    default_slot = settings.slot
    for c, text in enumerate(header):
        if not text:
            continue
        key = fold_header(text)
        note = ""
        target = None
        if settings.slot_column and key == settings.slot_column and slot_col is None:
            slot_col = c
            report.append(_col_line(c, text, "slot decided here", ""))
            continue
        for owner, fld in vocab.get(key, []):
            if owner == "" and fld in PERSON_FIELDS:
                if default_slot is None and not settings.slot_column:
                    note = (f"generic header for {fld} but no sheet rule says which person "
                            "this sheet describes; kept as an extra")
                    continue
                owner = default_slot or ""   # "" = decided per row by the slot column
            target = (owner, fld)
            break
        if target is not None and target in taken:
            note = f"a second column for {_label(target)}; the first one is used, this kept as an extra"
            target = None
        if target is None:
            report.append(_col_line(c, text, "extra", note or "header names no configured field"))
            continue
        taken.add(target)
        mapping[c] = target
        report.append(_col_line(c, text, _label(target), note))
    return mapping, report, slot_col


def _label(target: tuple[str, str]) -> str:
    owner, fld = target
    if owner == ALL_SLOTS:
        return f"every person.{fld}"
    if owner == "":
        return f"(slot column).{fld}"
    return f"{owner}.{fld}"


def _col_line(c: int, header: str, mapped: str, note: str) -> dict:
    return {"column": column_letter(c), "header": header, "mapped_to": mapped, "note": note}


def is_total_label(text: str) -> bool:
    """True when a cell reads as the label of a total row ("Total: 57", "Grand total", ...)."""
    return bool(text) and _TOTAL_LABEL.match(text) is not None


def _is_total_or_note(texts: list[str]) -> str:
    filled = [t for t in texts if t]
    first = fold_text(filled[0]) if filled else ""
    if first.startswith(("TOTAL", "SUBTOTAL", "GRAND TOTAL", "SUM")) or \
            any(fold_text(t) in ("TOTAL", "TOTALS", "SUBTOTAL") for t in filled):
        return "total row"
    if first.startswith(("NOTE", "NOTES", "SOURCE", "PREPARED BY", "COMMENT", "END OF")) or \
            len(filled) == 1:
        return "notes row"
    return "no person data in the mapped columns"


# ---------------------------------------------------------------------------
# Column-wise helpers.  A sheet is handled as one object array per column; a
# search over a column is one C-level find in its texts joined by NUL, and a
# test on cell contents runs once per distinct text.
# ---------------------------------------------------------------------------
_TOTAL_START = ("TOTAL", "SUBTOTAL", "GRAND TOTAL")
_json_text = json.encoder.encode_basestring      # how json.dumps(..., ensure_ascii=False) writes a str
_hexdigest = type(hashlib.sha1()).hexdigest


def _text_stays_object() -> bool:
    """True when pandas keeps text (with None and NaN) as it is in a frame built from rows."""
    probe = pd.DataFrame([("a",), (None,), (float("nan"),)], columns=["v"])["v"]
    return probe.dtype == object and probe[0] == "a" and probe[1] is None


_TEXT_STAYS_OBJECT = _text_stays_object()
# the column pandas builds for a key that none of the row dicts holds
_ABSENT = pd.DataFrame([{}], columns=["v"])["v"]


def _raw_columns(rows) -> list[np.ndarray]:
    """The cells of a sheet as one object array per column, None past the end of a short row."""
    n = len(rows)
    lengths = np.fromiter(map(len, rows), dtype=np.int64, count=n)
    width = int(lengths.max()) if n else 0
    if not width:
        return []
    grid = np.empty((n, width), dtype=object)           # None everywhere
    if (lengths == width).all():
        grid[:] = rows
    else:
        for length in np.unique(lengths):
            if length:
                idx = np.flatnonzero(lengths == length)
                grid[idx, :length] = [rows[i] for i in idx.tolist()]
    return list(grid.T)                               # column views of the grid


# Every character that str.strip() removes (str.isspace(); a test checks the list).
_SPACES = ("\t\n\x0b\x0c\r\x1c\x1d\x1e\x1f \x85\xa0\u1680\u2000\u2001\u2002\u2003\u2004\u2005"
           "\u2006\u2007\u2008\u2009\u200a\u2028\u2029\u202f\u205f\u3000")
_NON_ASCII = re.compile(r"[^\x00-\x7f]+")


def _joined(items: list) -> str | None:
    """The texts joined with NUL; None when one is not text or holds a NUL itself."""
    try:
        joined = "\x00".join(items)
    except TypeError:
        return None
    return joined if joined.count("\x00") == len(items) - 1 else None


def _nul_ranks(joined: str, positions) -> np.ndarray:
    """For positions (ascending) in a NUL-joined string, the rank of the text each falls in."""
    out, k, last = [], 0, 0
    for at in positions:
        k += joined.count("\x00", last, at)
        last = at
        out.append(k)
    return np.array(out, dtype=np.int64)


def _find_all(text: str, needle: str, step: int = 1) -> list[int]:
    found, at = [], text.find(needle)
    while at >= 0:
        found.append(at)
        at = text.find(needle, at + step)
    return found


class _Texts:
    """The cell texts of one column (from row ``start`` on) and, when every text of the
    column is NUL-free, the column's texts joined by NUL.

    The joined string turns a search over a column into one C-level ``find``:
    lowering it gives each text's own lower case (NUL is neither cased nor
    case-ignorable, so a final sigma sees the context it sees at the end of a
    lone text), and a hit's text is the number of NULs before it.
    """

    __slots__ = ("full", "joined", "start", "_lower")

    def __init__(self, full: np.ndarray, joined: str | None, start: int = 0, lower: list | None = None):
        self.full, self.joined, self.start = full, joined, start
        self._lower = [None] if lower is None else lower      # shared by the tails of one column

    @classmethod
    def of(cls, values: np.ndarray) -> "_Texts":
        return cls(values, _joined(values.tolist()))

    @property
    def values(self) -> np.ndarray:
        return self.full[self.start:]

    def tail(self, start: int) -> "_Texts":
        """The texts from position ``start`` on (positions found are counted from there)."""
        return _Texts(self.full, self.joined, self.start + start, self._lower)

    def lower(self) -> str:
        if self._lower[0] is None:
            self._lower[0] = self.joined.lower()
        return self._lower[0]

    def _from_start(self, ranks: np.ndarray) -> np.ndarray:
        return ranks[ranks >= self.start] - self.start

    def equal_lower(self, low: str) -> np.ndarray:
        """Positions of the texts ``x`` with ``x.lower() == low`` (``low`` not empty)."""
        if self.joined is None or "\x00" in low:
            return np.array([i for i, x in enumerate(self.values.tolist()) if x.lower() == low],
                            dtype=np.int64)
        joined = self.lower()
        n = len(self.full)
        found = _nul_ranks(joined, [at + 1 for at in _find_all(joined, "\x00" + low + "\x00", len(low) + 1)])
        first = joined.startswith(low + "\x00") or (n == 1 and joined == low)
        last = n > 1 and joined.endswith("\x00" + low)
        ranks = np.concatenate([[0] if first else [], found, [n - 1] if last else []]).astype(np.int64)
        return self._from_start(ranks)

    def containing_lower(self, needle: str, drop: str = "", non_ascii: bool = False) -> np.ndarray:
        """Positions (ascending) of the texts whose lower case, less the characters of ``drop``,
        holds ``needle``; with ``non_ascii`` also of every text with a non-ASCII character."""
        if self.joined is None:
            def holds(x):
                for ch in drop:
                    x = x.replace(ch, "")
                return needle in x.lower() or (non_ascii and not x.isascii())
            return np.array([i for i, x in enumerate(self.values.tolist()) if holds(x)], dtype=np.int64)
        low = self.joined
        if drop:
            for ch in drop:
                low = low.replace(ch, "")
            low = low.lower()
        else:
            low = self.lower()
        found = _nul_ranks(low, _find_all(low, needle))
        if non_ascii and not self.joined.isascii():
            found = np.concatenate([found, _nul_ranks(self.joined, [m.start() for m in
                                                                    _NON_ASCII.finditer(self.joined)])])
        return self._from_start(np.unique(found))


def _text_column(col: np.ndarray) -> _Texts:
    """:func:`cell_text` of every cell of one column; text cells are only stripped.

    A column of text only (a CSV column) whose texts need no stripping is its own
    text: the same objects, no copy.
    """
    items = col.tolist()
    joined = _joined(items)
    if joined is None:
        if pd.api.types.infer_dtype(col, skipna=True) != "string":
            return _Texts.of(_objects([cell_text(v) for v in items]))
        null = pd.isna(col)
        out = np.empty(len(col), dtype=object)
        out[~null] = _objects(list(map(str.strip, col[~null].tolist())))
        out[null] = _objects([cell_text(v) for v in col[null].tolist()])
        return _Texts.of(out)
    # texts with a space next to a NUL or at an end are the ones strip() changes
    edges = [at for ch in _SPACES if ch in joined
             for at in [a + 1 for a in _find_all(joined, "\x00" + ch)] + _find_all(joined, ch + "\x00")]
    if joined[:1] in _SPACES and joined[:1]:
        edges.append(0)
    if joined[-1:] in _SPACES and joined[-1:]:
        edges.append(len(joined) - 1)
    if not edges:
        return _Texts(col, joined)
    out = col.copy()
    where = np.unique(_nul_ranks(joined, sorted(edges)))
    out[where] = _objects([x.strip() for x in col[where].tolist()])
    return _Texts.of(out)


def _test_where(values: np.ndarray, where: np.ndarray, test) -> np.ndarray:
    """``test`` of the texts at ``where`` (once per distinct text), False elsewhere."""
    out = np.zeros(len(values), dtype=bool)
    if len(where):
        out[where] = _by_distinct(values[where], test, bool)
    return out


def _objects(values: list) -> np.ndarray:
    """A 1-d object array of the values (each kept as it is)."""
    return np.fromiter(values, dtype=object, count=len(values))


def _by_distinct(values: np.ndarray, func, dtype=object) -> np.ndarray:
    """``func`` of every text, computed once per distinct text.

    A dict tells the texts apart (pandas' factorize compares text as C strings,
    so "" and "\\x00" would be one).
    """
    items = values.tolist()
    result = {v: func(v) for v in dict.fromkeys(items)}
    if dtype is object:
        return _objects(list(map(result.__getitem__, items)))
    return np.fromiter(map(result.__getitem__, items), dtype=dtype, count=len(items))


def _starts_with_total(text: str) -> bool:
    """``fold_text(text)`` starts with TOTAL, SUBTOTAL or GRAND TOTAL."""
    return fold_text(text).startswith(_TOTAL_START)


def _is_total_word(text: str) -> bool:
    return fold_text(text) in ("TOTAL", "TOTALS", "SUBTOTAL")


def _total_or_note(texts: list[np.ndarray], filled: list[np.ndarray], first: np.ndarray) -> np.ndarray:
    """:func:`_is_total_or_note` of every row (column arrays of the rows' texts)."""
    first_folded = _by_distinct(first, fold_text)
    total = _by_distinct(first_folded, lambda f: f.startswith(("TOTAL", "SUBTOTAL", "GRAND TOTAL", "SUM")), bool)
    for t in texts:
        total |= _by_distinct(t, _is_total_word, bool)
    notes = _by_distinct(first_folded, lambda f: f.startswith(("NOTE", "NOTES", "SOURCE", "PREPARED BY",
                                                               "COMMENT", "END OF")), bool)
    notes |= np.sum(filled, axis=0) == 1
    out = np.full(len(first), "no person data in the mapped columns", dtype=object)
    out[notes] = "notes row"
    out[total] = "total row"
    return out


def _stable_ids(head: tuple, rownums: np.ndarray, tails: list[str] | None = None,
                tail_index: np.ndarray | None = None, prefix: str = "R", length: int = 12) -> np.ndarray:
    """``stable_id(*head, rownum[, tails[i]], prefix=prefix)`` for every row number: one sha1 each."""
    lead = "\x1f".join(str(p) for p in head) + "\x1f"
    if tails is None:
        keys = [(lead + str(r)).encode("utf-8") for r in rownums.tolist()]
    else:
        ends = ["\x1f" + str(t) for t in tails]
        keys = [(lead + str(r) + ends[k]).encode("utf-8") for r, k in zip(rownums.tolist(), tail_index.tolist())]
    return _objects([prefix + x[:length] for x in map(_hexdigest, map(hashlib.sha1, keys))])


def _extras_json(assignments: list[tuple[str, int]], texts: list, filled: list, n: int) -> np.ndarray:
    """The extras JSON of every row: {header: text} of the unmapped filled cells, sorted keys.

    ``assignments`` lists (key, column) in the order a dict would be filled (a
    later filled cell of the same key wins), as ``json.dumps(..., sort_keys=True)``.
    """
    by_key: dict[str, list[int]] = {}
    for key, c in assignments:
        by_key.setdefault(key, []).append(c)
    body = np.full(n, "", dtype=object)
    has = np.zeros(n, dtype=bool)
    if len(by_key) == 1:                                   # one extra column: no joining needed
        (key, cols), = by_key.items()
        if len(cols) == 1:
            got = filled[cols[0]]
            head = "{" + _json_text(key) + ": "
            body[got] = _objects([head + x + "}" for x in map(_json_text, texts[cols[0]][got].tolist())])
            return body
    for key in sorted(by_key):
        value = np.full(n, "", dtype=object)
        got = np.zeros(n, dtype=bool)
        for c in by_key[key]:
            value = np.where(filled[c], texts[c], value)
            got |= filled[c]
        if not got.any():
            continue
        piece = (_json_text(key) + ": ") + _objects(list(map(_json_text, value[got].tolist())))
        if has.any():
            piece[has[got]] = ", " + piece[has[got]]
            body[got] = body[got] + piece
        else:
            body[got] = piece
        has |= got
    out = np.full(n, "", dtype=object)
    out[has] = "{" + body[has] + "}"
    return out


def _as_from_rows(values: np.ndarray):
    """The column pandas builds from rows (dicts or tuples) holding these values: same dtype, same values."""
    if values.dtype != object:
        return values
    if _TEXT_STAYS_OBJECT and pd.api.types.infer_dtype(values, skipna=False) == "string":
        return values
    if _TEXT_STAYS_OBJECT and pd.api.types.infer_dtype(values, skipna=True) == "string":
        null = pd.isna(values)
        if not null.any() or {type(v) for v in values[null].tolist()} <= {type(None), float}:
            return values
    return pd.DataFrame(list(zip(values.tolist())), columns=["v"])["v"]


def _frame(columns: dict, text: tuple = ()) -> pd.DataFrame:
    """A frame of the columns as pandas builds it from rows; ``text`` names columns of str only.

    The arrays are new and used nowhere else, so the frame takes them as they are (no copy).
    """
    return pd.DataFrame({k: v if _TEXT_STAYS_OBJECT and k in text else _as_from_rows(v)
                         for k, v in columns.items()}, copy=False)


def _row_lines(source_file: str, sheet: str, outcome: str, reasons) -> list[tuple]:
    """One ledger line per row (row 1 first), all with the same outcome and no records."""
    return list(zip(repeat(source_file), repeat(sheet), count(1), repeat(outcome), list(reasons),
                    repeat(0)))


def ingest_sheet(cfg: LinkConfig, source_file: str, sheet: SheetData) -> SheetResult:
    """Classify every row of one sheet and lift its persons into raw records.

    The work is column-wise: one object array per column, searches in a
    column's texts joined into one string, tests on cell contents once per
    distinct value, record ids by one sha1 call each.
    """
    settings = cfg.settings_for(source_file, sheet.name)
    n_rows = len(sheet.rows)
    raw = _raw_columns(sheet.rows)
    width = len(raw)
    texts = [_text_column(col) for col in raw]
    text = [t.values for t in texts]
    filled = [t != "" for t in text]
    any_filled = np.logical_or.reduce(filled) if width else np.zeros(n_rows, dtype=bool)
    warnings: list[str] = []

    if settings.skip or not any_filled.any():
        empty = _empty_result()
    if settings.skip:
        reason = "sheet left out by a sheet rule (skip = true)"
        ledger = _row_lines(source_file, sheet.name, OUTCOME_SKIPPED,
                            np.where(any_filled, reason, "blank row").tolist())
        if not n_rows:
            ledger.append((source_file, sheet.name, "", OUTCOME_EMPTY_SHEET, reason, 0))
        return SheetResult(empty.records, _ledger_frame(ledger), empty.columns, empty.claims)
    if not any_filled.any():
        ledger = [(source_file, sheet.name, "", OUTCOME_EMPTY_SHEET, "sheet has no data", 0)]
        ledger += _row_lines(source_file, sheet.name, OUTCOME_SKIPPED, ["blank row"] * n_rows)
        return SheetResult(empty.records, _ledger_frame(ledger), empty.columns, empty.claims)

    vocab = _vocabulary(settings)
    if settings.header_row:        # a forced header row (past the last row, or below 1: none)
        h, n_found = (settings.header_row - 1, 0) if 0 < settings.header_row <= n_rows else (None, 0)
    else:
        head = [[t[i] for t in text] for i in range(min(n_rows, HEADER_SCAN_ROWS))]
        h, n_found = find_header(head, vocab, settings, cfg.min_header_matches)
    if h is None:
        empty = _empty_result()
        reason = (f"no header row found: no row among the first {HEADER_SCAN_ROWS} names "
                  f"{cfg.min_header_matches} or more configured columns (best row had {n_found})")
        warnings.append(f"{source_file}, sheet {sheet.name!r}: {reason}")
        ledger = _row_lines(source_file, sheet.name, OUTCOME_SKIPPED,
                            np.where(any_filled, reason, "blank row").tolist())
        return SheetResult(empty.records, _ledger_frame(ledger), empty.columns, empty.claims,
                           warnings)

    header = [t[h] for t in text]
    mapping, col_report, slot_col = map_columns(header, vocab, settings)
    columns = pd.DataFrame(col_report, columns=["column", "header", "mapped_to", "note"])
    columns.insert(0, "sheet", sheet.name)
    columns.insert(0, "source_file", source_file)
    columns.insert(3, "header_row", h + 1)
    header_lower = [t.lower() for t in header]
    n_header_cells = len([t for t in header if t])

    slots_here = sorted({o for o, _ in mapping.values() if o not in ("", ALL_SLOTS)})
    if slot_col is not None:
        slots_here = sorted(set(slots_here) | set(settings.slot_values.values()))
    slot_index = {s: k for k, s in enumerate(slots_here)}
    extra_cols = [c for c in range(width) if c not in mapping and c != slot_col and header[c]]
    unnamed_cols = [c for c in range(width) if not header[c]]
    # cells that would make a person present (or pick the slot): a total label there
    # marks a total row even when another cell (station, date) comes first
    label_cols = [c for c, (_, fld) in mapping.items() if fld in IDENTITY_FIELDS]
    if slot_col is not None:
        label_cols.append(slot_col)

    outcome = np.full(n_rows, OUTCOME_SKIPPED, dtype=object)
    reasons = np.empty(n_rows, dtype=object)
    n_made = np.zeros(n_rows, dtype=np.int64)
    reasons[:h] = np.where(any_filled[:h], "above the header row (title or notes)", "blank row").tolist()
    outcome[h] = OUTCOME_HEADER
    reasons[h] = "header row"

    # the rows under the header, column by column
    body = slice(h + 1, n_rows)
    m = max(n_rows - h - 1, 0)
    tbx = [t.tail(h + 1) for t in texts]
    tb = [t.values for t in tbx]
    fb = [f[body] for f in filled]
    why = np.empty(m, dtype=object)
    decided = ~any_filled[body]
    why[decided] = "blank row"

    # repeated header: as many cells as needed equal their header (in any case)
    same = np.zeros(m, dtype=np.int64)
    for c, low in enumerate(header_lower):
        if low:
            same[tbx[c].equal_lower(low)] += 1
    hit = ~decided & (same >= max(2, (n_header_cells + 1) // 2))
    why[hit] = "repeated header row"
    decided |= hit

    first = np.full(m, "", dtype=object)          # the first filled cell of each row
    if m:
        first_col = np.argmax(np.vstack(fb), axis=0)
        for c in range(width):
            rows_c = np.flatnonzero((first_col == c) & fb[c])
            first[rows_c] = tb[c][rows_c]
    # only texts that can pass are tested: folding ASCII text drops apostrophes, reads
    # other marks as spaces and upper-cases, so an ASCII text folding to "TOTAL...",
    # "SUBTOTAL..." or "GRAND TOTAL..." holds "total" once its apostrophes are dropped;
    # a total label (_TOTAL_LABEL) holds "tot" in any case
    total = _test_where(first, _Texts.of(first).containing_lower("total", drop="'`", non_ascii=True),
                        _starts_with_total)
    for c in label_cols:
        total |= _test_where(tb[c], tbx[c].containing_lower("tot"), is_total_label)
    hit = ~decided & total
    why[hit] = "total row"
    decided |= hit

    row_slot = np.full(m, -1, dtype=np.int64)      # index in slots_here, -1: none
    if slot_col is not None:
        row_slot = _by_distinct(
            tb[slot_col], lambda v: slot_index.get(settings.slot_values.get(fold_text(v).lower()), -1),
            np.int64)
    present = np.zeros((len(slots_here), m), dtype=bool)
    present_other = np.zeros(m, dtype=bool)        # an identity cell of an owner that makes no record
    generic_identity = np.zeros(m, dtype=bool)
    for c, (owner, fld) in mapping.items():
        if fld not in IDENTITY_FIELDS:
            continue
        if owner == "":
            generic_identity |= fb[c]
            for k in range(len(slots_here)):
                present[k] |= fb[c] & (row_slot == k)
        elif owner in slot_index:
            present[slot_index[owner]] |= fb[c]
        else:
            present_other |= fb[c]

    if slot_col is not None:
        hit = ~decided & (row_slot < 0) & generic_identity
        if hit.any():
            letter, known = column_letter(slot_col), ", ".join(sorted(settings.slot_values))
            why[hit] = _by_distinct(tb[slot_col][hit], lambda v: f"column {letter} value {v!r} names no "
                                                                 f"configured person (known: {known})")
        decided |= hit
    hit = ~decided & ~(present.any(axis=0) | present_other)
    if hit.any():
        why[hit] = _total_or_note([t[hit] for t in tb], [f[hit] for f in fb], first[hit])
    decided |= hit

    made = present & ~decided
    body_outcome = np.full(m, OUTCOME_SKIPPED, dtype=object)
    body_outcome[~decided] = OUTCOME_RECORD
    if (~decided).any():
        why[~decided] = _persons_reasons(made[:, ~decided], slots_here)
    outcome[body] = body_outcome
    reasons[body] = why
    n_made[body] = made.sum(axis=0)
    ledger = _frame({"source_file": np.full(n_rows, source_file, dtype=object),
                     "sheet": np.full(n_rows, sheet.name, dtype=object),
                     "row": np.arange(1, n_rows + 1, dtype=np.int64), "outcome": outcome,
                     "reason": reasons, "records": n_made},
                    text=("source_file", "sheet", "outcome", "reason"))

    # records: one per (row, slot) made, rows in order and slots in slots_here order
    pos, slot_of = np.nonzero(made.T)
    records, claims_df = _records_and_claims(cfg, settings, source_file, sheet.name, h, pos, slot_of,
                                             slots_here, mapping, row_slot, [r[body] for r in raw], tb, fb,
                                             extra_cols, unnamed_cols, header)
    return SheetResult(records, ledger, columns, claims_df, warnings)


def _persons_reasons(made: np.ndarray, slots_here: list[str]) -> np.ndarray:
    """'persons: child, parent' for every record row (``made``: slots x rows)."""
    k = made.shape[0]
    if k <= 62:
        code = (made.astype(np.int64) << np.arange(k, dtype=np.int64)[:, None]).sum(axis=0)
    else:
        code = np.unique(made.T, axis=0, return_inverse=True)[1].ravel()
    _, where, inverse = np.unique(code, return_index=True, return_inverse=True)
    labels = _objects(["persons: " + ", ".join(s for j, s in enumerate(slots_here) if made[j, i])
                       for i in where.tolist()])
    return labels[inverse.ravel()]


def _records_and_claims(cfg: LinkConfig, settings: SheetSettings, source_file: str, sheet: str, h: int,
                        pos: np.ndarray, slot_of: np.ndarray, slots_here: list[str], mapping: dict,
                        row_slot: np.ndarray, rb: list[np.ndarray], tb: list[np.ndarray],
                        fb: list[np.ndarray], extra_cols: list[int], unnamed_cols: list[int],
                        header: list[str]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The raw records (``pos``: body row of each, ``slot_of``: its slot) and the row claims."""
    obj_cols = [f + "_obj" for f in CANONICAL_FIELDS]
    if not len(pos):
        records = pd.DataFrame([], columns=["record_id", "row_key", "source_file", "sheet", "row", "slot",
                                            "extras", *obj_cols])
        claims = pd.DataFrame([], columns=list(CLAIM_COLUMNS))
    else:
        n = len(pos)
        new_row = np.ones(n, dtype=bool)                   # pos is ascending: a row's records follow one another
        new_row[1:] = pos[1:] != pos[:-1]
        rows_made = pos[new_row]
        per_row = np.cumsum(new_row) - 1                  # each record's row among rows_made
        rownums = rows_made + h + 2
        rec_rownum = pos + h + 2
        keys = _stable_ids((source_file, sheet), rownums, prefix="W")
        record_ids = _stable_ids((source_file, sheet), rec_rownum, slots_here, slot_of)
        assignments = [(header[c], c) for c in extra_cols] + [(f"column {column_letter(c)}", c)
                                                              for c in unnamed_cols]
        used = {c for _, c in assignments}
        extras = _extras_json(assignments, [t[rows_made] if c in used else None for c, t in enumerate(tb)],
                              [f[rows_made] if c in used else None for c, f in enumerate(fb)], len(rows_made))
        cols = {"record_id": record_ids, "row_key": keys[per_row],
                "source_file": np.full(n, source_file, dtype=object), "sheet": np.full(n, sheet, dtype=object),
                "row": rec_rownum.astype(np.int64),
                "slot": np.array(slots_here, dtype=object)[slot_of], "extras": extras[per_row]}
        rec_slot = row_slot[pos]
        for fld in CANONICAL_FIELDS:
            sources = [(c, owner) for c, (owner, f) in mapping.items() if f == fld]
            if not sources:                                   # a field no record of the sheet carries
                cols[fld + "_obj"] = np.full(n, _ABSENT.iloc[0], dtype=_ABSENT.dtype)
                continue
            value = np.full(n, np.nan, dtype=object)          # a field the record does not carry
            for c, owner in sources:                          # a later column overrides, as dict keys do
                source = rb[c][pos]
                if owner == ALL_SLOTS:
                    value = source
                elif owner == "":
                    value = np.where(rec_slot == slot_of, source, value)
                else:
                    value = np.where(slot_of == slots_here.index(owner), source, value)
            cols[fld + "_obj"] = value
        records = _frame(cols, text=("record_id", "row_key", "source_file", "sheet", "slot", "extras"))
        claims = _row_claims(cfg, source_file, sheet, pos, slot_of, rec_rownum, record_ids, slots_here)
    records["date_order"] = settings.date_order
    records["full_name_order"] = settings.full_name_order
    records["sex_codes"] = json.dumps(settings.sex_codes, sort_keys=True)
    return records, claims


def _row_claims(cfg: LinkConfig, source_file: str, sheet: str, pos: np.ndarray, slot_of: np.ndarray,
                rec_rownum: np.ndarray, record_ids: np.ndarray, slots_here: list[str]) -> pd.DataFrame:
    """One claim per configured (child, parent) relation whose two persons are on the same row."""
    n_body = int(pos.max()) + 1
    ids = np.empty((len(slots_here), n_body), dtype=object)
    ids[slot_of, pos] = record_ids
    made = np.zeros((len(slots_here), n_body), dtype=bool)
    made[slot_of, pos] = True
    rownum = np.zeros(n_body, dtype=np.int64)
    rownum[pos] = rec_rownum
    parts = []
    for r, (child, parent) in enumerate(cfg.relations):
        if child not in slots_here or parent not in slots_here:
            continue
        kc, kp = slots_here.index(child), slots_here.index(parent)
        rows = np.flatnonzero(made[kc] & made[kp])
        parts.append((rows, np.full(len(rows), r), ids[kc, rows], ids[kp, rows]))
    if not parts or not sum(len(p[0]) for p in parts):
        return pd.DataFrame([], columns=list(CLAIM_COLUMNS))
    rows, rel, child_ids, parent_ids = (np.concatenate(x) for x in zip(*parts))
    order = np.lexsort((rel, rows))
    rows = rownum[rows[order]]
    n = len(rows)
    return _frame(dict(zip(CLAIM_COLUMNS, (child_ids[order], parent_ids[order],
                                           np.full(n, source_file, dtype=object),
                                           np.full(n, sheet, dtype=object), rows,
                                           np.full(n, "row", dtype=object), rows.copy()))))


def ingest_file(cfg: LinkConfig, data: FileData) -> list[SheetResult]:
    """Ingest every sheet of one read file."""
    return [ingest_sheet(cfg, data.source_file, sheet) for sheet in data.sheets]


def _ledger_frame(lines) -> pd.DataFrame:
    return pd.DataFrame(lines, columns=["source_file", "sheet", "row", "outcome", "reason",
                                        "records"])


def _empty_result() -> SheetResult:
    obj_cols = [f + "_obj" for f in CANONICAL_FIELDS]
    return SheetResult(
        pd.DataFrame(columns=["record_id", "row_key", "source_file", "sheet", "row", "slot",
                              "extras", *obj_cols]),
        _ledger_frame([]),
        pd.DataFrame(columns=["source_file", "sheet", "header_row", "column", "header",
                              "mapped_to", "note"]),
        pd.DataFrame(columns=list(CLAIM_COLUMNS)))
