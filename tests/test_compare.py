"""Tests for linker.compare."""

import numpy as np
import pandas as pd
import pytest

from linker.compare import DEFAULT_PERSON_FIELDS, FieldComparison, compare, jaro_winkler, level_frame
from linker.schema import EVENT_FIELDS

# Winkler 1994 Table 2.1 / Porter & Winkler 1997 / Winkler 2006 Table 2, as transcribed in
# REFERENCES.md section 1 (read-2).  The paper's 0.000 rows are tested at the formula values
# REFERENCES.md gives (HARDIN/MARTINEZ 0.7222, ITMAN/SMITH 0.4667, JON/JAN 0.8000).
JW_TABLE = [
    ("SHACKLEFORD", "SHACKELFORD", 0.982), ("DUNNINGHAM", "CUNNIGHAM", 0.896),
    ("NICHLESON", "NICHULSON", 0.956), ("JONES", "JOHNSON", 0.832), ("MASSEY", "MASSIE", 0.933),
    ("ABROMS", "ABRAMS", 0.922), ("HARDIN", "MARTINEZ", 0.722), ("ITMAN", "SMITH", 0.467),
    ("JERALDINE", "GERALDINE", 0.926), ("MARHTA", "MARTHA", 0.961), ("MICHELLE", "MICHAEL", 0.921),
    ("JULIES", "JULIUS", 0.933), ("TANYA", "TONYA", 0.880), ("DWAYNE", "DUANE", 0.840),
    ("SEAN", "SUSAN", 0.805), ("JON", "JOHN", 0.933), ("JON", "JAN", 0.800),
]


def test_jaro_winkler_matches_published_table():
    """Our name similarity reproduces the Winkler table values to 3 decimals (REFERENCES.md §1)."""
    a, b, expected = zip(*JW_TABLE)
    got = jaro_winkler(np.array(a, dtype=object), np.array(b, dtype=object))
    assert np.round(got, 3).tolist() == list(expected)
    # exact fractions given in REFERENCES.md §1: SHACKLEFORD 54/55, MARHTA 173/180
    assert got[0] == pytest.approx(54 / 55, abs=1e-12)
    assert got[9] == pytest.approx(173 / 180, abs=1e-12)


def _persons(rows):
    cols = ["reg_no", "reg_no_shared", "given_name", "family_name", "name_key", "given_soundex", "family_soundex",
            "birth_date", "birth_date_min", "birth_date_max", "sex"]
    return pd.DataFrame(rows, columns=cols)


def _level_names(recs, pairs, fields=DEFAULT_PERSON_FIELDS):
    left, right = zip(*pairs)
    lv = compare(recs, (np.array(left), np.array(right)), fields)
    return level_frame(lv, fields).astype(str)


def _person(reg="", shared=False, given="", family="", key=None, gsx="", fsx="", dob="", lo="", hi="", sex=""):
    if key is None:
        key = " ".join(sorted(set(f"{given} {family}".split())))
    return [reg, shared, given, family, key, gsx, fsx, dob, lo, hi, sex]


def test_reg_no_levels():
    """reg_no: exact, one edit (substitution, adjacent swap, dropped digit), different, missing, shared flag."""
    recs = _persons([_person("12345678"), _person("12345678"), _person("12345679"), _person("21345678"),
                     _person("1234567"), _person("87654321"), _person(""), _person("12345678", shared=True)])
    got = _level_names(recs, [(0, 1), (0, 2), (0, 3), (0, 4), (0, 5), (0, 6), (0, 7)])["reg_no"].tolist()
    assert got == ["exact", "one_edit", "one_edit", "one_edit", "different", "missing", "missing"]


def test_given_name_levels():
    """Name levels in order: exact, JW high, JW medium, swapped, phonetic, different, missing."""
    recs = _persons([
        _person(given="MARTHA", family="KOWALSKI", gsx="M630"),  # 0
        _person(given="MARTHA", family="NOWAK", gsx="M630"),     # 1 exact
        _person(given="MARHTA", family="NOWAK", gsx="M630"),     # 2 JW 0.961
        _person(given="MARTA", family="NOWAK", gsx="M630"),     # 3 JW 0.967 -> high too
        _person(given="TANYA", family="BELL", gsx="T500"),       # 4
        _person(given="TONYA", family="BELL", gsx="T500"),       # 5 JW 0.880 -> medium
        _person(given="KOWALSKI", family="MARTHA", gsx="K420"),  # 6 swapped with 0
        _person(given="ROBERT", family="X", gsx="R163"),         # 7
        _person(given="RUPERT", family="Y", gsx="R163"),         # 8 phonetic only (JW 0.778)
        _person(given="ZOE", family="Y", gsx="Z000"),            # 9 different
        _person(given="", family="Y"),                            # 10 missing
    ])
    got = _level_names(recs, [(0, 1), (0, 2), (4, 5), (0, 6), (7, 8), (0, 9), (0, 10)])["given_name"].tolist()
    assert got == ["exact", "jw_high", "jw_medium", "swapped", "phonetic", "different", "missing"]


def test_one_shared_word_is_not_a_swap():
    """Given name = other's family name counts as swapped only if the other cross pair is missing or similar."""
    recs = _persons([
        _person(given="CASSANDRA", family="EWALD", gsx="C253"),
        _person(given="PULFRD", family="CASSANDRA", gsx="P416"),     # other cross pair EWALD / PULFRD: no swap
        _person(given="EWALT", family="CASSANDRA", gsx="E143"),      # EWALD / EWALT similar: a swap with a typo
        _person(given="", family="CASSANDRA"),                        # other part missing
        _person(given="BRUNO", family="CASSANDRA", gsx="B650"),
    ])
    got = _level_names(recs, [(0, 1), (0, 2), (0, 4)])
    assert got["given_name"].tolist() == ["different", "swapped", "different"]
    assert got["family_name"].tolist() == ["different", "swapped", "different"]
    assert _level_names(recs, [(0, 3)])["family_name"].tolist() == ["swapped"]


def test_family_name_part_level():
    """A double family name against one of its parts is the 'part' level; name_key equality is 'swapped'."""
    recs = _persons([
        _person(given="ANA", family="GARCIA LOPEZ", fsx="G620"),
        _person(given="ANA", family="LOPEZ", fsx="L120"),
        _person(given="ANA", family="LOPEZ GARCIA", fsx="L120"),
        _person(given="ANA", family="ZED", fsx="Z300"),
    ])
    got = _level_names(recs, [(0, 1), (0, 2), (0, 3)])["family_name"].tolist()
    # GARCIA LOPEZ / LOPEZ GARCIA share parts too; part comes before swapped in the level order
    assert got == ["part", "part", "different"]
    no_parts = [f if f.name != "family_name" else FieldComparison(
        "family_name", "name", ("family_name",), swap_column="given_name", key_column="name_key",
        phonetic_column="family_soundex") for f in DEFAULT_PERSON_FIELDS]
    got2 = _level_names(recs, [(0, 1), (0, 2)], no_parts)["family_name"].tolist()
    # without the part level, a dropped family-name part still shows as a subset of the order-free key
    assert got2 == ["swapped", "swapped"]


def test_swapped_level_covers_a_full_name_split_at_the_wrong_place():
    """One order-free key holding every token (two or more) of the other is 'swapped' on both name fields."""
    recs = _persons([
        _person(given="BAEZ", family="NUNEZ NICOLAS"),     # "Baez Nunez Nicolas" read as given-first
        _person(given="NICOLAS", family="BAEZ"),
        _person(given="ANA", family="RUIZ"),
        _person(given="ANA", family="SOL"),               # one shared token only: no swap
    ])
    got = _level_names(recs, [(0, 1), (2, 3)])
    assert got["given_name"].tolist() == ["swapped", "exact"]
    assert got["family_name"].tolist() == ["swapped", "different"]


def test_reg_no_different_unverified_when_a_number_failed_validation():
    """Numbers two or more edits apart: 'different' when both are valid, 'different_unverified' otherwise."""
    recs = _persons([_person("12345678"), _person("87654321"), _person("87654399")])
    recs["reg_no_status"] = ["valid", "valid", "check_failed"]
    got = _level_names(recs, [(0, 1), (0, 2), (1, 2)])["reg_no"].tolist()
    assert got == ["different", "different_unverified", "different_unverified"]
    # without the status column every number counts as verified
    got2 = _level_names(recs.drop(columns="reg_no_status"), [(0, 2)])["reg_no"].tolist()
    assert got2 == ["different"]


def test_date_levels():
    """Date levels: exact, day-month swap, one component off, within k days, different, missing."""
    recs = _persons([_person(dob="2010-03-05"), _person(dob="2010-03-05"), _person(dob="2010-05-03"),
                     _person(dob="2011-03-05"), _person(dob="2010-02-27"), _person(dob="1999-12-31"),
                     _person(dob=""), _person(dob="2010-13-45")])
    got = _level_names(recs, [(0, 1), (0, 2), (0, 3), (0, 4), (0, 5), (0, 6), (0, 7)])["birth_date"].tolist()
    assert got == ["exact", "day_month_swapped", "one_component", "within_days", "different", "missing",
                   "missing"]


def test_date_against_stated_age():
    """One side with only an age range: consistent inside it, inconsistent outside; two ranges by overlap."""
    recs = _persons([_person(dob="2010-03-05"), _person(lo="2009-06-01", hi="2010-06-01"),
                     _person(lo="2011-01-01", hi="2011-12-31"), _person(lo="2010-01-01", hi="2010-12-31")])
    got = _level_names(recs, [(0, 1), (0, 2), (1, 3), (2, 1)])["birth_date"].tolist()
    assert got == ["age_consistent", "age_inconsistent", "age_consistent", "age_inconsistent"]


def test_sex_string_and_exact_kinds():
    """sex same/different/missing; generic string and generic exact levels."""
    recs = pd.DataFrame({"sex": ["M", "M", "F", ""], "town": ["SPRINGVALE", "SPRINGVALE", "SPRINGVAEL", "OAKS"],
                         "code": ["a", "a", "b", ""]})
    fields = [FieldComparison("sex", "sex", ("sex",)),
              FieldComparison("town", "string", ("town",), high=0.95, medium=0.5),
              FieldComparison("code", "exact", ("code",))]
    got = _level_names(recs, [(0, 1), (0, 2), (0, 3)], fields)
    assert got["sex"].tolist() == ["same", "different", "missing"]
    assert got["town"].tolist() == ["exact", "jw_high", "different"]
    assert got["code"].tolist() == ["same", "different", "missing"]
    recs2 = pd.DataFrame({"town": ["TANYA", "TONYA", "ZZZZZ"]})
    got2 = _level_names(recs2, [(0, 1), (0, 2)], [FieldComparison("t", "string", ("town",))])
    assert got2["t"].tolist() == ["jw_medium", "different"]


def test_levels_are_int8_symmetric_and_chunk_independent():
    """Level matrix is int8, the same for swapped pair sides, and the same for any chunk size."""
    rng = np.random.default_rng(3)
    names = np.array(["ANNA", "ANA", "HANNA", "JOHN", "JON", ""], dtype=object)
    recs = _persons([_person(reg=str(rng.integers(10, 13)), given=str(rng.choice(names)),
                             family=str(rng.choice(names)), dob=f"2010-0{rng.integers(1, 4)}-0{rng.integers(1, 4)}",
                             sex=str(rng.choice(["M", "F", ""]))) for _ in range(60)])
    left = rng.integers(0, 60, 500)
    right = rng.integers(0, 60, 500)
    keep = left != right
    left, right = left[keep], right[keep]
    full = compare(recs, (left, right))
    assert full.dtype == np.int8 and full.shape == (left.size, len(DEFAULT_PERSON_FIELDS))
    np.testing.assert_array_equal(full, compare(recs, (right, left)))
    np.testing.assert_array_equal(full, compare(recs, (left, right), chunk_size=7))


def test_default_person_fields_use_identity_evidence_only():
    """The default person comparison set uses no event field (intake/release dates, location)."""
    used = {c for f in DEFAULT_PERSON_FIELDS for c in f.required_columns() + ((f.flag_column,) if f.flag_column
                                                                             else ())}
    assert not used & set(EVENT_FIELDS)
    assert {"reg_no", "given_name", "family_name", "birth_date", "sex"} <= used


def test_missing_column_is_named():
    """compare names the columns the records lack."""
    with pytest.raises(ValueError, match="birth_date"):
        compare(pd.DataFrame({"reg_no": ["1"]}), ([0], [0]), [FieldComparison("d", "date", ("birth_date",))])


def test_token_codes_keep_distinct_words_in_order_whatever_the_values_hold():
    """Words split at once over all values or one value at a time (a value holding the join mark,
    or not a str) give the same tokens: distinct words in order, counted once."""
    from linker.compare import _token_codes

    plain = np.array(["ANA MARIA", "", "MARIA ANA ANA", "  LUZ  ", "SOL"], dtype=object)
    mat, counts = _token_codes(plain)
    assert counts.tolist() == [2, 0, 2, 1, 1]
    assert mat[0, :2].tolist() == mat[2, :2][::-1].tolist()        # same two words, other order
    assert (mat[1] == -1).all() and (mat[0, 2:] == -1).all()
    odd = np.append(plain, np.array(["X \x01 Y", 7], dtype=object))  # the mark inside a value; a number
    mat2, counts2 = _token_codes(odd)
    assert counts2.tolist() == [2, 0, 2, 1, 1, 3, 0]
    np.testing.assert_array_equal(mat2[:5], mat)
