"""Everything that touches files: listing a delivery, reading sheets, writing outputs.

Readers return plain Python rows (sequences of cell values: lists from a
workbook, tuples from a CSV file) so the ingest stage stays independent of
the file format.  Writers are atomic (temp file + rename)
and neutralize text that a spreadsheet would run as a formula.
"""

from __future__ import annotations

import csv
import datetime as dt
import hashlib
import io
import json
import os
import tempfile
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

import pandas as pd

from .errors import InputError

XLSX_SUFFIXES = (".xlsx", ".xlsm")
CSV_SUFFIXES = (".csv", ".txt")
_OLE_SIGNATURE = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"   # compound file: encrypted xlsx or old .xls
_ZIP_SIGNATURE = b"PK\x03\x04"


@dataclass
class SheetData:
    """One sheet as read: its name and its rows (row 1 first, as a spreadsheet shows it)."""

    name: str
    rows: list[Sequence]       # lists (workbook) or tuples (CSV) of cell values


@dataclass
class FileData:
    source_file: str           # relative to the delivery folder, forward slashes
    kind: str                  # xlsx | csv
    sheets: list[SheetData]
    encoding: str = ""


# ---------------------------------------------------------------------------
# Listing
# ---------------------------------------------------------------------------
def list_delivery(folder: Path, patterns: Iterable[str], exclude: Iterable[str] = ()) -> list[Path]:
    """Files under ``folder`` matching any pattern and no exclude pattern, sorted by relative path.

    Excel lock files (``~$name.xlsx``) and hidden files are left out.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(folder, "delivery folder does not exist or is not a folder")
    found: dict[str, Path] = {}
    for pattern in patterns:
        for path in folder.glob(pattern):
            if path.is_file():
                found[relative_name(path, folder)] = path
    excluded = {relative_name(p, folder) for pat in exclude for p in folder.glob(pat)}
    keep = {}
    for rel, path in found.items():
        name = path.name
        if rel in excluded or name.startswith("~$") or name.startswith("."):
            continue
        keep[rel] = path
    return [keep[k] for k in sorted(keep)]


def relative_name(path: Path, folder: Path) -> str:
    return Path(path).resolve().relative_to(Path(folder).resolve()).as_posix()


def file_facts(path: Path, folder: Path) -> dict:
    """size, sha256 and modified time of one delivery file."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    stat = path.stat()
    return {
        "source_file": relative_name(path, folder),
        "kind": file_kind(path),
        "size_bytes": stat.st_size,
        "sha256": h.hexdigest(),
        "modified": dt.datetime.fromtimestamp(stat.st_mtime, dt.timezone.utc)
        .replace(microsecond=0).isoformat(),
    }


def file_kind(path: Path) -> str:
    suffix = Path(path).suffix.lower()
    if suffix in XLSX_SUFFIXES:
        return "xlsx"
    if suffix in CSV_SUFFIXES:
        return "csv"
    return "other"


# ---------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class ReadLimits:
    """Sizes past which a file is refused before it is read into memory (named in the error).

    ``max_sheet_rows`` and ``max_sheet_columns`` default to the largest sheet a
    spreadsheet program writes (1,048,576 rows, 16,384 columns; common
    practice).  ``max_ratio`` catches an archive that inflates out of
    proportion to its size (a "zip bomb") once it would inflate past
    ``ratio_floor_bytes``.
    """

    max_file_bytes: int = 4 << 30
    max_uncompressed_bytes: int = 4 << 30
    max_ratio: float = 200.0
    ratio_floor_bytes: int = 64 << 20
    max_sheet_rows: int = 1_048_576
    max_sheet_columns: int = 16_384


DEFAULT_LIMITS = ReadLimits()


def read_file(path: Path, folder: Path, limits: ReadLimits = DEFAULT_LIMITS) -> FileData:
    """Read every sheet of a workbook, or the one table of a CSV file.

    Raises
    ------
    InputError
        The file is corrupt, password-protected, of an unknown kind, unreadable
        or over one of the ``limits``.
    """
    rel = relative_name(path, folder)
    kind = file_kind(path)
    if kind in ("xlsx", "csv"):
        try:
            size = Path(path).stat().st_size
        except OSError as exc:
            raise InputError(rel, f"cannot open file ({exc.strerror or exc})") from None
        if size > limits.max_file_bytes:
            raise InputError(rel, f"file is {size:,} bytes, over the limit of {limits.max_file_bytes:,} bytes; "
                                  "split it or raise the limit")
    if kind == "xlsx":
        return FileData(rel, kind, read_xlsx(path, rel, limits))
    if kind == "csv":
        rows, encoding = read_csv_rows(path, rel)
        _check_sheet_size(rel, Path(rel).stem, len(rows), max(map(len, rows), default=0), limits)
        return FileData(rel, kind, [SheetData(Path(rel).stem, rows)], encoding)
    raise InputError(rel, f"unsupported file type {Path(path).suffix!r}: linker reads .xlsx and .csv")


def _check_sheet_size(rel: str, sheet: str, n_rows: int, n_cols: int, limits: ReadLimits) -> None:
    if n_rows > limits.max_sheet_rows or n_cols > limits.max_sheet_columns:
        raise InputError(rel, f"sheet {sheet!r} has {n_rows:,} rows and {n_cols:,} columns, over the limit of "
                              f"{limits.max_sheet_rows:,} rows and {limits.max_sheet_columns:,} columns; "
                              "split it or raise the limit")


def _check_archive(path: Path, rel: str, limits: ReadLimits) -> None:
    """Refuse an archive that would inflate past the limits, from its directory (nothing inflated)."""
    try:
        with zipfile.ZipFile(path) as z:
            inflated = sum(max(i.file_size, 0) for i in z.infolist())
    except (zipfile.BadZipFile, OSError, ValueError):
        return                                   # the reader below reports a damaged archive
    packed = max(Path(path).stat().st_size, 1)
    if inflated > limits.max_uncompressed_bytes:
        raise InputError(rel, f"workbook would inflate to {inflated:,} bytes, over the limit of "
                              f"{limits.max_uncompressed_bytes:,} bytes; it was not read")
    if inflated > limits.ratio_floor_bytes and inflated / packed > limits.max_ratio:
        raise InputError(rel, f"workbook would inflate {inflated / packed:,.0f} times its size ({inflated:,} "
                              f"bytes), over the limit of {limits.max_ratio:,.0f} times; it was not read")


def read_xlsx(path: Path, rel: str, limits: ReadLimits = DEFAULT_LIMITS) -> list[SheetData]:
    """All sheets of an .xlsx workbook with the fast calamine reader, rows from row 1."""
    from python_calamine import CalamineWorkbook

    try:
        with open(path, "rb") as fh:
            head = fh.read(8)
    except OSError as exc:
        raise InputError(rel, f"cannot open file ({exc.strerror or exc})") from None
    if head.startswith(_OLE_SIGNATURE):
        raise InputError(rel, "workbook is password-protected (encrypted) or an old .xls file "
                              "saved with an .xlsx name; save it unprotected as .xlsx")
    if not head.startswith(_ZIP_SIGNATURE):
        raise InputError(rel, "not a valid .xlsx workbook (the file is corrupt or of another type)")
    _check_archive(path, rel, limits)
    try:
        book = CalamineWorkbook.from_path(str(path))
        sheets = []
        for name in book.sheet_names:
            sheet = book.get_sheet_by_name(name)
            _check_sheet_size(rel, name, max(sheet.height, sheet.total_height), max(sheet.width, sheet.total_width),
                              limits)
            rows = sheet.to_python(skip_empty_area=False)
            sheets.append(SheetData(name, [list(r) for r in rows]))
    except InputError:
        raise
    except Exception as exc:  # calamine raises several error types for damaged archives
        raise InputError(rel, f"workbook cannot be read, it may be corrupt ({type(exc).__name__}: "
                              f"{str(exc)[:120]})") from None
    return sheets


def decode_text(data: bytes) -> tuple[str, str]:
    """Decode CSV bytes: UTF-8 with BOM, UTF-8, else cp1252 (latin-1 as last resort)."""
    if data.startswith(b"\xef\xbb\xbf"):
        return data[3:].decode("utf-8", errors="strict"), "utf-8-sig"
    try:
        return data.decode("utf-8"), "utf-8"
    except UnicodeDecodeError:
        pass
    try:
        return data.decode("cp1252"), "cp1252"
    except UnicodeDecodeError:
        return data.decode("latin-1"), "latin-1"


def read_csv_rows(path: Path, rel: str) -> tuple[list[tuple], str]:
    """Rows of a CSV file as tuples of strings; the file's first record is row 1.

    Tuples rather than lists: a tuple of strings leaves the garbage collector's
    lists, so a file of a million rows is not scanned again and again while it is read.
    """
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise InputError(rel, f"cannot open file ({exc.strerror or exc})") from None
    if b"\x00" in data[:4096]:
        raise InputError(rel, "file holds binary data (NUL bytes); it is not a text CSV file")
    try:
        text, encoding = decode_text(data)
    except UnicodeDecodeError as exc:
        raise InputError(rel, f"file is not readable text ({exc.reason})") from None
    sample = text[:8192]
    try:
        delimiter = csv.Sniffer().sniff(sample, delimiters=",;\t|").delimiter
    except csv.Error:
        delimiter = ","
    try:
        rows = list(map(tuple, csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)))
    except csv.Error as exc:
        raise InputError(rel, f"malformed CSV ({exc})") from None
    return rows, encoding


# ---------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def safe_cell(value):
    """Neutralize text a spreadsheet would run as a formula (OWASP, CSV injection).

    Text starting with = + - @, a tab or a carriage return gets a leading
    apostrophe; numbers and other values pass unchanged.
    """
    if isinstance(value, str) and value.startswith(_FORMULA_START):
        return "'" + value
    return value


def safe_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy of ``frame`` with every text cell passed through :func:`safe_cell`."""
    out = frame.copy()
    for col in out.columns:
        if out[col].dtype == object:
            out[col] = out[col].map(safe_cell)
    return out


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temp file in the same folder and a rename."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write_csv(frame: pd.DataFrame, path: Path) -> None:
    """Atomic, formula-safe, deterministic CSV (UTF-8, LF line ends)."""
    text = safe_frame(frame).to_csv(index=False, lineterminator="\n")
    atomic_write_bytes(path, text.encode("utf-8"))


def write_json(obj, path: Path) -> None:
    atomic_write_bytes(path, (json.dumps(obj, indent=2, sort_keys=True, default=str) + "\n")
                       .encode("utf-8"))


def text_column(frame: pd.DataFrame, col: str) -> pd.Series:
    """A column as stripped text: "" for missing values and for a column the frame lacks.

    The same text whether the frame was built in memory or read back from CSV as text.
    """
    if col not in frame.columns:
        return pd.Series("", index=frame.index, dtype=object)
    s = frame[col]
    return s.astype(object).where(s.notna(), "").astype(str).str.strip().astype(object)
