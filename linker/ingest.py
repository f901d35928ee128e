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
import re
from dataclasses import dataclass, field

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
    for i, row in enumerate(texts[:HEADER_SCAN_ROWS]):
        n = sum(1 for t in row if t and (fold_header(t) in vocab or
                                         (settings.slot_column and fold_header(t) == settings.slot_column)))
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


def ingest_sheet(cfg: LinkConfig, source_file: str, sheet: SheetData) -> SheetResult:
    """Classify every row of one sheet and lift its persons into raw records."""
    settings = cfg.settings_for(source_file, sheet.name)
    rows = sheet.rows
    n_rows = len(rows)
    width = max((len(r) for r in rows), default=0)
    texts = [[cell_text(v) for v in r] + [""] * (width - len(r)) for r in rows]
    ledger: list[tuple] = []
    empty = _empty_result()
    warnings: list[str] = []

    def led(row, outcome, reason, n=0):
        ledger.append((source_file, sheet.name, row, outcome, reason, n))

    if settings.skip:
        for i, t in enumerate(texts):
            led(i + 1, OUTCOME_SKIPPED, "sheet left out by a sheet rule (skip = true)" if any(t)
                else "blank row")
        if not texts:
            led("", OUTCOME_EMPTY_SHEET, "sheet left out by a sheet rule (skip = true)")
        return SheetResult(empty.records, _ledger_frame(ledger), empty.columns, empty.claims)
    if not any(any(t) for t in texts):
        led("", OUTCOME_EMPTY_SHEET, "sheet has no data")
        for i in range(n_rows):
            led(i + 1, OUTCOME_SKIPPED, "blank row")
        return SheetResult(empty.records, _ledger_frame(ledger), empty.columns, empty.claims)

    vocab = _vocabulary(settings)
    h, n_found = find_header(texts, vocab, settings, cfg.min_header_matches)
    if h is None:
        reason = (f"no header row found: no row among the first {HEADER_SCAN_ROWS} names "
                  f"{cfg.min_header_matches} or more configured columns (best row had {n_found})")
        warnings.append(f"{source_file}, sheet {sheet.name!r}: {reason}")
        for i, t in enumerate(texts):
            led(i + 1, OUTCOME_SKIPPED, reason if any(t) else "blank row")
        return SheetResult(empty.records, _ledger_frame(ledger), empty.columns, empty.claims,
                           warnings)

    header = texts[h]
    mapping, col_report, slot_col = map_columns(header, vocab, settings)
    columns = pd.DataFrame(col_report, columns=["column", "header", "mapped_to", "note"])
    columns.insert(0, "sheet", sheet.name)
    columns.insert(0, "source_file", source_file)
    columns.insert(3, "header_row", h + 1)
    header_lower = [t.lower() for t in header]
    n_header_cells = len([t for t in header if t])

    for i in range(h):
        led(i + 1, OUTCOME_SKIPPED, "above the header row (title or notes)" if any(texts[i])
            else "blank row")
    led(h + 1, OUTCOME_HEADER, "header row")

    slots_here = sorted({o for o, _ in mapping.values() if o not in ("", ALL_SLOTS)})
    if slot_col is not None:
        slots_here = sorted(set(slots_here) | set(settings.slot_values.values()))
    extra_cols = [c for c in range(width) if c not in mapping and c != slot_col and header[c]]
    unnamed_cols = [c for c in range(width) if not header[c]]
    # cells that would make a person present (or pick the slot): a total label there
    # marks a total row even when another cell (station, date) comes first
    label_cols = [c for c, (_, fld) in mapping.items() if fld in IDENTITY_FIELDS]
    if slot_col is not None:
        label_cols.append(slot_col)

    out_rows = []
    claims = []
    slot_cache: dict[str, str | None] = {}
    for i in range(h + 1, n_rows):
        t = texts[i]
        rownum = i + 1
        if not any(t):
            led(rownum, OUTCOME_SKIPPED, "blank row")
            continue
        same = sum(1 for c, x in enumerate(t) if x and x.lower() == header_lower[c])
        if same >= max(2, (n_header_cells + 1) // 2):
            led(rownum, OUTCOME_SKIPPED, "repeated header row")
            continue
        first = next(x for x in t if x)
        if fold_text(first).startswith(("TOTAL", "SUBTOTAL", "GRAND TOTAL")) or \
                any(is_total_label(t[c]) for c in label_cols):
            led(rownum, OUTCOME_SKIPPED, "total row")
            continue
        row_slot = None
        if slot_col is not None:
            value = t[slot_col]
            if value not in slot_cache:
                slot_cache[value] = settings.slot_values.get(fold_text(value).lower())
            row_slot = slot_cache[value]
        present = {}
        for c, (owner, fld) in mapping.items():
            if fld not in IDENTITY_FIELDS or not t[c]:
                continue
            slot = row_slot if owner == "" else owner
            if slot is None:
                continue
            present.setdefault(slot, True)
        if slot_col is not None and row_slot is None and any(
                t[c] for c, (o, f) in mapping.items() if o == "" and f in IDENTITY_FIELDS):
            led(rownum, OUTCOME_SKIPPED,
                f"column {column_letter(slot_col)} value {t[slot_col]!r} names no configured person "
                f"(known: {', '.join(sorted(settings.slot_values))})")
            continue
        if not present:
            led(rownum, OUTCOME_SKIPPED, _is_total_or_note(t))
            continue
        extras = {header[c]: t[c] for c in extra_cols if t[c]}
        for c in unnamed_cols:
            if t[c]:
                extras[f"column {column_letter(c)}"] = t[c]
        extras_json = json.dumps(extras, ensure_ascii=False, sort_keys=True) if extras else ""
        row_key = stable_id(source_file, sheet.name, rownum, prefix="W")
        made = {}
        for slot in slots_here:
            if slot not in present:
                continue
            rec = {"source_file": source_file, "sheet": sheet.name, "row": rownum, "slot": slot,
                   "row_key": row_key, "record_id": stable_id(source_file, sheet.name, rownum, slot),
                   "extras": extras_json}
            for c, (owner, fld) in mapping.items():
                if owner == ALL_SLOTS or owner == slot or (owner == "" and row_slot == slot):
                    rec[fld + "_obj"] = rows[i][c] if c < len(rows[i]) else None
            out_rows.append(rec)
            made[slot] = rec["record_id"]
        for child, parent in cfg.relations:
            if child in made and parent in made:
                claims.append((made[child], made[parent], source_file, sheet.name, rownum, "row", rownum))
        led(rownum, OUTCOME_RECORD, "persons: " + ", ".join(s for s in slots_here if s in made),
            len(made))

    obj_cols = [f + "_obj" for f in CANONICAL_FIELDS]
    records = pd.DataFrame(out_rows, columns=["record_id", "row_key", "source_file", "sheet",
                                              "row", "slot", "extras", *obj_cols])
    records["date_order"] = settings.date_order
    records["full_name_order"] = settings.full_name_order
    records["sex_codes"] = json.dumps(settings.sex_codes, sort_keys=True)
    claims_df = pd.DataFrame(claims, columns=list(CLAIM_COLUMNS))
    return SheetResult(records, _ledger_frame(ledger), columns, claims_df, warnings)


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
