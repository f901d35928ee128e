"""The agency query workbook (queries.xlsx): findings grouped by producing source.

:func:`query_sheets` turns findings.csv rows into plain DataFrames, one per
source file (or per top folder of source files), plus a "read me" sheet and
an "index" sheet.  :func:`write_queries` writes them as a formula-safe,
byte-deterministic .xlsx workbook that can be sent back to the agency.

Each query line points at the exact file / sheet / row / slot, shows the
values on that row as delivered, and leaves an "answer" and a "corrected
value" column for the agency.  Queries are questions about possible errors,
never determinations.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import io
import re
import zipfile
from pathlib import Path, PurePosixPath

import pandas as pd

from .io import atomic_write_bytes, safe_cell
from .schema import FINDING_COLUMNS

# ---------------------------------------------------------------------------
# Layout
# ---------------------------------------------------------------------------
README_TITLE = "read me"
INDEX_TITLE = "index"
GROUP_BY = ("file", "folder")

ANSWER_COLUMNS = ("answer", "corrected value")

# Values as delivered: record column -> workbook column.
RAW_COLUMNS = {
    "reg_no_raw": "reg no as delivered",
    "given_name_raw": "given name as delivered",
    "family_name_raw": "family name as delivered",
    "full_name_raw": "full name as delivered",
    "birth_date_raw": "birth date as delivered",
    "age_raw": "age as delivered",
    "sex_raw": "sex as delivered",
    "intake_date_raw": "intake date as delivered",
    "placement_date_raw": "placement date as delivered",
    "release_date_raw": "release date as delivered",
}

QUERY_COLUMNS = (
    "query",
    "severity",
    "rule",
    "what was checked",
    "file",
    "sheet",
    "row",
    "person on row",
    *RAW_COLUMNS.values(),
    "detail",
    "record id",
    "entity id",
    *ANSWER_COLUMNS,
)

INDEX_COLUMNS = ("sheet", "source file", "queries", "errors", "warnings")
README_COLUMN = "about this workbook"

# Excel sheet titles: at most 31 characters, none of []:*?/\ , not starting or
# ending with an apostrophe, unique ignoring case; "History" is reserved
# (from memory of Excel's documented limits).
MAX_TITLE = 31
_FORBIDDEN_TITLE = re.compile(r"[\[\]:*?/\\\x00-\x1f\x7f]")
_RESERVED_TITLES = {README_TITLE.casefold(), INDEX_TITLE.casefold(), "history"}
_HASH_LEN = 5

# Fixed workbook timestamp so that the same data gives the same bytes.
FIXED_STAMP = dt.datetime(2000, 1, 1, 0, 0, 0)
_MIN_ZIP_YEAR = 1980                    # zip member times cannot be older

# Excel keeps at most 32767 characters in a cell (from memory of Excel's limits).
MAX_CELL_TEXT = 32767
# Characters XML 1.0 (and so openpyxl) cannot store.
_ILLEGAL_XML = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f]")

HEADER_FILL = "D9D9D9"
ANSWER_FILL = "FFF2CC"
MIN_WIDTH, MAX_WIDTH, README_WIDTH = 8, 60, 110


# ---------------------------------------------------------------------------
# Building the sheets (pure, pandas in / pandas out)
# ---------------------------------------------------------------------------
def query_sheets(findings: pd.DataFrame, records: pd.DataFrame, rules: pd.DataFrame | None,
                 group_by: str = "file") -> dict[str, pd.DataFrame]:
    """The sheets of the query workbook, in workbook order.

    Parameters
    ----------
    findings
        findings.csv rows (columns :data:`linker.schema.FINDING_COLUMNS`).
    records
        records.csv rows; the ``*_raw`` columns give the values as delivered.
    rules
        One line per rule: ``rule``, ``severity``, ``explanation``.
    group_by
        ``"file"``: one sheet per source file; ``"folder"``: one sheet per top
        folder of the source files (files at the top level keep their own sheet).

    Returns
    -------
    dict
        ``{"read me": ..., "index": ..., <title>: <queries>, ...}``.
    """
    if group_by not in GROUP_BY:
        raise ValueError(f"group_by must be one of {', '.join(GROUP_BY)}, got {group_by!r}")
    lines = query_lines(findings, records, rules, group_by)
    titles = sheet_titles(lines["group"].drop_duplicates().tolist(), group_by)
    lines["title"] = lines["group"].map(titles).astype(object)
    sheets = {README_TITLE: readme_sheet(lines), INDEX_TITLE: index_sheet(lines)}
    for group in sorted(titles):
        part = lines[lines["group"] == group]
        sheets[titles[group]] = part.loc[:, list(QUERY_COLUMNS)].reset_index(drop=True)
    return sheets


def query_lines(findings: pd.DataFrame, records: pd.DataFrame, rules: pd.DataFrame | None,
                group_by: str) -> pd.DataFrame:
    """All query lines, numbered, with their group key (column ``group``)."""
    f = text_frame(findings, FINDING_COLUMNS)
    raw = text_frame(records, ("record_id", *RAW_COLUMNS)).drop_duplicates("record_id")
    f = f.merge(raw, on="record_id", how="left", validate="many_to_one")
    f[list(RAW_COLUMNS)] = f[list(RAW_COLUMNS)].fillna("")
    f["group"] = group_keys(f["source_file"], group_by)

    order, explanation = _rule_facts(rules, f["rule"])
    f["_rule_order"] = f["rule"].map(order)
    row_number = pd.to_numeric(f["row"], errors="coerce")
    f["_row_missing"] = row_number.isna()
    f["_row_number"] = row_number.fillna(0)
    keys = ["group", "source_file", "sheet", "_row_missing", "_row_number", "row", "slot",
            "_rule_order", "rule", "severity", "record_id", "entity_id", "detail"]
    f = f.sort_values(keys, kind="mergesort").reset_index(drop=True)

    width = max(4, len(str(len(f))))
    out = pd.DataFrame({
        "group": f["group"],
        "query": ["Q" + str(i).zfill(width) for i in range(1, len(f) + 1)],
        "severity": f["severity"],
        "rule": f["rule"],
        "what was checked": f["rule"].map(explanation),
        "file": f["source_file"],
        "sheet": f["sheet"],
        "row": row_values(f["row"], pd.to_numeric(f["row"], errors="coerce")),
        "person on row": f["slot"],
        **{label: f[col] for col, label in RAW_COLUMNS.items()},
        "detail": f["detail"],
        "record id": f["record_id"],
        "entity id": f["entity_id"],
        **{col: "" for col in ANSWER_COLUMNS},
    })
    return out.astype({c: object for c in out.columns})


def group_keys(source_file: pd.Series, group_by: str) -> pd.Series:
    """The producing source of each line: the file itself, or its top folder."""
    if group_by == "file":
        return source_file.astype(str)
    parts = source_file.astype(str).str.split("/", n=1)
    nested = parts.str.len() > 1
    return source_file.astype(str).where(~nested, parts.str[0] + "/")


def sheet_titles(groups: list[str], group_by: str) -> dict[str, str]:
    """A legal, unique, deterministic sheet title for each group key.

    The title is the file name without suffix (or the folder name), cleaned
    of characters Excel forbids.  A title that is too long, taken by another
    group (ignoring case) or reserved gets a short hash of the full group key,
    so it does not depend on which other groups are present.
    """
    groups = sorted(set(groups))
    base = {g: _clean_title(_title_stem(g)) for g in groups}
    counts = pd.Series([b.casefold() for b in base.values()]).value_counts()
    titles: dict[str, str] = {}
    taken = set(_RESERVED_TITLES)
    for g in groups:
        b = base[g]
        if _title_length(b) > MAX_TITLE or counts[b.casefold()] > 1 or b.casefold() in taken:
            b = _hashed_title(b, g)
        n = 2
        candidate = b
        while candidate.casefold() in taken:          # hash collision: practically never
            candidate = _fit(b, f" {n}")
            n += 1
        taken.add(candidate.casefold())
        titles[g] = candidate
    return titles


def index_sheet(lines: pd.DataFrame) -> pd.DataFrame:
    """Sheet title -> full source file name, with counts; says so when there are no queries."""
    if lines.empty:
        return pd.DataFrame([["(none)", "no queries: the checks raised nothing to ask about", 0, 0, 0]],
                            columns=list(INDEX_COLUMNS), dtype=object)
    sev = lines["severity"].str.casefold()
    counts = (lines.assign(_error=sev.eq("error"), _warning=sev.eq("warning"))
              .groupby(["group", "title", "file"], sort=True)
              .agg(queries=("query", "size"), errors=("_error", "sum"), warnings=("_warning", "sum"))
              .reset_index())
    out = pd.DataFrame({
        "sheet": counts["title"],
        "source file": counts["file"],
        "queries": counts["queries"].astype(int),
        "errors": counts["errors"].astype(int),
        "warnings": counts["warnings"].astype(int),
    })
    return out.astype(object).reset_index(drop=True)


def readme_sheet(lines: pd.DataFrame) -> pd.DataFrame:
    """The "read me" sheet in plain words."""
    n = len(lines)
    sev = lines["severity"].str.casefold() if n else pd.Series(dtype=object)
    if n:
        sheets = lines["group"].nunique()
        count = (f"This workbook holds {n} {'query' if n == 1 else 'queries'} "
                 f"({int(sev.eq('error').sum())} marked error, {int(sev.eq('warning').sum())} marked "
                 f"warning) on {sheets} {'sheet' if sheets == 1 else 'sheets'} after the index.")
    else:
        count = ("There are no queries: the checks found nothing to ask about in the delivered files. "
                 "No answer is needed.")
    text = [
        "CAUTION: this workbook contains sensitive personal information (names, registration "
        "numbers, birth dates, custody and placement events). Handle, store and send it only as the "
        "protective orders and privacy law that apply to this data allow. Return it through the "
        "agreed secure channel and delete copies you no longer need.",
        "What this is: a list of queries about rows in the files your office delivered. Automated "
        "checks found values that look impossible or inconsistent, for example a release date "
        "before the intake date, or one person shown with two different birth dates.",
        "These are queries about possible errors, not determinations. A query does not mean that a "
        "record is wrong or that anyone did anything wrong: the value may well be correct as "
        "delivered. Where a check compares records, the link between them is a lead found by "
        "software and may itself be mistaken. Please check each query against your own files.",
        count,
        f"The '{INDEX_TITLE}' sheet lists the query sheets and the full name of each file they "
        "cover. Every other sheet holds the queries for one delivered file (or one folder of files).",
        "Each line names the exact place: file, sheet, row (as a spreadsheet shows it, row 1 is the "
        "first row; for CSV files the line number of the record) and the person on the row (for "
        "example child or parent). The values are shown as they were delivered. 'severity' error "
        "means the values cannot all be right; warning means they are unusual and worth a look.",
        "How to answer: write in the shaded 'answer' column, for example 'correct as delivered', "
        "'error' or 'cannot tell', with any short explanation. If a value is wrong, write the right "
        "value in the shaded 'corrected value' column. Please do not change the other columns, "
        "rename or reorder sheets, or change query numbers: the query number links your answer "
        "back to the query.",
        "Text that starts with = + - or @ is shown with a leading apostrophe so that it can never "
        "run as a formula; the apostrophe is not part of the delivered value.",
    ]
    return pd.DataFrame({README_COLUMN: text}, dtype=object)


# ---------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------
def write_queries(sheets: dict[str, pd.DataFrame], path: str | Path,
                  stamp: dt.datetime = FIXED_STAMP) -> Path:
    """Write the query workbook atomically, formula-safe and byte-deterministic.

    ``stamp`` is the workbook's created/modified time and the time of every
    member of the zip archive, so the same sheets always give the same bytes.
    """
    from openpyxl import Workbook

    book = Workbook()
    book.remove(book.active)
    for title, frame in sheets.items():
        sheet = book.create_sheet(title)
        fill_sheet(sheet, frame, readme=(title == README_TITLE))
    return save_book(book, path, stamp)


def save_book(book: Workbook, path: str | Path, stamp: dt.datetime = FIXED_STAMP) -> Path:
    """Save an openpyxl workbook atomically with fixed document and member times (same bytes every time)."""
    stamp = stamp.replace(tzinfo=None, microsecond=0)
    book.properties.created = stamp
    book.properties.modified = stamp
    buf = io.BytesIO()
    book.save(buf)
    path = Path(path)
    atomic_write_bytes(path, fixed_zip(buf.getvalue(), stamp))
    return path


def fixed_zip(data: bytes, stamp: dt.datetime) -> bytes:
    """Re-pack an .xlsx archive with fixed member times and fixed document times."""
    iso = stamp.strftime("%Y-%m-%dT%H:%M:%SZ").encode()
    zip_time = (stamp.year, stamp.month, stamp.day, stamp.hour, stamp.minute, stamp.second)
    if stamp.year < _MIN_ZIP_YEAR:
        zip_time = (_MIN_ZIP_YEAR, 1, 1, 0, 0, 0)
    src = zipfile.ZipFile(io.BytesIO(data))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as dst:
        for info in src.infolist():
            content = src.read(info.filename)
            if info.filename == "docProps/core.xml":
                content = re.sub(rb"(<dcterms:(?:created|modified)\b[^>]*>)[^<]*(</dcterms:)",
                                 rb"\g<1>" + iso + rb"\g<2>", content)
            member = zipfile.ZipInfo(info.filename, date_time=zip_time)
            member.compress_type = zipfile.ZIP_DEFLATED
            member.external_attr = 0o644 << 16
            dst.writestr(member, content)
    return out.getvalue()


def cell_text(value):
    """A value ready for a cell: text made formula-safe, cleaned of characters XML cannot
    hold (line ends as LF), cut to Excel's cell limit; numbers pass unchanged."""
    if value is None or (isinstance(value, float) and pd.isna(value)):
        return ""
    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        value = str(value)
    if not isinstance(value, str):
        return value
    value = safe_cell(_ILLEGAL_XML.sub("\ufffd", value))
    value = value.replace("\r\n", "\n").replace("\r", "\n")   # XML reads a bare CR back as LF
    if len(value) > MAX_CELL_TEXT:
        note = f" [cut: {len(value)} characters in all]"
        value = value[:MAX_CELL_TEXT - len(note)] + note
    return value


def fill_sheet(sheet, frame: pd.DataFrame, readme: bool) -> None:
    from openpyxl.styles import Alignment, Font, PatternFill
    from openpyxl.utils import get_column_letter

    bold = Font(bold=True)
    header_fill = PatternFill("solid", start_color=HEADER_FILL, end_color=HEADER_FILL)
    answer_fill = PatternFill("solid", start_color=ANSWER_FILL, end_color=ANSWER_FILL)
    wrap = Alignment(wrap_text=True, vertical="top")
    columns = [str(c) for c in frame.columns]
    values = [[cell_text(v) for v in row] for row in frame.itertuples(index=False, name=None)]
    for c, name in enumerate(columns, start=1):
        answer = name in ANSWER_COLUMNS
        head = put_cell(sheet, 1, c, cell_text(name))
        head.font = bold
        head.fill = answer_fill if answer else header_fill
        for r, row in enumerate(values, start=2):
            cell = put_cell(sheet, r, c, row[c - 1])
            if answer:
                cell.fill = answer_fill
            if readme:
                cell.alignment = wrap
        width = README_WIDTH if readme else column_width([name] + [row[c - 1] for row in values])
        sheet.column_dimensions[get_column_letter(c)].width = width
    sheet.freeze_panes = "A2" if readme or not columns else "B2"
    if not readme and columns and values:
        sheet.auto_filter.ref = f"A1:{get_column_letter(len(columns))}{len(values) + 1}"


def put_cell(sheet, row: int, column: int, value):
    cell = sheet.cell(row=row, column=column)
    cell.value = value
    if isinstance(value, str):
        cell.data_type = "s"          # never a formula, never an error value like "#N/A"
    return cell


def column_width(values: list) -> float:
    longest = max((len(str(v)) for v in values), default=0)
    return float(min(MAX_WIDTH, max(MIN_WIDTH, longest + 2)))


# ---------------------------------------------------------------------------
# Helpers
# ---------------------------------------------------------------------------
def text_frame(frame: pd.DataFrame | None, columns) -> pd.DataFrame:
    """``frame`` with exactly ``columns``, all text, missing values as ""."""
    columns = list(columns)
    if frame is None:
        frame = pd.DataFrame(columns=columns)
    out = frame.reindex(columns=columns)
    out = out.astype(object).where(out.notna(), "")
    return out.astype(str).reset_index(drop=True)


def _rule_facts(rules: pd.DataFrame | None, used: pd.Series) -> tuple[dict, dict]:
    """Sort position and plain-words explanation of every rule (table order, then by name)."""
    table = text_frame(rules, ("rule", "severity", "explanation")).drop_duplicates("rule")
    known = table["rule"].tolist()
    extra = sorted(set(used) - set(known))
    order = {r: i for i, r in enumerate(known + extra)}
    explanation = dict(zip(table["rule"], table["explanation"]))
    for r in known + extra:
        if not explanation.get(r):
            explanation[r] = f"check: {r.replace('_', ' ')}"
    return order, explanation


def row_values(row: pd.Series, number: pd.Series) -> list:
    """Row numbers as integers where they are whole numbers, else the text as given."""
    whole = number.notna() & (number == number.round())
    return [int(n) if w else r for r, n, w in zip(row, number, whole)]


def _title_stem(group: str) -> str:
    if group.endswith("/"):
        return group[:-1]
    return PurePosixPath(group).stem or group


def _clean_title(text: str) -> str:
    text = _FORBIDDEN_TITLE.sub("_", text).strip().strip("'").strip()
    return text or "file"


def _title_length(text: str) -> int:
    """Length as Excel counts it (UTF-16 code units)."""
    return len(text.encode("utf-16-le")) // 2


def _fit(text: str, suffix: str) -> str:
    """``text`` cut so that ``text + suffix`` fits a sheet title, without edge apostrophes."""
    room = MAX_TITLE - _title_length(suffix)
    while _title_length(text) > room:
        text = text[:-1]
    text = text.rstrip().rstrip("'").rstrip()
    return text + suffix


def _hashed_title(base: str, group: str) -> str:
    digest = hashlib.sha1(group.encode("utf-8")).hexdigest()[:_HASH_LEN]
    return _fit(base, f"~{digest}")
