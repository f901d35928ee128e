"""Tests for linker.records: the column-wise normalize stage gives what the per-value normalizers give.

The stage factorizes columns and works on distinct values (registration numbers
and names partly in numpy); every test here holds its output against the
per-value functions of linker.normalize, called cell by cell.
"""

from __future__ import annotations

import datetime as dt
import json
import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from linker import load_config
from linker.ingest import cell_text
from linker.normalize import (_ASCII_APOS_TABLE, _NON_ALNUM, IdScheme, _fold_once, _to_text, age_to_birth_range,
                              fold_text, infer_date_order, normalize_name, normalize_reg_no, normalize_sex,
                              parse_age, parse_date, split_full_name)
from linker.records import (_NameParts, _birth_ranges, _cell_texts, _distinct, _iso_dates, _reg_nos,
                            normalize_records)
from linker.schema import CANONICAL_FIELDS, DATE_FIELDS, RECORD_COLUMNS

SCHEMES = [
    IdScheme(digits=8, prefixes=("TR",), check_digit="luhn"),
    IdScheme(digits=8, prefixes=("HR", "NM", "H"), check_digit="luhn"),
    IdScheme(digits=6, prefixes=("X",), separators=("-",), check_digit="verhoeff"),
    IdScheme(digits=10, check_digit="damm"),
    IdScheme(digits=8, separators=("'", ".", ",")),                     # separators read as numbers
    IdScheme(digits=8, prefixes=("E",), separators=("\t", "_")),        # no space separator
    IdScheme(digits=7, prefixes=("1A",), separators=("--", " ")),       # not the clean form: step by step
    IdScheme(digits=8, prefixes=("NA",), separators=("/", "#", "!", "-")),
]
PIECES = ["0", "1", "2", "3", "4", "5", "6", "7", "8", "9", "00", "0000", "12345678", "04123386", "-", " ",
          "/", ".", ",", "'", "e", "E", "+", "TR", "tr", "Tr", "HR", "h", "NM", "X", "x", "1A", "NA", "n/a",
          "N/A", "\t", "\n", "\x1c", "\ufeff", "\u2013", "\uff10", "\u00b2", "#", "!", "_", "--", "A", "é"]
reg_texts = st.lists(st.sampled_from(PIECES), max_size=9).map("".join)
reg_cells = st.one_of(
    reg_texts, reg_texts, st.text(max_size=12), st.none(), st.booleans(),
    st.integers(min_value=-10 ** 12, max_value=10 ** 12),
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([0.0, -0.0, 1e15, 2.0 ** 53, 2.0 ** 53 - 1, 4123386.0, 4123386.5, np.float64(4123386),
                     np.int64(4123386), np.nan, pd.NA, "12345678.0", "1234567,00", "1.2345678E+07",
                     "HR-0412-3386", "'04123386", "  HR 0412 3386  ", "#DIV/0!", "TR-", "--"]),
)


def _as_objects(values) -> np.ndarray:
    out = np.empty(len(values), dtype=object)
    for i, v in enumerate(values):
        out[i] = v
    return out


def _assert_reg_nos_match(values, scheme):
    arr = _as_objects(values)
    for texts in (None, _cell_texts(arr)):
        reg, prefix, status, note = _reg_nos(arr, scheme, texts)
        for i, v in enumerate(values):
            want = normalize_reg_no(v, scheme)
            assert (reg[i], prefix[i], status[i], note[i]) == (want.reg_no, want.prefix, want.status, want.note), \
                (v, scheme)


# ---------------------------------------------------------------------------
# Registration numbers
# ---------------------------------------------------------------------------

@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(values=st.lists(reg_cells, min_size=1, max_size=40))
def test_reg_nos_equal_the_per_value_function(values):
    """Column-wise registration numbers = normalize_reg_no cell by cell, on every scheme."""
    for scheme in SCHEMES:
        _assert_reg_nos_match(values, scheme)


def test_reg_nos_on_enumerated_forms():
    """Every short combination of the pieces people write, plus numbers near each digit count."""
    short = ["", " ", "-", "TR", "tr ", "HR-", "'", "e", ".", ",", "0", "00"]
    bodies = ["04123386", "4123386", "0412 3386", "0412-3386", "041-233-86", "123", "123456789012",
              "00000000", "4123386.0", "4123386,00", "4.1E6", "0412/3386", "0412\t3386", "0412.3386"]
    values = [a + b + c for a in short for b in bodies for c in ("", " ", ".", "-0")]
    values += [n for k in range(1, 12) for n in (10 ** k - 1, 10 ** (k - 1), 4123386 % 10 ** k)]
    values += [float(v) for v in values if isinstance(v, int)] + [True, False, None, math.nan, [1, 2]]
    for scheme in SCHEMES:
        _assert_reg_nos_match(values, scheme)


def test_check_digits_decide_status_as_the_function_does():
    """All 8-digit numbers with a given payload: exactly the valid check digit passes."""
    payloads = ["0412338", "1234567", "0000001", "9999999"]
    values = [p + str(d) for p in payloads for d in range(10)]
    values += [v[1:] for v in values] + [v.lstrip("0") for v in values]
    for algorithm in ("luhn", "verhoeff", "damm", "none"):
        scheme = IdScheme(digits=8, check_digit=algorithm)
        _assert_reg_nos_match(values, scheme)
        _assert_reg_nos_match([int(v) for v in values], scheme)
        status = _reg_nos(_as_objects(values[:40]), scheme)[2]
        assert (status == "valid").sum() == (4 if algorithm != "none" else 40)


# ---------------------------------------------------------------------------
# Distinct values
# ---------------------------------------------------------------------------

def test_distinct_keeps_types_apart_and_gives_back_every_cell():
    """1, 1.0, True and "1" are four values; equal values of one type share a code."""
    stamp = pd.Timestamp("2019-03-04")
    values = [1, 1.0, True, "1", " 1", None, math.nan, float("nan"), np.float64(1.0), np.int64(1), 1, "1",
              pd.NA, stamp, dt.datetime(2019, 3, 4), dt.date(2019, 3, 4), [1], [1], 2.5, 2.5, False, 0, 0.0]
    codes, uniques = _distinct(pd.Series(values, dtype=object))
    back = uniques[codes]
    for v, b in zip(values, back):
        assert type(v) is type(b)
        assert v is b or v == b or (v != v and b != b)
    key = [(type(v).__name__, v if not isinstance(v, list) else tuple(v)) for v in values]
    for i in range(len(values)):
        for j in range(len(values)):
            if key[i] == key[j] and not isinstance(values[i], list) and values[i] is not pd.NA:
                assert codes[i] == codes[j], (values[i], values[j])
            if key[i][0] != key[j][0]:
                assert codes[i] != codes[j], (values[i], values[j])


@pytest.mark.parametrize("series", [
    pd.Series([3.0, np.nan, 3.0, -1.5]), pd.Series([1, 2, 1], dtype="int64"), pd.Series([True, False, True]),
    pd.Series(["a", "b", "a"], dtype=object), pd.Series(["a", None, "a"], dtype="string"),
    pd.Series(pd.to_datetime(["2019-03-04", None, "2019-03-04"])), pd.Series([], dtype=object),
])
def test_distinct_gives_back_tolist(series):
    codes, uniques = _distinct(series)
    assert len(codes) == len(series)
    for v, b in zip(series.tolist(), uniques[codes]):
        assert type(v) is type(b) and (v is b or v == b or (v != v and b != b))


# ---------------------------------------------------------------------------
# Names and text folding
# ---------------------------------------------------------------------------

def _fold_reference(value) -> str:
    """fold_text as it loops: _fold_once until a fixed point, at most four times."""
    text = _to_text(value)
    if not text:
        return ""
    if text.isascii():
        return " ".join(_NON_ALNUM.sub(" ", text.translate(_ASCII_APOS_TABLE)).upper().split())
    for _ in range(4):
        folded = _fold_once(text)
        if folded == text:
            break
        text = folded
    return text


name_texts = st.one_of(st.text(max_size=16), st.lists(st.sampled_from(
    ["Ana", "de", "la", "CRUZ", "García", "O'Brien", "van", "Dijk", ",", " ", "  ", "-", "N/A", "unknown", "NN",
     "ª", "ǅ", "İ", "ﬁ", "¨", "\u0301", "´", "ß", "Łukasz", "\x1c", "\u3000", "Ÿ", "ŉ"]), max_size=6).map("".join))


@settings(max_examples=300, deadline=None)
@given(text=name_texts)
def test_fold_and_name_parts_by_token_equal_the_functions(text):
    """Folding token by token (each distinct token once) = fold_text; name parts and splits likewise."""
    parts = _NameParts()
    assert fold_text(text) == _fold_reference(text)
    assert parts.fold(text) == fold_text(text)
    given_, family_ = normalize_name(text, None).given_name, normalize_name(None, text).family_name
    assert parts.part(text) == given_ == family_
    for order in ("given_first", "family_first"):
        assert parts.split_full(text, order) == split_full_name(text, order)


# ---------------------------------------------------------------------------
# Dates and ages
# ---------------------------------------------------------------------------

def test_iso_dates_are_exactly_the_plain_valid_ones():
    texts = ["2019-03-04", "2019-02-29", "2020-02-29", "2019-13-01", "2019-00-10", "2019-01-00", "0000-01-01",
             "1899-12-31", "1900-01-01", "2026-11-01", "2027-01-01", "9999-12-31", " 2019-03-04", "2019-3-4",
             "2019-03-04T00:00", "２019-03-04", "2019/03/04", 20190304, None]
    got = _iso_dates(_as_objects(texts), 1900, 2026)
    for text, fast in zip(texts, got):
        if fast:
            assert parse_date(text, order="mdy", min_year=1900, max_year=2026, assumed=True).iso == text
            assert parse_date(text, order="dmy", min_year=1900, max_year=2026).flag == ""
    assert got.tolist()[:11] == [True, False, True, False, False, False, False, False, True, True, False]


def test_birth_ranges_equal_the_function():
    """Month ends, leap days, fractional ages and dates at the ends of the calendar."""
    ages = ["0", "1", "7", "17", "120", "11 mo", "1 yr 6 mo", "6 weeks", "3 days", "7.5", "newborn", "2 yrs", 0.5]
    ranges = [parse_age(a) for a in ages] + [(0.0, 0.0), (12.0, 12.0)]
    days = [dt.date(2026, 11, 1), dt.date(2024, 2, 29), dt.date(2023, 3, 31), dt.date(2025, 12, 31),
            dt.date(2024, 3, 1), dt.date(1124, 1, 31), dt.date(1123, 12, 31), dt.date(1, 1, 1),
            dt.date(9998, 12, 31), dt.date(9999, 12, 31), dt.date(2000, 2, 29)]
    pairs = [(r, d) for r in ranges for d in days]
    lo, hi = _birth_ranges([r for r, _ in pairs], [d for _, d in pairs])
    for (r, d), a, b in zip(pairs, lo, hi):
        assert (a, b) == age_to_birth_range(r, d), (r, d)


# ---------------------------------------------------------------------------
# The stage, against the normalizers row by row
# ---------------------------------------------------------------------------

def _reference(raw: pd.DataFrame, cfg) -> pd.DataFrame:
    """The record table built row by row with the per-value normalizers."""
    frames = []
    for _, chunk in raw.groupby(["source_file", "sheet"], sort=False, dropna=False):
        cells = {f: chunk[f + "_obj"].tolist() for f in CANONICAL_FIELDS}
        order = chunk["full_name_order"].iloc[0]
        sheet_order = chunk["date_order"].iloc[0]
        codes = json.loads(chunk["sex_codes"].iloc[0])
        settings_ = {}
        for fld in DATE_FIELDS:
            if sheet_order == "auto":
                inferred, _ = infer_date_order([v for v in cells[fld] if isinstance(v, str)])
                settings_[fld] = (inferred or cfg.fallback_order, inferred is None)
            else:
                settings_[fld] = (sheet_order, False)
        rows = []
        for i in range(len(chunk)):
            rec, notes = {}, []
            for f in CANONICAL_FIELDS:
                rec[f + "_raw"] = cell_text(cells[f][i])
            reg = normalize_reg_no(cells["reg_no"][i], cfg.scheme)
            rec.update(reg_no=reg.reg_no, reg_no_prefix=reg.prefix, reg_no_status=reg.status)
            if reg.note:
                notes.append(f"reg_no: {reg.note}")
            name = normalize_name(rec["given_name_raw"], rec["family_name_raw"], rec["full_name_raw"],
                                  full_order=order)
            rec.update({k: getattr(name, k) for k in ("given_name", "family_name", "given_key", "family_key",
                                                      "name_key", "given_soundex", "family_soundex")})
            for fld in DATE_FIELDS:
                col_order, assumed = settings_[fld]
                limit = cfg.as_of.year if fld == "birth_date" else cfg.as_of.year + 1
                got = parse_date(cells[fld][i], order=col_order, min_year=cfg.min_year, max_year=limit,
                                 assumed=assumed, pivot_year=cfg.as_of.year)
                rec[fld] = got.iso
                v = cells[fld][i]
                blank = v is None or (isinstance(v, float) and v != v) or (isinstance(v, str) and not v.strip())
                if got.flag and not blank:
                    notes.append(f"{fld}: {got.flag}")
            rec["birth_year"] = int(rec["birth_date"][:4]) if rec["birth_date"] else pd.NA
            age = parse_age(cells["age"][i])
            rec["birth_date_min"] = rec["birth_date_max"] = ""
            rec["age_months"] = np.nan
            v = cells["age"][i]
            if age is None:
                if not (v is None or (isinstance(v, float) and v != v) or (isinstance(v, str) and not v.strip())):
                    notes.append(f"age: cannot read {rec['age_raw']!r} as an age")
            else:
                ref = cfg.as_of
                for fld in cfg.age_reference:
                    if rec[fld]:
                        ref = dt.date.fromisoformat(rec[fld])
                        break
                rec["birth_date_min"], rec["birth_date_max"] = age_to_birth_range(age, ref)
                rec["age_months"] = float(age[0])
            rec["sex"] = normalize_sex(cells["sex"][i], codes)
            if not rec["sex"] and rec["sex_raw"] and fold_text(rec["sex_raw"]).lower() not in codes:
                notes.append(f"sex: unknown code {rec['sex_raw']!r}")
            rec["location"] = fold_text(rec["location_raw"])
            rec["status"] = fold_text(rec["status_raw"])
            rec["notes"] = "; ".join(notes)
            rows.append(rec)
        frame = pd.DataFrame(rows)
        for c in ("record_id", "row_key", "source_file", "sheet", "row", "slot", "extras"):
            frame[c] = chunk[c].to_numpy()
        frames.append(frame)
    out = pd.concat(frames, ignore_index=True)
    out["birth_year"] = pd.array(out["birth_year"].tolist(), dtype="Int64")
    out["age_months"] = out["age_months"].astype(float)
    out["corrections"] = ""
    numbered = out[out["reg_no"] != ""]
    size = numbered.groupby(["row_key", "reg_no"])["record_id"].transform("size")
    out["reg_no_shared"] = False
    out.loc[size.index, "reg_no_shared"] = size.to_numpy() > 1
    text = "reg_no: the row shows this number for another person too"
    mask = out["reg_no_shared"]
    out.loc[mask, "notes"] = [f"{n}; {text}" if n else text for n in out.loc[mask, "notes"]]
    out = out[list(RECORD_COLUMNS)]
    for c in out.columns:
        if out[c].dtype == object:
            out[c] = out[c].astype(object)
    return out


CELLS = {
    "reg_no": ["HR-0412-3386", "04123386", 4123386, 4123386.0, "4123386", "hr 0412 3386", "'04123386", "N/A", "",
               None, np.nan, "1.2345678E+07", "0412338A", "00000000", "HR-", True, "04123387", "12345678.0", -5,
               "０４１２３３８６", "NM/1234/5678", [1, 2]],
    "given_name": ["Ana", "ana ", "María José", "", None, np.nan, "N/A", "O'Brien", "van der", "Łukasz", 7, "NN"],
    "family_name": ["de la Cruz García", "Ferro", "", None, "unknown", "Dijk", "GARCÍA", "Ferro-Vell", "LE", 3.0],
    "full_name": ["GARCIA, Ana", "Ana Maria de la Cruz", "van Dijk Sanne", "", None, "N/A", "Sanne", "Ó Briain, Seán",
                  "de la Cruz", 12],
    "birth_date": ["2019-03-04", "04/03/2019", "13/03/2019", "03/13/2019", "4 Mar 2019", "20190304", 43528, 43528.0,
                   dt.date(2019, 3, 4), pd.Timestamp("2019-03-04"), "", None, np.nan, "31/02/2019", "N/A", "2019",
                   "19-03-04", "2027-01-01", "1899-12-31", "2019-02-29", True, "04.03.19"],
    "age": ["7", 7, 7.0, "11 mo", "1 yr 6 mo", "7.5", "newborn", "7-8", "", None, np.nan, -1, "abc", 121, "6 weeks"],
    "sex": ["M", "f", "Female", "1", 1, 1.0, "x", "q", "", None, np.nan, "FEMALE ", "2.0", True],
    "intake_date": ["2026-05-01", "01/05/2026", "2026-02-31", "", None, np.nan, dt.datetime(2026, 5, 1, 13, 5),
                    "2027-12-31", "12/31/2026"],
    "placement_date": [np.nan, "2026-06-01", "", None],
    "release_date": [np.nan, None],
    "location": ["Ashby Crossing", "ASHBY  crossing", "", None, np.nan, "Kestrel-Point", 12],
    "status": [np.nan, "open", "Closed ", None],
}


def _raw_frame(n: int, seed: int) -> pd.DataFrame:
    """Raw records over four sheets (interleaved rows, different settings), cells drawn from CELLS."""
    rng = np.random.default_rng(seed)
    sheets = [("a.xlsx", "One", "auto", "given_first", {"m": "M", "f": "F", "female": "F"}),
              ("a.xlsx", "Two", "mdy", "family_first", {"1": "M", "2": "F", "x": ""}),
              ("b.csv", "b", "dmy", "given_first", {"m": "M", "f": "F"}),
              ("c.csv", "c", "auto", "given_first", {"m": "M", "f": "F", "female": "F"})]
    which = rng.integers(0, len(sheets), n)
    rows = np.arange(n) // 2 + 2
    data = {
        "record_id": [f"R{i:05d}" for i in range(n)],
        "row_key": [f"W{which[i]}-{rows[i]}" for i in range(n)],
        "source_file": [sheets[w][0] for w in which], "sheet": [sheets[w][1] for w in which],
        "row": rows, "slot": np.where(np.arange(n) % 2, "child", "parent").astype(object),
        "extras": ["{}"] * n,
    }
    for fld in CANONICAL_FIELDS:
        pool = CELLS[fld]
        picks = rng.integers(0, len(pool), n)
        col = np.empty(n, dtype=object)
        for i, k in enumerate(picks):
            col[i] = pool[k]
        data[fld + "_obj"] = col
    data["date_order"] = [sheets[w][2] for w in which]
    data["full_name_order"] = [sheets[w][3] for w in which]
    data["sex_codes"] = [json.dumps(sheets[w][4], sort_keys=True) for w in which]
    raw = pd.DataFrame(data)
    raw["release_date_obj"] = np.nan                       # a float64 column, as an empty CSV column reads
    return raw


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_normalize_records_equals_the_normalizers_row_by_row(project, seed):
    """Messy cells of every type over interleaved sheets with different settings: the same frame."""
    _root, write_config = project
    cfg = load_config(write_config())
    raw = _raw_frame(400, seed)
    got = normalize_records(raw, cfg)
    want = _reference(raw, cfg)
    assert list(got.columns) == list(RECORD_COLUMNS)
    assert got.dtypes.equals(want.dtypes)
    pd.testing.assert_frame_equal(got, want, check_exact=True)
    assert got["reg_no_shared"].any() and got["notes"].str.contains("; ").any()
    assert got.groupby(["source_file", "sheet"], sort=False).ngroup().is_monotonic_increasing   # sheet by sheet


def test_one_row_and_empty_input(project):
    _root, write_config = project
    cfg = load_config(write_config())
    raw = _raw_frame(1, 5)
    pd.testing.assert_frame_equal(normalize_records(raw, cfg), _reference(raw, cfg), check_exact=True)
    empty = normalize_records(raw.iloc[:0], cfg)
    assert list(empty.columns) == list(RECORD_COLUMNS) and empty.empty


def test_unknown_full_name_order_raises_as_the_normalizer(project):
    _root, write_config = project
    cfg = load_config(write_config())
    raw = _raw_frame(20, 7)
    raw["full_name_order"] = "surname_first"
    with pytest.raises(ValueError, match="full name order"):
        normalize_records(raw, cfg)
