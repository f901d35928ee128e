"""Corrections file: confirmed fixes of delivered values, applied at normalization.

Staff who have checked a value with the agency write it into a corrections
file, a CSV with one line per fix.  A line names its record either by
``fingerprint`` (:func:`linker.fingerprint.record_fingerprints` of the record
as normalized *without* corrections, so the line keeps working when the agency
re-exports its files) or by its provenance ``source_file, sheet, row, slot``
(as records.csv shows them; the sheet of a CSV file is its file name without
the extension).  Then come ``field`` (a canonical field), ``corrected_value``
(written as one would type it into that spreadsheet: a date in the sheet's
order or as ISO ``2015-02-21``, a sex code the sheet's codes know), ``reason``
and ``who``.

:func:`apply_corrections` puts the corrected value in place of the delivered
cell before normalizing, so it is read like any cell of its sheet.  The
delivered value stays in ``<field>_raw`` and the record's ``corrections``
column says what was applied, with reason and who.  A line that matches no
record is returned in ``unapplied`` (with the problem), never dropped.

Vectorized: records are matched by merges, and only the sheets holding a
corrected record are normalized a second time (the whole sheet, so a date
column's order is inferred as in the first pass); only the records on the
rows of corrected records are taken from that second pass.
"""

from __future__ import annotations

import csv
import io
import re
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from .config import LinkConfig
from .errors import LinkerError
from .fingerprint import record_fingerprints
from .io import decode_text
from .records import normalize_records
from .schema import CANONICAL_FIELDS, PROVENANCE

__all__ = ["CORRECTION_COLUMNS", "APPLIED_COLUMNS", "UNAPPLIED_COLUMNS", "CorrectionsError",
           "CorrectionResult", "read_corrections", "apply_corrections", "correction_texts"]

KEY_COLUMNS = ("fingerprint", *PROVENANCE)
VALUE_COLUMNS = ("field", "corrected_value", "reason", "who")
FILE_COLUMNS = KEY_COLUMNS + VALUE_COLUMNS
# read_corrections: ``line`` is the line of the file (the header is line 1); the rest is text
CORRECTION_COLUMNS = ("line", *FILE_COLUMNS)
# apply_corrections: one line per (correction line, record) applied
APPLIED_COLUMNS = ("line", "record_id", "fingerprint", *PROVENANCE, "field", "delivered_value",
                   "corrected_value", "reason", "who")
UNAPPLIED_COLUMNS = CORRECTION_COLUMNS + ("problem",)

SEPARATOR = " | "                       # between two corrections of one record
_FINGERPRINT = re.compile(r"^F[0-9a-f]{16}$")
_DELIMITERS = (",", ";", "\t")
NAME_PARTS = ("given_name", "family_name")


class CorrectionsError(LinkerError):
    """A corrections file cannot be used.  Names the file and, where known, its line and column."""

    exit_code = 3

    def __init__(self, file, problem: str, line: int | None = None, column: str | None = None):
        self.file = str(file)
        self.line = line
        self.column = column
        self.problem = problem
        parts = [self.file]
        if line is not None:
            parts.append(f"line {line}")
        if column is not None:
            parts.append(f"column {column!r}")
        super().__init__(", ".join(parts) + ": " + problem)


@dataclass
class CorrectionResult:
    """What :func:`apply_corrections` did.

    ``records``: the record table with the corrections applied;
    ``applied``: :data:`APPLIED_COLUMNS`, one line per correction and record;
    ``unapplied``: :data:`UNAPPLIED_COLUMNS`, the lines that changed no record.
    """

    records: pd.DataFrame
    applied: pd.DataFrame
    unapplied: pd.DataFrame
    source: str = "corrections file"

    @property
    def warnings(self) -> list[str]:
        """One line per unapplied correction (line, field and why; no values)."""
        return [f"{self.source}, line {line}: the correction of {fld} was not applied: {problem}"
                for line, fld, problem in self.unapplied[["line", "field", "problem"]].itertuples(index=False)]


# ---------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------
def read_corrections(path: str | Path) -> pd.DataFrame:
    """Read and check a corrections file.

    Returns
    -------
    DataFrame
        :data:`CORRECTION_COLUMNS`: ``line`` (int: the line as a spreadsheet
        numbers it, the header is line 1) and the file's columns as stripped
        text (absent key columns are ""; ``field`` in lower case).
        Blank lines are skipped; a line repeating an earlier one's record,
        field and corrected value is left out (the first one counts).

    Raises
    ------
    CorrectionsError
        Naming the file, line and column: unreadable file, unknown or
        missing columns, a line naming its record both or neither way, a
        malformed fingerprint or row, an unknown field, an empty
        corrected_value without a reason, two lines giving one field of one
        record different values.
    """
    name = str(path)
    rows = _read_rows(Path(path), name)
    if not rows or not any(cell.strip() for cell in rows[0]):
        raise CorrectionsError(name, "the file is empty; its first line must name the columns", line=1)
    columns = _header(rows[0], name)
    width = len(rows[0])
    lines = []
    for number, cells in enumerate(rows[1:], start=2):
        if not any(cell.strip() for cell in cells):
            continue
        if len(cells) > width and any(c.strip() for c in cells[width:]):
            raise CorrectionsError(name, f"the line has {len(cells)} cells, the header names {width}",
                                   line=number)
        cells = [c.strip() for c in cells[:width]] + [""] * (width - len(cells))
        values = {col: "" for col in FILE_COLUMNS}
        values.update({col: cells[i] for i, col in columns.items()})
        lines.append(_check_line(values, number, name))
    frame = pd.DataFrame(lines, columns=list(CORRECTION_COLUMNS))
    frame["line"] = frame["line"].astype(int)
    frame = _drop_repeats(frame, name)
    frame.attrs["source"] = name
    return frame


def _read_rows(path: Path, name: str) -> list[list[str]]:
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise CorrectionsError(name, f"cannot open the corrections file ({exc.strerror or exc})") from None
    if b"\x00" in data[:4096]:
        raise CorrectionsError(name, "the file holds binary data; save the corrections as CSV")
    text, _encoding = decode_text(data)
    first = text.splitlines()[0] if text.strip() else ""
    # the delimiter that splits the header line into the most known column names
    delimiter = max(_DELIMITERS, key=lambda d: sum(_fold(c.strip().strip('"')) in FILE_COLUMNS
                                                  for c in first.split(d)))
    try:
        return list(csv.reader(io.StringIO(text, newline=""), delimiter=delimiter))
    except csv.Error as exc:
        raise CorrectionsError(name, f"malformed CSV ({exc})") from None


def _fold(header: str) -> str:
    return header.strip().lower().replace(" ", "_")


def _header(cells: list[str], name: str) -> dict[int, str]:
    """Column index -> known column; unknown, repeated or missing columns raise."""
    columns: dict[int, str] = {}
    for i, cell in enumerate(cells):
        col = _fold(cell)
        if not col:
            continue
        if col not in FILE_COLUMNS:
            raise CorrectionsError(name, f"unknown column (known: {', '.join(FILE_COLUMNS)})",
                                   line=1, column=cell.strip())
        if col in columns.values():
            raise CorrectionsError(name, "this column is named twice", line=1, column=cell.strip())
        columns[i] = col
    named = set(columns.values())
    missing = [c for c in VALUE_COLUMNS if c not in named]
    if missing:
        raise CorrectionsError(name, f"missing column(s): {', '.join(missing)}", line=1)
    if "fingerprint" not in named and not set(PROVENANCE) <= named:
        lacking = [c for c in PROVENANCE if c not in named]
        raise CorrectionsError(name, "a record is named by a fingerprint column or by the columns "
                                     f"{', '.join(PROVENANCE)}; missing: fingerprint or "
                                     f"{', '.join(lacking)}", line=1)
    return columns


def _check_line(values: dict, number: int, name: str) -> dict:
    """One data line, checked; ``row`` canonical ("007" -> "7")."""
    given = [c for c in PROVENANCE if values[c]]
    if values["fingerprint"] and given:
        raise CorrectionsError(name, "name the record either by fingerprint or by "
                                     f"{', '.join(PROVENANCE)}, not both", line=number,
                               column="fingerprint")
    if not values["fingerprint"]:
        lacking = [c for c in PROVENANCE if not values[c]]
        if lacking:
            raise CorrectionsError(name, "no fingerprint, so the record needs "
                                         f"{', '.join(PROVENANCE)}; this one is empty",
                                   line=number, column=lacking[0])
        if not values["row"].isdigit() or int(values["row"]) < 1:
            raise CorrectionsError(name, "row must be a row number (1 or more, as the spreadsheet shows it)",
                                   line=number, column="row")
        values["row"] = str(int(values["row"]))
    else:
        values["fingerprint"] = values["fingerprint"][:1].upper() + values["fingerprint"][1:].lower()
        if not _FINGERPRINT.match(values["fingerprint"]):
            raise CorrectionsError(name, "a fingerprint is the letter F and 16 hex digits (0-9, a-f)",
                                   line=number, column="fingerprint")
    values["field"] = values["field"].lower()
    if values["field"] not in CANONICAL_FIELDS:
        shown = values["field"] or "(empty)"
        raise CorrectionsError(name, f"unknown field {shown!r} (known: {', '.join(CANONICAL_FIELDS)})",
                               line=number, column="field")
    if not values["corrected_value"] and not values["reason"]:
        raise CorrectionsError(name, "an empty corrected_value blanks the cell and needs a reason",
                               line=number, column="reason")
    return {"line": number, **values}


def _drop_repeats(frame: pd.DataFrame, name: str) -> pd.DataFrame:
    """Leave out exact repeats of (record, field, value); two values for one field raise."""
    key = list(KEY_COLUMNS) + ["field"]
    values = frame.groupby(key, sort=False)["corrected_value"].transform("nunique")
    if (values > 1).any():
        clash = frame[values > 1]
        first = clash.groupby(key, sort=False)["line"].transform("min")
        later = clash[clash["line"] != first].iloc[0]
        before = int(first[later.name])
        raise CorrectionsError(name, f"line {before} corrects the same field of the same record to "
                                     "another value; keep one of the two lines",
                               line=int(later["line"]), column="corrected_value")
    return frame.drop_duplicates(key + ["corrected_value"], keep="first").reset_index(drop=True)


# ---------------------------------------------------------------------------
# Applying
# ---------------------------------------------------------------------------
def apply_corrections(raw: pd.DataFrame, corrections: pd.DataFrame, cfg: LinkConfig,
                      records: pd.DataFrame | None = None, source: str | None = None) -> CorrectionResult:
    """Normalize ``raw`` with the corrections in place of the delivered values.

    Parameters
    ----------
    raw : DataFrame
        Raw records as :func:`linker.records.normalize_records` takes them.
    corrections : DataFrame
        :func:`read_corrections` output.
    cfg : LinkConfig
    records : DataFrame, optional
        ``normalize_records(raw, cfg)`` (without corrections) when already
        made; fingerprints are taken from it.
    source : str, optional
        Name of the corrections file in warnings (default: the name
        :func:`read_corrections` saw).

    Returns
    -------
    CorrectionResult
        A fingerprint line applies to every record with that fingerprint.
        A line naming ``given_name`` or ``family_name`` of a record whose name
        comes from its full-name cell, or ``full_name`` of a record whose name
        comes from given/family cells, would change nothing and is unapplied.

    Raises
    ------
    CorrectionsError
        When two lines (one by fingerprint, one by provenance) give one field
        of one record different values.
    """
    source = source or corrections.attrs.get("source", "corrections file")
    base = normalize_records(raw, cfg) if records is None else records.reset_index(drop=True)
    corrections = corrections.reindex(columns=list(CORRECTION_COLUMNS)).fillna("")
    targets = base[["record_id", *PROVENANCE]].astype(str)
    targets["fingerprint"] = record_fingerprints(base).to_numpy() if len(base) else ""
    hits, unapplied = _match(targets, corrections)
    hits, blocked = _name_source(hits, base, targets)
    unapplied = pd.concat([unapplied, blocked]) if len(blocked) else unapplied
    unapplied = unapplied.sort_values("line", kind="mergesort").reset_index(drop=True)
    hits = _one_value_per_cell(hits, source)
    if hits.empty:
        return CorrectionResult(base, _empty(APPLIED_COLUMNS), unapplied, source)
    applied = _applied_table(hits, base, targets)
    fixed = _renormalize(raw, hits, cfg)
    fixed = _keep_delivered(fixed, applied)
    return CorrectionResult(_replace(base, fixed), applied, unapplied, source)


def correction_texts(applied: pd.DataFrame) -> pd.Series:
    """The ``corrections`` text of each corrected record (index: record_id).

    One item per field, ``birth_date: '31/02/2015' -> '21/02/2015' (reason; who)``,
    fields in canonical order, items joined by :data:`SEPARATOR`.
    """
    if applied.empty:
        return pd.Series(dtype=object)
    why = (applied["reason"].astype(str) + "; " + applied["who"].astype(str)).str.strip("; ")
    why = why.where(why == "", " (" + why + ")")
    items = (applied["field"] + ": " + applied["delivered_value"].map(repr) + " -> "
             + applied["corrected_value"].map(repr) + why)
    order = applied["field"].map({f: i for i, f in enumerate(CANONICAL_FIELDS)})
    frame = pd.DataFrame({"record_id": applied["record_id"], "order": order, "line": applied["line"],
                          "item": items}).sort_values(["record_id", "order", "line"], kind="mergesort")
    return frame.groupby("record_id", sort=False)["item"].agg(SEPARATOR.join)


def _match(targets: pd.DataFrame, corrections: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(line, field, corrected_value, reason, who, record_id) per matched record; unmatched lines."""
    by_fp = corrections["fingerprint"] != ""
    keep = ["line", "field", "corrected_value", "reason", "who"]
    m_fp = corrections.loc[by_fp, ["fingerprint", *keep]].merge(
        targets[["fingerprint", "record_id"]], on="fingerprint", how="left")
    m_pv = corrections.loc[~by_fp, [*PROVENANCE, *keep]].merge(
        targets[["record_id", *PROVENANCE]], on=list(PROVENANCE), how="left")
    hits = pd.concat([m_fp[keep + ["record_id"]], m_pv[keep + ["record_id"]]], ignore_index=True)
    missed = hits.loc[hits["record_id"].isna(), "line"]
    unapplied = corrections[corrections["line"].isin(missed)].copy()
    unapplied["problem"] = (unapplied["fingerprint"] != "").map(
        {True: "no record has this fingerprint",
         False: "no record at this source_file, sheet, row and slot"})
    hits = hits.dropna(subset=["record_id"]).sort_values("line", kind="mergesort")
    return hits.reset_index(drop=True), unapplied.reindex(columns=list(UNAPPLIED_COLUMNS))


def _name_source(hits: pd.DataFrame, base: pd.DataFrame,
                 targets: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Split off corrections of a name cell the normalizer does not read for that record.

    The normalizer reads the full-name cell only when the given and family
    name cells are both empty (:func:`linker.normalize.normalize_name`).
    """
    rec = base.set_index("record_id")
    parts = (rec["given_name_raw"].astype(str) != "") | (rec["family_name_raw"].astype(str) != "")
    full = rec["full_name_raw"].astype(str) != ""
    from_full = (~parts & full).reindex(hits["record_id"]).to_numpy(dtype=bool)
    from_parts = parts.reindex(hits["record_id"]).to_numpy(dtype=bool)
    part_of_full = hits["field"].isin(NAME_PARTS).to_numpy() & from_full
    full_of_parts = (hits["field"] == "full_name").to_numpy() & from_parts
    bad = part_of_full | full_of_parts
    if not bad.any():
        return hits, _empty(UNAPPLIED_COLUMNS)
    problem = pd.Series("", index=hits.index, dtype=object)
    problem[part_of_full] = "the record's name comes from its full-name cell; correct full_name instead"
    problem[full_of_parts] = ("the record's name comes from its given and family name cells; "
                              "correct given_name or family_name instead")
    blocked = hits[bad].assign(problem=problem[bad]).merge(targets, on="record_id", how="left")
    return hits[~bad].reset_index(drop=True), blocked.reindex(columns=list(UNAPPLIED_COLUMNS))


def _one_value_per_cell(hits: pd.DataFrame, source: str) -> pd.DataFrame:
    """One correction per (record, field): the first line; different values raise."""
    key = ["record_id", "field"]
    values = hits.groupby(key, sort=False)["corrected_value"].transform("nunique")
    if (values > 1).any():
        clash = hits[values > 1].sort_values("line", kind="mergesort")
        first = clash.groupby(key, sort=False)["line"].transform("min")
        later = clash[clash["line"] != first].iloc[0]
        raise CorrectionsError(source, f"this line and line {int(first[later.name])} name the same "
                                       "record (one by fingerprint, one by provenance) and give its "
                                       "field different values; keep one of the two lines",
                               line=int(later["line"]), column="corrected_value")
    return hits.drop_duplicates(key, keep="first").reset_index(drop=True)


def _renormalize(raw: pd.DataFrame, hits: pd.DataFrame, cfg: LinkConfig) -> pd.DataFrame:
    """Records of the rows holding corrected records, normalized with the corrected cells.

    Whole sheets are normalized again, so that the date order of a column is
    inferred from the same cells as in the first pass.
    """
    raw = raw.reset_index(drop=True)
    hit_rows = raw["record_id"].isin(hits["record_id"])
    sheets = raw.loc[hit_rows, ["source_file", "sheet"]].drop_duplicates()
    in_sheets = raw[["source_file", "sheet"]].merge(sheets, how="left", indicator=True)["_merge"] == "both"
    sub = raw[in_sheets.to_numpy()].copy()
    for fld, group in hits.groupby("field", sort=True):
        col = fld + "_obj"
        if col not in sub.columns:
            sub[col] = None
        value = sub["record_id"].map(group.set_index("record_id")["corrected_value"])
        mask = value.notna()
        sub[col] = sub[col].astype(object)
        sub.loc[mask, col] = value[mask]
    fixed = normalize_records(sub, cfg)
    row_keys = raw.loc[hit_rows, "row_key"]
    fixed = fixed[fixed["row_key"].isin(row_keys)].reset_index(drop=True)
    return fixed


def _applied_table(hits: pd.DataFrame, base: pd.DataFrame, targets: pd.DataFrame) -> pd.DataFrame:
    """:data:`APPLIED_COLUMNS` for the matched corrections, in line order."""
    rec = base.set_index("record_id")
    delivered = pd.Series("", index=hits.index, dtype=object)
    for fld, group in hits.groupby("field", sort=True):
        delivered[group.index] = rec[fld + "_raw"].reindex(group["record_id"]).astype(str).to_numpy()
    out = hits.assign(delivered_value=delivered)
    info = targets.drop(columns=list(PROVENANCE)).merge(base[["record_id", *PROVENANCE]], on="record_id")
    out = out.merge(info, on="record_id", how="left")
    return out[list(APPLIED_COLUMNS)].reset_index(drop=True)


def _keep_delivered(fixed: pd.DataFrame, applied: pd.DataFrame) -> pd.DataFrame:
    """Delivered values back into ``<field>_raw`` of the corrected cells; the ``corrections`` column."""
    fixed = fixed.copy()
    for fld, group in applied.groupby("field", sort=True):
        value = fixed["record_id"].map(group.set_index("record_id")["delivered_value"])
        mask = value.notna()
        fixed.loc[mask, fld + "_raw"] = value[mask]
    texts = fixed["record_id"].map(correction_texts(applied))
    fixed["corrections"] = texts.fillna("").astype(object)
    return fixed


def _replace(base: pd.DataFrame, fixed: pd.DataFrame) -> pd.DataFrame:
    """``base`` with its lines replaced by those of ``fixed`` (same record_id), order kept."""
    out = base.copy()
    where = pd.Series(out.index, index=out["record_id"]).reindex(fixed["record_id"]).to_numpy()
    for col in out.columns:
        out.loc[where, col] = pd.array(fixed[col].to_numpy(), dtype=out[col].dtype)
    return out


def _empty(columns) -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
