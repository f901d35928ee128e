"""The review workbook (review.xlsx): pairs put in front of a reviewer, and their decisions read back.

Out: :func:`review_pairs` picks the pairs a person should look at and puts
them in order; :func:`review_lines` lays them out side by side with the
provenance of both records; :func:`write_review` writes the workbook,
formula-safe, byte-deterministic and atomically.

In: :func:`read_review` reads the reviewer's decisions back, all or nothing.
Any problem (not a workbook, a decision outside the list, an edited value that
must not change, an unknown pair, one pair with two different decisions)
raises :class:`ReviewError` naming workbook, sheet, row and column, and
nothing is returned.

Decisions are leads for qualified staff, never determinations: a "same
person" decision says the two records should be treated as one person until
someone verifies it, nothing more.

Who decided and when is not read from the workbook: the importer supplies
the reviewer's name and the time (a CLI flag), so a workbook passed from hand
to hand cannot claim a name it was not given.
"""

from __future__ import annotations

import datetime as dt
import hashlib
from pathlib import Path

import pandas as pd

from .errors import LinkerError
from .fingerprint import pair_keys, record_fingerprints
from .queries import (
    ANSWER_FILL,
    FIXED_STAMP,
    HEADER_FILL,
    fill_sheet,
    save_book,
    put_cell,
    row_values,
    text_frame,
    column_width,
    cell_text,
)
from .schema import FINDING_COLUMNS

__all__ = [
    "DECISIONS", "DECISION_LABELS", "ReviewError",
    "review_pairs", "review_lines", "write_review", "read_review",
]

# ---------------------------------------------------------------------------
# Vocabulary and layout
# ---------------------------------------------------------------------------
DECISIONS = ("same", "different", "unsure")
DECISION_LABELS = {"same": "same person", "different": "different people", "unsure": "not sure"}
_LABEL_TO_CODE = {**{v: k for k, v in DECISION_LABELS.items()}, **{k: k for k in DECISIONS}}

README_TITLE = "read me"
PAIRS_TITLE = "pairs"

PAIR_ID = "pair_id"
DECISION = "decision"
NOTE = "note"
CHECK = "check"                         # hidden column: checksum of the line
EDITABLE = (DECISION, NOTE)
EARLIER = ("earlier decision", "earlier decision by", "earlier decision at")

# what the pipeline decided -> words on the sheet
LINKER_WORDS = {"link": "linked", "review": "for review"}
# where a pair's records came from: table column stem -> sheet heading
PROVENANCE_HEADS = {"source_file": "file", "sheet": "sheet", "row": "row", "slot": "slot"}

# Columns review_pairs adds to the pairs table (besides renaming decision -> linker_decision).
ADDED_COLUMNS = ("pair_id", "rank", "fp_a", "fp_b", "pair_lines", "error_finding", "child", "entity_size",
                 "findings", "decision", "note", "reviewer", "decided_at")

_CHECK_VERSION = "c1"
_CELL_DIGEST = 4                        # hex digits per cell in the check value
_SEP_FIELD, _SEP_ITEM = "\x1f", "\x1e"

READ_ERRORS_SHOWN = 20                  # problems listed in one ReviewError message


class ReviewError(LinkerError):
    """A review workbook cannot be imported.  Names workbook and, where known, sheet/row/column.

    ``problems`` lists every problem found (dicts with sheet, row, column,
    problem); the message shows the first :data:`READ_ERRORS_SHOWN`.
    """

    exit_code = 3

    def __init__(self, workbook, problem: str, sheet: str | None = None, row: int | None = None,
                 column: str | None = None, problems: list[dict] | None = None):
        self.workbook = str(workbook)
        self.file = self.workbook
        self.sheet, self.row, self.column, self.problem = sheet, row, column, problem
        self.problems = problems or [{"sheet": sheet, "row": row, "column": column, "problem": problem}]
        lines = [_where(self.workbook, p) for p in self.problems[:READ_ERRORS_SHOWN]]
        if len(self.problems) > READ_ERRORS_SHOWN:
            lines.append(f"... and {len(self.problems) - READ_ERRORS_SHOWN} more problems")
        head = "" if len(self.problems) == 1 else (
            f"{self.workbook}: {len(self.problems)} problems, nothing imported:\n")
        super().__init__(head + "\n".join(lines))


def _where(workbook: str, p: dict) -> str:
    parts = [workbook]
    if p.get("sheet") is not None:
        parts.append(f"sheet {p['sheet']!r}")
    if p.get("row") is not None:
        parts.append(f"row {p['row']}")
    if p.get("column") is not None:
        parts.append(f"column {p['column']!r}")
    return ", ".join(parts) + ": " + p["problem"]


# ---------------------------------------------------------------------------
# Which pairs, in which order (pure)
# ---------------------------------------------------------------------------
def compared_fields(pairs: pd.DataFrame) -> list[str]:
    """The compared fields of a pairs table: names with both ``<f>_level`` and ``<f>_weight``."""
    cols = set(pairs.columns)
    return [c[:-len("_level")] for c in pairs.columns
            if c.endswith("_level") and c[:-len("_level")] + "_weight" in cols]


def review_pairs(records: pd.DataFrame, pairs: pd.DataFrame, findings: pd.DataFrame,
                 decisions: pd.DataFrame | None = None, *, child_slot: str = "child") -> pd.DataFrame:
    """The pairs to put in front of a reviewer, most consequential first.

    Which pairs: every pair the linker sent to review (``decision ==
    "review"``), plus every linked pair (``"link"``) that touches a record with
    a finding -- a check on the linked person found something odd, and the
    link itself may be the cause.

    Order (one rule, applied key by key):

    1. with ``decisions``: pairs nobody has decided yet first, decided ones after;
    2. pairs touching a record with an *error* finding (the values cannot all
       be right: a wrong link is the likeliest cause);
    3. pairs involving a record in the ``child_slot`` (a wrong link there
       mixes up a child's custody and family history);
    4. pairs whose decision would join or split the most records: the sum of
       the sizes of the two records' entities, largest first;
    5. the probability nearest 0.5 first (the model is least sure);
    6. ties by ``pair_id``, then record ids.

    Parameters
    ----------
    records
        records.csv rows with ``record_id``, ``slot``, the fingerprint fields
        and (optional) ``entity_id``.
    pairs
        :func:`linker.link.pairs_table` output.
    findings
        findings.csv rows (``rule``, ``severity``, ``record_id``, ...).
    decisions
        Earlier decisions: ``pair_id``, ``decision`` (same / different /
        unsure), ``reviewer``, ``decided_at``, ``note``.  Several per pair: the
        latest ``decided_at`` (text order, ISO times) wins, ties by the last line.

    Returns
    -------
    DataFrame
        The pairs-table columns (its ``decision`` renamed ``linker_decision``)
        plus ``pair_id``, ``rank`` (1 = look first), ``fp_a``, ``fp_b``,
        ``pair_lines`` (lines sharing this pair_id: records with identical
        compared values give the same pair_id; one decision covers them all),
        ``error_finding``, ``child``, ``entity_size``, ``findings`` (the rules
        raised on record A and on record B, in words) and the earlier
        ``decision``, ``note``, ``reviewer``, ``decided_at`` ("" when none).
    """
    fields_present = pairs is not None and {"record_a", "record_b", "decision", "probability"} <= set(
        pairs.columns)
    if not fields_present:
        return _empty_table(pairs)
    rec = records.drop_duplicates("record_id").set_index("record_id", drop=False)
    f = text_frame(findings, FINDING_COLUMNS)
    touched = pd.Index(f["record_id"].unique())
    on_a, on_b = pairs["record_a"].isin(touched), pairs["record_b"].isin(touched)
    keep = pairs["decision"].eq("review") | (pairs["decision"].eq("link") & (on_a | on_b))
    p = pairs[keep].rename(columns={"decision": "linker_decision"}).reset_index(drop=True)

    a, b = p["record_a"], p["record_b"]
    unknown = sorted(set(a[~a.isin(rec.index)]) | set(b[~b.isin(rec.index)]))
    if unknown:
        raise ValueError(f"pairs name {len(unknown)} record ids not in records, e.g. {unknown[0]}")
    fp = pd.Series(record_fingerprints(rec).to_numpy(), index=rec.index)
    p["fp_a"], p["fp_b"] = a.map(fp), b.map(fp)
    p["pair_id"] = pair_keys(p["fp_a"], p["fp_b"]).to_numpy()
    p["pair_lines"] = p.groupby("pair_id")["pair_id"].transform("size").astype(int)

    errors = pd.Index(f.loc[f["severity"].str.casefold().eq("error"), "record_id"].unique())
    p["error_finding"] = a.isin(errors) | b.isin(errors)
    slot = rec["slot"].astype(str).str.casefold() if "slot" in rec else pd.Series("", index=rec.index)
    child = slot.eq(child_slot.casefold())
    p["child"] = a.map(child).astype(bool) | b.map(child).astype(bool)
    size = _entity_sizes(rec)
    p["entity_size"] = (a.map(size) + b.map(size)).astype(int)
    said = _findings_by_record(f)
    p["findings"] = _both_sides(a.map(said).fillna("").astype(str), b.map(said).fillna("").astype(str))

    p = _with_earlier(p, decisions)
    p["_decided"] = p["decision"].ne("")
    p["_uncertainty"] = (pd.to_numeric(p["probability"], errors="coerce") - 0.5).abs().fillna(1.0)
    p = p.sort_values(["_decided", "error_finding", "child", "entity_size", "_uncertainty",
                       "pair_id", "record_a", "record_b"],
                      ascending=[True, False, False, False, True, True, True, True], kind="mergesort")
    p = p.drop(columns=["_decided", "_uncertainty"]).reset_index(drop=True)
    p.insert(0, "rank", range(1, len(p) + 1))
    p.insert(0, "pair_id", p.pop("pair_id"))
    return p


def _empty_table(pairs: pd.DataFrame | None) -> pd.DataFrame:
    cols = [] if pairs is None else [("linker_decision" if c == "decision" else c) for c in pairs.columns]
    base = ["record_a", "record_b", "linker_decision", "probability", "weight"]
    cols = list(ADDED_COLUMNS[:2]) + [c for c in base + cols if c not in ADDED_COLUMNS] + list(ADDED_COLUMNS[2:])
    return pd.DataFrame(columns=list(dict.fromkeys(cols)), dtype=object)


def _entity_sizes(rec: pd.DataFrame) -> pd.Series:
    """Records in each record's entity (1 for every record when there are no entity ids)."""
    if "entity_id" not in rec:
        return pd.Series(1, index=rec.index)
    ent = rec["entity_id"].astype(str)
    return ent.map(ent.value_counts()).astype(int)


def _findings_by_record(f: pd.DataFrame) -> pd.Series:
    """Per record id: its distinct findings as "rule (severity)", sorted, comma separated."""
    if f.empty:
        return pd.Series(dtype=object)
    said = (f["rule"] + " (" + f["severity"] + ")").rename("said")
    table = pd.DataFrame({"record_id": f["record_id"], "said": said}).drop_duplicates()
    table = table.sort_values(["record_id", "said"], kind="mergesort")
    return table.groupby("record_id", sort=True)["said"].agg(", ".join)


def _both_sides(a: pd.Series, b: pd.Series) -> pd.Series:
    a_part = ("A: " + a).where(a.ne(""), "")
    b_part = ("B: " + b).where(b.ne(""), "")
    sep = pd.Series("; ", index=a.index).where(a.ne("") & b.ne(""), "")
    return a_part + sep + b_part


def _with_earlier(p: pd.DataFrame, decisions: pd.DataFrame | None) -> pd.DataFrame:
    """Add the latest earlier decision of each pair (``decision``, ``note``, ``reviewer``, ``decided_at``)."""
    cols = ["decision", "note", "reviewer", "decided_at"]
    d = text_frame(decisions, ["pair_id", *cols])
    d["decision"] = d["decision"].str.strip()
    bad = d.loc[~d["decision"].isin(DECISIONS), "decision"]
    if len(bad):
        raise ReviewError("earlier decisions", f"decision {bad.iloc[0]!r} is not one of "
                                               f"{', '.join(DECISIONS)}", column="decision")
    d = d.reset_index(drop=True).reset_index(names="_line")
    d = d.sort_values(["pair_id", "decided_at", "_line"], kind="mergesort").drop_duplicates(
        "pair_id", keep="last")
    out = p.merge(d[["pair_id", *cols]], on="pair_id", how="left", validate="many_to_one")
    out[cols] = out[cols].fillna("")
    return out


# ---------------------------------------------------------------------------
# The pairs sheet, side by side (pure)
# ---------------------------------------------------------------------------
def review_lines(table: pd.DataFrame, records: pd.DataFrame) -> pd.DataFrame:
    """One sheet line per pair, with the workbook's headings, in ``table`` order.

    pair_id, rank, probability, weight, linker decision, checks on these
    records; per compared field: value A, value B, level, weight; provenance of
    A then of B (file, sheet, row, slot); record A, record B; the earlier
    decision (label, by, at); then the editable ``decision`` (label, pre-filled
    from the earlier decision) and ``note``.  Values are those the linker
    compared (normalized); a birth date known only from a stated age shows
    the range it allows.
    """
    fields = compared_fields(table)
    rec = records.drop_duplicates("record_id").set_index("record_id", drop=False)
    a, b = table["record_a"].astype(str), table["record_b"].astype(str)
    out = {
        PAIR_ID: table["pair_id"].astype(str),
        "rank": table["rank"].astype(int),
        "probability": pd.to_numeric(table["probability"], errors="coerce"),
        "weight": pd.to_numeric(table["weight"], errors="coerce"),
        "linker decision": table["linker_decision"].map(LINKER_WORDS).fillna(table["linker_decision"]),
        "checks on these records": table.get("findings", pd.Series("", index=table.index)),
        "lines with this pair_id": table.get("pair_lines", pd.Series(1, index=table.index)).astype(int),
    }
    for fld in fields:
        shown = _shown_values(rec, fld)
        head = fld.replace("_", " ")
        out[f"{head} A"] = a.map(shown).fillna("")
        out[f"{head} B"] = b.map(shown).fillna("")
        out[f"{head} level"] = table[f"{fld}_level"].astype(str).str.replace("_", " ")
        out[f"{head} weight"] = pd.to_numeric(table[f"{fld}_weight"], errors="coerce")
    for side, ids in (("A", a), ("B", b)):
        for col, head in PROVENANCE_HEADS.items():
            values = (rec[col].astype(object).where(rec[col].notna(), "").astype(str)
                      if col in rec else pd.Series("", index=rec.index))
            mapped = ids.map(values).fillna("")
            out[f"{head} {side}"] = (row_values(mapped, pd.to_numeric(mapped, errors="coerce"))
                                     if col == "row" else mapped)
    out["record A"], out["record B"] = a, b
    earlier = table.get("decision", pd.Series("", index=table.index)).fillna("").astype(str)
    out["earlier decision"] = earlier.map(DECISION_LABELS).fillna("")
    out["earlier decision by"] = table.get("reviewer", pd.Series("", index=table.index)).fillna("")
    out["earlier decision at"] = table.get("decided_at", pd.Series("", index=table.index)).fillna("")
    out[DECISION] = out["earlier decision"]
    out[NOTE] = table.get("note", pd.Series("", index=table.index)).fillna("")
    frame = pd.DataFrame({k: (list(v) if not isinstance(v, pd.Series) else v.reset_index(drop=True))
                          for k, v in out.items()})
    return frame.astype(object)


def _shown_values(rec: pd.DataFrame, fld: str) -> pd.Series:
    """The value of ``fld`` per record id, or the range a stated age allows when it is empty."""
    if fld not in rec:
        return pd.Series("", index=rec.index)
    v = rec[fld].astype(object).where(rec[fld].notna(), "").astype(str)
    lo_col, hi_col = f"{fld}_min", f"{fld}_max"
    if lo_col in rec and hi_col in rec:
        lo = rec[lo_col].astype(object).where(rec[lo_col].notna(), "").astype(str)
        hi = rec[hi_col].astype(object).where(rec[hi_col].notna(), "").astype(str)
        ranged = "between " + lo + " and " + hi + " (from age)"
        v = v.where(v.ne("") | lo.eq("") | hi.eq(""), ranged)
    return v


# ---------------------------------------------------------------------------
# Checksums of a line
# ---------------------------------------------------------------------------
def _canon(value) -> str:
    """A cell value as text, the same whether written or read back (3 and 3.0 agree)."""
    if value is None:
        return ""
    if isinstance(value, bool):
        return str(value)
    if isinstance(value, (int, float)):
        return repr(float(value))
    if isinstance(value, (dt.datetime, dt.date, dt.time)):
        return value.isoformat()
    return str(value)


def _sha(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _line_check(heads: list[str], values: list, decision_code: str, note) -> str:
    """Check value of one line: digest of the locked values, a short digest per locked cell,
    and a digest of the decision and note as written (to tell a pre-filled decision kept as is)."""
    items = [h + _SEP_FIELD + _canon(v) for h, v in zip(heads, values)]
    cells = "".join(_sha(i)[:_CELL_DIGEST] for i in items)
    return ".".join((_CHECK_VERSION, _sha(_SEP_ITEM.join(items)), cells, _editable_digest(decision_code, note)))


def _editable_digest(decision_code: str, note) -> str:
    return _sha(decision_code + _SEP_FIELD + _canon(note))[:16]


# ---------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------
def write_review(table: pd.DataFrame, records: pd.DataFrame, path: str | Path,
                 stamp: dt.datetime = FIXED_STAMP) -> Path:
    """Write the review workbook for ``table`` (:func:`review_pairs` output) atomically.

    Sheets "read me" and "pairs".  The pairs sheet is protected (no password:
    it only guards against accidental edits) with only the ``decision`` and
    ``note`` cells unlocked; filtering, sorting and resizing stay allowed.
    ``decision`` has a dropdown of :data:`DECISION_LABELS`.  A hidden last
    column ``check`` holds a checksum of every other value on the line, so
    :func:`read_review` can tell an edited line.  Same table, same bytes.
    """
    from openpyxl import Workbook

    lines = review_lines(table, records)
    book = Workbook()
    book.remove(book.active)
    readme = book.create_sheet(README_TITLE)
    fill_sheet(readme, readme_sheet(lines), readme=True)
    readme.protection.sheet = True
    _fill_pairs(book.create_sheet(PAIRS_TITLE), lines)
    return save_book(book, path, stamp)


def _fill_pairs(sheet, lines: pd.DataFrame) -> None:
    from openpyxl.styles import Font, PatternFill, Protection
    from openpyxl.utils import get_column_letter
    from openpyxl.worksheet.datavalidation import DataValidation

    heads = [str(c) for c in lines.columns]
    locked_heads = [h for h in heads if h not in EDITABLE]
    values = [[cell_text(v) for v in row] for row in lines.itertuples(index=False, name=None)]
    pos = {h: i for i, h in enumerate(heads)}
    locked_pos = [pos[h] for h in locked_heads]
    codes = [_LABEL_TO_CODE.get(row[pos[DECISION]], "") for row in values]
    checks = [_line_check(locked_heads, [row[i] for i in locked_pos], code, row[pos[NOTE]])
              for row, code in zip(values, codes)]

    bold = Font(bold=True)
    header_fill = PatternFill("solid", start_color=HEADER_FILL, end_color=HEADER_FILL)
    answer_fill = PatternFill("solid", start_color=ANSWER_FILL, end_color=ANSWER_FILL)
    unlocked = Protection(locked=False)
    n = len(values)
    for c, head in enumerate(heads + [CHECK], start=1):
        editable = head in EDITABLE
        cell = put_cell(sheet, 1, c, cell_text(head))
        cell.font = bold
        cell.fill = answer_fill if editable else header_fill
        column = [row[c - 1] for row in values] if head != CHECK else checks
        fmt = {"probability": "0.000"}.get(head, "0.00" if head.endswith("weight") else None)
        for r, value in enumerate(column, start=2):
            cell = put_cell(sheet, r, c, value)
            if editable:
                cell.fill = answer_fill
                cell.protection = unlocked
            if fmt and isinstance(value, (int, float)):
                cell.number_format = fmt
        letter = get_column_letter(c)
        sheet.column_dimensions[letter].width = column_width([head] + column) if head != NOTE else 40.0
        if head == CHECK:
            sheet.column_dimensions[letter].hidden = True
    last = get_column_letter(len(heads) + 1)
    sheet.freeze_panes = "C2"
    sheet.auto_filter.ref = f"A1:{last}{n + 1}"
    if n:
        # showDropDown=True would *hide* the arrow (from memory of the OOXML dataValidation quirk)
        dv = DataValidation(type="list", formula1='"' + ",".join(DECISION_LABELS.values()) + '"',
                            allow_blank=True, showDropDown=False, showErrorMessage=True,
                            errorTitle="decision", error="Choose one of: " + ", ".join(DECISION_LABELS.values()),
                            promptTitle="decision", prompt="same person / different people / not sure",
                            showInputMessage=True)
        col = get_column_letter(pos[DECISION] + 1)
        dv.add(f"{col}2:{col}{n + 1}")
        sheet.add_data_validation(dv)
    prot = sheet.protection
    prot.sheet = True
    prot.autoFilter = False          # False = allowed while protected
    prot.sort = False
    prot.formatColumns = False
    prot.formatRows = False
    prot.selectLockedCells = False
    prot.selectUnlockedCells = False


def readme_sheet(lines: pd.DataFrame) -> pd.DataFrame:
    """The "read me" sheet in plain words."""
    n = len(lines)
    decided = int(lines["earlier decision"].ne("").sum()) if n else 0
    if n:
        count = (f"This workbook holds {n} {'pair' if n == 1 else 'pairs'} of records on the "
                 f"'{PAIRS_TITLE}' sheet, the one to look at first on top (column 'rank').")
        if decided:
            count += (f" {decided} of them were decided before: their earlier decision is shown and "
                      "filled in; they come after the undecided ones.")
    else:
        count = "There are no pairs to review: the linker was sure of every pair and no check raised a doubt."
    labels = ", ".join(f"'{v}'" for v in DECISION_LABELS.values())
    text = [
        "CAUTION: the decisions asked for here are for qualified staff only. A 'same person' decision "
        "is a lead to be verified, not a determination: it tells the software to treat two records as "
        "one person until someone checks the underlying files. A 'different people' decision keeps "
        "them apart. Neither decision says anything about what any person did.",
        "This workbook contains sensitive personal information (names, registration numbers, birth "
        "dates, custody and placement records). Handle, store and send it only as the protective "
        "orders and privacy law that apply to this data allow, and delete copies you no longer need.",
        "What this is: pairs of person-records from the delivered files that the linking software "
        "could not settle on its own. Each line is one pair: either the software was unsure whether "
        "the two records describe the same person, or it linked them but an automated check found "
        "something odd about one of them (column 'checks on these records'), which a wrong link can cause.",
        count,
        "Order: pairs not yet decided first; then pairs touching a record with an error finding; then "
        "pairs with a child's record; then pairs whose decision joins or splits the most records; then "
        "the pairs the software is least sure of (probability nearest 0.5).",
        "Reading a line: for each compared field you see the value of record A, the value of record "
        "B, how they compare (level) and how much that counts for the same person (weight: positive "
        "for, negative against). 'probability' is the software's estimate that A and B are the same "
        "person; 'weight' is the sum of the field weights. Values are shown as the software compared "
        "them (upper case, accents removed, dates as year-month-day). 'file', 'sheet', 'row' and "
        "'slot' say where each record came from (row 1 is the first row of a sheet; slot is the "
        "person on the row, for example child or parent): look there before deciding.",
        f"How to decide: in the shaded 'decision' column choose {labels} from the dropdown. Choose "
        "'not sure' when the evidence does not settle it; leave it empty to skip a pair. Write "
        "your reasons, or what should be checked, in the shaded 'note' column. A note needs a "
        "decision: choose 'not sure' to keep a note on an undecided pair. Records with identical "
        "compared values share a pair_id ('lines with this pair_id' above 1): one decision covers "
        "them all, so lines of one pair_id must not get different decisions.",
        "Only the 'decision' and 'note' cells can be changed; the sheet is protected against "
        "accidental edits (no password). You may filter and sort. Please do not change other "
        "values, add or remove columns or rename the sheets: a hidden 'check' column detects "
        "edited lines, and a workbook with an edited line is refused as a whole when it is read back.",
        "Who decided and when is recorded by the person who imports this workbook, not read from it. "
        "If a pair shows an earlier decision and you leave it as it is, it is not recorded again.",
        "Text that starts with = + - or @ is shown with a leading apostrophe so that it can never run "
        "as a formula; the apostrophe is not part of the value.",
    ]
    return pd.DataFrame({"about this workbook": text}, dtype=object)


# ---------------------------------------------------------------------------
# Reading back
# ---------------------------------------------------------------------------
READ_COLUMNS = ("pair_id", "decision", "note", "row", "prefilled", "record_a", "record_b")


def read_review(path: str | Path, known_pair_ids=None) -> pd.DataFrame:
    """The decisions in a filled-in review workbook, all or nothing.

    Returns one line per decided pair: ``pair_id``, ``decision`` (same /
    different / unsure), ``note``, ``row`` (the first sheet row giving it) and
    ``prefilled`` (True when decision and note are exactly the earlier ones
    the workbook was written with, so the importer need not record them
    again).  Lines without a decision are left out.  Lines of one pair
    (records with identical compared values share a pair_id) must agree on
    the decision; their distinct notes are joined with " | ".

    Raises :class:`ReviewError` naming workbook, sheet, row and column when the
    file is not a readable workbook or lacks the pairs sheet or a column, a
    decision is not in the list, a value other than decision/note was edited,
    a note has no decision, a pair_id is not in ``known_pair_ids`` (when
    given), or one pair has two different decisions.  Every problem is listed
    in the one error; nothing is returned.
    """
    path = Path(path)
    rows = _read_rows(path)
    if not rows:
        raise ReviewError(path, "the sheet is empty: no header row", sheet=PAIRS_TITLE, row=1)
    heads = ["" if h is None else str(h) for h in rows[0]]
    missing = [h for h in (PAIR_ID, DECISION, NOTE, CHECK) if h not in heads]
    if missing:
        raise ReviewError(path, "column missing from the header row (the sheet must not be rearranged)",
                          sheet=PAIRS_TITLE, row=1, column=missing[0])
    pos = {h: i for i, h in enumerate(heads) if h}
    locked = [(h, i) for i, h in enumerate(heads) if h and h not in EDITABLE and h != CHECK]
    known = None if known_pair_ids is None else set(map(str, known_pair_ids))
    problems, found = [], []
    for r, row in enumerate(rows[1:], start=2):
        row = list(row) + [None] * (len(heads) - len(row))
        if all(v is None or v == "" for v in row):
            continue
        line, trouble = _read_line(row, r, pos, locked, known)
        problems.extend(trouble)
        if line is not None and not trouble:
            found.append(line)
    out = pd.DataFrame(found, columns=list(READ_COLUMNS))
    if not problems:
        out, clashes = _one_per_pair(out)
        problems.extend(clashes)
    if problems:
        first = problems[0]
        raise ReviewError(path, first["problem"], sheet=first["sheet"], row=first["row"],
                          column=first["column"], problems=problems)
    return out.astype({"row": int, "prefilled": bool}).reset_index(drop=True)


def _read_rows(path: Path) -> list[tuple]:
    """All rows of the pairs sheet as values; ReviewError when the file cannot be read."""
    from openpyxl import load_workbook

    if not path.is_file():
        raise ReviewError(path, "no such file")
    try:
        with open(path, "rb") as fh:
            head = fh.read(8)
    except OSError as err:
        raise ReviewError(path, f"cannot be read: {err.strerror or err}") from None
    if head.startswith(b"\xd0\xcf\x11\xe0"):
        raise ReviewError(path, "not an .xlsx workbook (password-protected, or an old .xls file)")
    if not head.startswith(b"PK\x03\x04"):
        raise ReviewError(path, "not an .xlsx workbook")
    try:
        book = load_workbook(path, read_only=True, data_only=False)
    except Exception as err:            # openpyxl raises many kinds on damaged archives
        raise ReviewError(path, f"not a readable .xlsx workbook ({type(err).__name__})") from None
    try:
        if PAIRS_TITLE not in book.sheetnames:
            raise ReviewError(path, "sheet missing (sheets found: "
                              + ", ".join(repr(s) for s in book.sheetnames) + ")", sheet=PAIRS_TITLE)
        try:
            return list(book[PAIRS_TITLE].iter_rows(values_only=True))
        except Exception as err:
            raise ReviewError(path, f"sheet cannot be read ({type(err).__name__})",
                              sheet=PAIRS_TITLE) from None
    finally:
        book.close()


def _read_line(row: list, r: int, pos: dict, locked: list, known: set | None):
    """One sheet line -> (pair_id, code, note, row, prefilled) or None, and its problems."""
    def problem(column, text):
        return {"sheet": PAIRS_TITLE, "row": r, "column": column, "problem": text}

    trouble = []
    label = _text(row[pos[DECISION]]).strip()
    note = _text(row[pos[NOTE]])
    code = _LABEL_TO_CODE.get(" ".join(label.casefold().split()), None) if label else ""
    if code is None:
        trouble.append(problem(DECISION, f"{label!r} is not one of "
                               + ", ".join(repr(v) for v in DECISION_LABELS.values())))
    check = _text(row[pos[CHECK]]).split(".")
    if len(check) != 4 or check[0] != _CHECK_VERSION:
        trouble.append(problem(CHECK, "the hidden check value is missing or damaged"))
        return None, trouble
    _, digest, cells, written = check
    items = [h + _SEP_FIELD + _canon(row[i]) for h, i in locked]
    if _sha(_SEP_ITEM.join(items)) != digest:
        trouble.append(_edited(items, cells, r, problem))
    pair_id = _text(row[pos[PAIR_ID]]).strip()
    if not trouble and code and known is not None and pair_id not in known:
        trouble.append(problem(PAIR_ID, f"unknown pair {pair_id!r} (not among the pairs of this run)"))
    if not trouble and not code and note.strip():
        trouble.append(problem(NOTE, "a note without a decision: choose a decision "
                                     "('not sure' keeps the note) or clear the note"))
    if trouble or not code:
        return None, trouble
    rec_a = _text(row[pos["record A"]]) if "record A" in pos else ""
    rec_b = _text(row[pos["record B"]]) if "record B" in pos else ""
    return (pair_id, code, note, r, _editable_digest(code, note) == written, rec_a, rec_b), trouble


def _edited(items: list[str], cells: str, r: int, problem) -> dict:
    """Name the first edited column of a line whose digest does not match."""
    want = [cells[k:k + _CELL_DIGEST] for k in range(0, len(cells), _CELL_DIGEST)]
    if len(want) != len(items):
        return problem(None, "the columns of the sheet were changed (added, removed or renamed); "
                             "use the workbook as written")
    for item, w in zip(items, want):
        if _sha(item)[:_CELL_DIGEST] != w:
            return problem(item.split(_SEP_FIELD, 1)[0],
                           "a value that must not be edited was changed; only decision and note may change")
    return problem(None, "a value that must not be edited was changed or moved; "
                         "only decision and note may change")


def _one_per_pair(out: pd.DataFrame) -> tuple[pd.DataFrame, list[dict]]:
    """One line per pair_id; a pair with two different decisions is a problem on its later line."""
    n_codes = out.groupby("pair_id")["decision"].transform("nunique")
    problems = []
    clash = out[n_codes > 1]
    for pair_id, part in clash.groupby("pair_id", sort=False):
        first = part.iloc[0]
        for line in part.itertuples(index=False):
            if line.decision != first["decision"]:
                problems.append({"sheet": PAIRS_TITLE, "row": int(line.row), "column": DECISION,
                                 "problem": f"pair {pair_id} is decided {DECISION_LABELS[line.decision]!r} "
                                            f"here but {DECISION_LABELS[first['decision']]!r} on row "
                                            f"{int(first['row'])}"})
    problems.sort(key=lambda p: p["row"])
    notes = (out[out["note"].str.strip().ne("")].drop_duplicates(["pair_id", "note"])
             .groupby("pair_id", sort=False)["note"].agg(" | ".join))
    firsts = out.drop_duplicates("pair_id").copy()
    firsts["note"] = firsts["pair_id"].map(notes).fillna("")
    prefilled = out.groupby("pair_id")["prefilled"].all()
    firsts["prefilled"] = firsts["pair_id"].map(prefilled).astype(bool)
    return firsts, problems


def _text(value) -> str:
    """A read cell as text (numbers without a trailing .0, dates in ISO form)."""
    if value is None:
        return ""
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    if isinstance(value, (dt.datetime, dt.date, dt.time)):
        return value.isoformat()
    return str(value)

