"""Tests for linker.normalize: per-value normalizers.

Source tags follow ../shared/REFERENCES.md (beside the repository): read = seen in the source;
read-2 = seen as quoted by a secondary source; derived = worked by hand from
rules that were read; from memory = not seen; common practice = a habit of
the trade, not a published value.
"""

from __future__ import annotations

import calendar
import datetime as dt
import math

import pandas as pd
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from openpyxl.utils.datetime import CALENDAR_MAC_1904, from_excel

from linker.normalize import (
    DEFAULT_SEX_CODES,
    PARTICLES,
    IdScheme,
    Name,
    ParsedDate,
    RegNo,
    age_to_birth_range,
    check_digit_valid,
    damm_check_digit,
    date_parts,
    excel_serial_to_date,
    fold_header,
    fold_text,
    infer_date_order,
    luhn_check_digit,
    normalize_name,
    normalize_reg_no,
    normalize_sex,
    parse_age,
    parse_date,
    split_full_name,
    verhoeff_check_digit,
)

ALGORITHMS = ("none", "luhn", "verhoeff", "damm")
CHECK_FN = {"luhn": luhn_check_digit, "verhoeff": verhoeff_check_digit, "damm": damm_check_digit}
HR = IdScheme(digits=8, prefixes=("HR", "NM"), check_digit="luhn")
PLAIN = IdScheme(digits=8, prefixes=("HR", "NM"))
SCHEMES = [IdScheme(), HR, PLAIN, IdScheme(digits=6, prefixes=("X",), separators=("-",), check_digit="verhoeff"),
           IdScheme(digits=10, check_digit="damm")]

cells = st.one_of(
    st.none(),
    st.text(),
    st.integers(),
    st.floats(allow_nan=True, allow_infinity=True),
    st.booleans(),
    st.sampled_from(["N/A", "#N/A", "1.2345678E+07", "HR-0412-3386", "12345678.0", "31/02/2019",
                     "4 Mar 2019", "newborn", "1 yr 6 mo", "O'Brien", "ß", "İ", "ﬁ", "ǅ", "ŉ", "\u00b4"]),
)


# ---------------------------------------------------------------------------
# Property tests
# ---------------------------------------------------------------------------

@settings(max_examples=400, deadline=None)
@given(value=cells, as_of=st.dates(min_value=dt.date(1, 1, 1), max_value=dt.date(9999, 12, 31)))
def test_normalizers_never_raise(value, as_of):
    """Every per-value normalizer returns its plain result type on arbitrary cells."""
    assert isinstance(fold_text(value), str)
    assert isinstance(fold_header(value), str)
    for scheme in SCHEMES:
        reg = normalize_reg_no(value, scheme)
        assert reg.status in ("valid", "check_failed", "wrong_length", "unrecoverable", "invalid", "missing")
        assert reg.reg_no == "" or reg.reg_no.isdigit()
    for order in ("given_first", "family_first"):
        assert isinstance(normalize_name(full=value, full_order=order), Name)
        assert all(isinstance(p, str) for p in split_full_name(value, order))
    assert isinstance(normalize_name(given=value, family=value), Name)
    for order in ("dmy", "mdy", "ymd"):
        got = parse_date(value, order=order, assumed=True)
        assert isinstance(got, ParsedDate)
        assert got.iso == "" or dt.date.fromisoformat(got.iso)
    parts = date_parts(value)
    assert parts is None or len(parts) == 3
    assert infer_date_order([value])[0] in (None, "dmy", "mdy")
    assert normalize_sex(value, DEFAULT_SEX_CODES) in ("M", "F", "")
    age = parse_age(value)
    assert age is None or 0 <= age[0] < age[1]
    earliest, latest = age_to_birth_range(age, as_of)
    assert (earliest == "" or latest == "" or earliest <= latest) if age else (earliest, latest) == ("", "")
    if isinstance(value, float) or (isinstance(value, int) and not isinstance(value, bool)):
        got = excel_serial_to_date(value)
        assert got is None or isinstance(got, dt.date)


@settings(max_examples=500, deadline=None)
@given(st.text())
def test_fold_text_idempotent(text):
    """Folding folded text changes nothing."""
    once = fold_text(text)
    assert fold_text(once) == once


@settings(max_examples=500, deadline=None)
@given(st.text())
def test_fold_header_idempotent(text):
    """Folding a folded header changes nothing, and leaves no spaces or punctuation."""
    once = fold_header(text)
    assert fold_header(once) == once
    assert " " not in once and "#" not in once


name_tokens = st.lists(st.sampled_from(["ANA", "MARIA", "DE", "LA", "CRUZ", "GARCIA", "VAN", "DER",
                                        "BERG", "LE", "DO", "Y", "José", "O'Brien", "Øster"]),
                       min_size=0, max_size=4)


@settings(max_examples=300, deadline=None)
@given(name_tokens, name_tokens)
def test_name_key_order_insensitive(given_tokens, family_tokens):
    """name_key is the same when given and family are swapped or their tokens reordered."""
    g, f = " ".join(given_tokens), " ".join(family_tokens)
    key = normalize_name(g, f).name_key
    assert normalize_name(f, g).name_key == key
    assert normalize_name(" ".join(reversed(given_tokens)), " ".join(reversed(family_tokens))).name_key == key


@settings(max_examples=400, deadline=None)
@given(algorithm=st.sampled_from(ALGORITHMS),
       payload=st.text(alphabet="0123456789", min_size=7, max_size=7),
       prefix=st.sampled_from(["", "HR", "hr", "Nm", "NM"]),
       after_prefix=st.sampled_from(["", "-", " ", "/", "."]),
       layout=st.sampled_from([(8,), (4, 4), (2, 3, 3), (3, 5), (1, 7)]),
       sep=st.sampled_from(["", "-", " ", "/", "."]),
       pad=st.sampled_from(["", " ", "  ", "\t"]))
def test_reg_no_any_allowed_rendering_is_valid(algorithm, payload, prefix, after_prefix, layout, sep, pad):
    """A valid number written with any allowed prefix/separator style keeps its digits and is valid."""
    number = payload + (CHECK_FN[algorithm](payload) if algorithm != "none" else "5")
    assume(set(number) != {"0"})
    scheme = IdScheme(digits=8, prefixes=("HR", "NM"), check_digit=algorithm)
    groups, start = [], 0
    for size in layout:
        groups.append(number[start:start + size])
        start += size
    text = pad + prefix + (after_prefix if prefix else "") + sep.join(groups) + pad
    got = normalize_reg_no(text, scheme)
    assert got == RegNo(number, prefix.upper(), "valid", "")


two_digit_formats = [("%d-%m-%y", "dmy"), ("%m/%d/%y", "mdy"), ("%d%b%y", "dmy")]
four_digit_formats = [
    ("%Y-%m-%d", "dmy"), ("%Y/%m/%d", "mdy"), ("%d.%m.%Y", "dmy"), ("{d}/{m}/%Y", "dmy"),
    ("%m/%d/%Y", "mdy"), ("{d}-{m}-%Y", "dmy"), ("{d} %b %Y", "dmy"), ("%B {d}, %Y", "mdy"),
    ("%d%b%Y", "dmy"), ("%Y%m%d", "dmy"), ("%Y-%m-%d %H:%M:%S", "dmy"), ("%Y-%m-%dT%H:%M", "mdy"),
    ("{d}/{m}/%Y %H:%M", "dmy"), ("%d-%b-%Y", "mdy"), ("%A, {d} %B %Y", "dmy"),
]


def _render(day: dt.date, fmt: str) -> str:
    return dt.datetime(day.year, day.month, day.day, 10, 30).strftime(
        fmt.replace("{d}", str(day.day)).replace("{m}", str(day.month)))


@settings(max_examples=300, deadline=None)
@given(day=st.dates(min_value=dt.date(1900, 3, 1), max_value=dt.date(2029, 12, 31)),
       assumed=st.booleans())
def test_parse_date_round_trips_every_format(day, assumed):
    """A date rendered in each supported format (and as date objects or a serial) parses back to it."""
    iso = day.isoformat()
    for fmt, order in four_digit_formats:
        text = _render(day, fmt)
        assert parse_date(text, order=order, assumed=assumed).iso == iso, text
        assert parse_date(text.upper(), order=order).iso == iso, text
    if day.year >= 1930:                       # inside the default two-digit window 1930-2029
        for fmt, order in two_digit_formats:
            got = parse_date(_render(day, fmt), order=order)
            assert got.iso == iso and "two-digit year" in got.flag
    assert parse_date(day).iso == iso
    assert parse_date(dt.datetime(day.year, day.month, day.day, 23, 59)).iso == iso
    assert parse_date(pd.Timestamp(day)).iso == iso
    serial = (day - dt.date(1899, 12, 30)).days        # 1900 system after 1 March 1900
    if 1900 <= serial <= 2029:     # a whole number that is a plausible year reads as a year
        assert parse_date(serial) == ParsedDate("", f"year only {serial}")
    else:
        assert parse_date(serial) == ParsedDate(iso, "from serial number")
    assert parse_date(serial + 0.75) == ParsedDate(iso, "from serial number")


@settings(max_examples=200, deadline=None)
@given(algorithm=st.sampled_from(["luhn", "verhoeff", "damm"]),
       payload=st.text(alphabet="0123456789", min_size=1, max_size=12),
       position=st.integers(min_value=0), delta=st.integers(min_value=1, max_value=9))
def test_check_digits_catch_single_substitutions(algorithm, payload, position, delta):
    """An appended check digit validates, and any single-digit change is caught (from memory: all three detect every single substitution)."""
    number = payload + CHECK_FN[algorithm](payload)
    assert check_digit_valid(number, algorithm)
    i = position % len(number)
    changed = number[:i] + str((int(number[i]) + delta) % 10) + number[i + 1:]
    assert not check_digit_valid(changed, algorithm)


@settings(max_examples=200, deadline=None)
@given(algorithm=st.sampled_from(["verhoeff", "damm"]),
       payload=st.text(alphabet="0123456789", min_size=2, max_size=12), position=st.integers(min_value=0))
def test_verhoeff_damm_catch_adjacent_transpositions(algorithm, payload, position):
    """Verhoeff and Damm catch every swap of two different adjacent digits (from memory)."""
    number = payload + CHECK_FN[algorithm](payload)
    i = position % (len(number) - 1)
    assume(number[i] != number[i + 1])
    swapped = number[:i] + number[i + 1] + number[i] + number[i + 2:]
    assert not check_digit_valid(swapped, algorithm)


# ---------------------------------------------------------------------------
# External checks
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("name, code", [
    # US National Archives, "The Soundex Indexing System" (REFERENCES.md section 2, read)
    ("Washington", "W252"), ("Lee", "L000"), ("Gutierrez", "G362"), ("Pfister", "P236"),
    ("Jackson", "J250"), ("Tymczak", "T522"), ("VanDeusen", "V532"), ("Ashcraft", "A261"),
    # older NARA guide (REFERENCES.md section 2, read)
    ("Kuhne", "K500"), ("Ebell", "E140"), ("Ebelson", "E142"), ("Kelly", "K400"),
    ("Buerck", "B620"), ("Lloyd", "L300"), ("Schaefer", "S160"),
    # Wikipedia (REFERENCES.md section 2, read-2)
    ("Robert", "R163"), ("Rupert", "R163"), ("Rubin", "R150"), ("Ashcroft", "A261"), ("Honeyman", "H555"),
    # FamilySearch wiki (REFERENCES.md section 2, read)
    ("Carwruth", "C630"), ("Roses", "R220"), ("Campbell", "C514"),
])
def test_family_soundex_matches_published_codes(name, code):
    """family_soundex gives the published American Soundex codes."""
    assert normalize_name(family=name).family_soundex == code


def test_soundex_prefixed_name_coded_both_ways():
    """NARA codes prefixed names both ways: written together V532, with the particle apart D250 (read)."""
    assert normalize_name(family="VanDeusen").family_soundex == "V532"
    # the particle VAN is dropped from the key, leaving Deusen = D250 (NARA, read)
    assert normalize_name(family="Van Deusen").family_soundex == "D250"


@pytest.mark.parametrize("serial, expected", [
    # ECMA-376 "Date Representation" (REFERENCES.md section 7, read)
    (1, dt.date(1900, 1, 1)), (59, dt.date(1900, 2, 28)), (61, dt.date(1900, 3, 1)),
    (3687, dt.date(1910, 2, 3)), (38749, dt.date(2006, 2, 1)), (2958465, dt.date(9999, 12, 31)),
    # Microsoft "Date systems in Excel" (REFERENCES.md section 7, read-2)
    (40729, dt.date(2011, 7, 5)),
    (38749.99, dt.date(2006, 2, 1)),   # fractional part is the time of day (ECMA-376, read)
])
def test_excel_1900_serials_follow_ecma376(serial, expected):
    """1900-system serials give the ECMA-376 dates."""
    assert excel_serial_to_date(serial) == expected


@pytest.mark.parametrize("serial, expected", [
    # ECMA-376 and MS-XLS (REFERENCES.md section 7, read)
    (0, dt.date(1904, 1, 1)), (2225, dt.date(1910, 2, 3)), (37287, dt.date(2006, 2, 1)),
    (2957003, dt.date(9999, 12, 31)),
    (39267, dt.date(2011, 7, 5)),      # Microsoft "Date systems in Excel" (read-2)
])
def test_excel_1904_serials_follow_ecma376(serial, expected):
    """1904-system serials give the ECMA-376 dates."""
    assert excel_serial_to_date(serial, system=1904) == expected


@pytest.mark.parametrize("serial, system", [
    (60, 1900),        # the fictitious 1900-02-29 (ECMA-376, read)
    (0, 1900), (0.5, 1900), (-1, 1900), (2958466, 1900), (-1, 1904), (2957004, 1904),
    (float("nan"), 1900), (float("inf"), 1904),
])
def test_excel_serials_out_of_range_give_none(serial, system):
    """The fictitious 29 Feb 1900 and serials outside the valid range give None."""
    assert excel_serial_to_date(serial, system=system) is None


def test_excel_serials_agree_with_openpyxl():
    """Our serial dates equal openpyxl's from_excel, apart from its known deviations (REFERENCES.md section 7)."""
    serials = list(range(1, 60)) + list(range(61, 2958466, 997)) + [2958465, 45292.5, 61.25]
    for s in serials:
        assert excel_serial_to_date(s) == from_excel(s).date(), s
    for s in list(range(1, 3000, 7)) + list(range(3000, 2957004, 1013)) + [2957003]:
        assert excel_serial_to_date(s, system=1904) == from_excel(s, epoch=CALENDAR_MAC_1904).date(), s
    # openpyxl's deviations: serial 60 -> 1900-02-28 where ECMA-376 has the fictitious 29 Feb,
    # and serials below 1 -> a time of day, not a date (REFERENCES.md section 7, read)
    assert from_excel(60).date() == dt.date(1900, 2, 28) and excel_serial_to_date(60) is None
    assert isinstance(from_excel(0.5), dt.time) and excel_serial_to_date(0.5) is None


def test_check_digits_match_published_examples():
    """Luhn, Verhoeff and Damm give the published check digits (REFERENCES.md section 8)."""
    assert luhn_check_digit("7992739871") == "3"            # Wikipedia text, read-2
    assert check_digit_valid("79927398713", "luhn")         # Wikipedia text, read-2
    assert verhoeff_check_digit("236") == "3"               # Wikipedia, read-2
    assert check_digit_valid("2363", "verhoeff")            # Wikipedia, read-2
    assert check_digit_valid("1428570", "verhoeff")         # Wikipedia example, read-2
    assert damm_check_digit("572") == "4"                   # Wikipedia/Damm's table, read
    assert check_digit_valid("5724", "damm")                # checks to 0: Wikipedia, read


def test_check_digit_rejects_bad_input():
    """Non-digit numbers are not valid, and an unknown algorithm or payload is an error."""
    assert not check_digit_valid("7992739871X", "luhn")
    assert not check_digit_valid("", "damm")
    assert not check_digit_valid("79927398712", "luhn")
    assert check_digit_valid("12", "none")
    with pytest.raises(ValueError, match="unknown check digit algorithm 'mod11'"):
        check_digit_valid("12", "mod11")
    with pytest.raises(ValueError, match="digits"):
        luhn_check_digit("12a")


# ---------------------------------------------------------------------------
# Text folding
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("raw, folded", [
    ("O'Brien", "OBRIEN"), ("O’Brien", "OBRIEN"), ("D`Angelo", "DANGELO"), ("d´Ávila", "DAVILA"),
    ("Jean-Luc", "JEAN LUC"), ("  García   López ", "GARCIA LOPEZ"), ("Straße", "STRASSE"),
    ("Øster", "OSTER"), ("Łukasz", "LUKASZ"), ("Æsir", "AESIR"), ("Œuvre", "OEUVRE"),
    ("Đorđe", "DORDE"), ("Þór", "THOR"), ("Kırık", "KIRIK"), ("Nguyễn", "NGUYEN"),
    ("smith_jr.", "SMITH JR"), ("ﬁnn", "FINN"), (None, ""), (float("nan"), ""), (12.0, "12"), ("", ""),
])
def test_fold_text_examples(raw, folded):
    """fold_text folds accents, special letters, apostrophes and punctuation as specified."""
    assert fold_text(raw) == folded


@pytest.mark.parametrize("raw, folded", [
    ("Child D.O.B.", "childdob"), ("Reg. No.", "regno"), ("Número de registro", "numeroderegistro"),
    ("Guardian Reg #", "guardianregno"), ("N° de registro", "noderegistro"), ("Nº registro", "noregistro"),
    ("  Date of\nBirth ", "dateofbirth"), ("child_first-name", "childfirstname"), (None, ""),
])
def test_fold_header_examples(raw, folded):
    """fold_header lower-cases, folds accents, reads # as no and drops punctuation and spaces."""
    assert fold_header(raw) == folded


# ---------------------------------------------------------------------------
# Registration numbers
# ---------------------------------------------------------------------------

def test_id_scheme_checks_and_normalizes_settings():
    """IdScheme upper-cases prefixes, turns lists into tuples and rejects unknown settings."""
    s = IdScheme(prefixes=["hr", " nm "], separators=["-"])
    assert s.prefixes == ("HR", "NM") and s.separators == ("-",)
    with pytest.raises(ValueError, match="check_digit must be one of none, luhn, verhoeff, damm"):
        IdScheme(check_digit="mod11")
    with pytest.raises(ValueError, match="digits"):
        IdScheme(digits=0)


@pytest.mark.parametrize("raw, expected", [
    ("HR-0412-3386", RegNo("04123386", "HR", "valid", "")),
    ("hr 04123386", RegNo("04123386", "HR", "valid", "")),
    ("NM04123386", RegNo("04123386", "NM", "valid", "")),
    ("Hr.0412.3386", RegNo("04123386", "HR", "valid", "")),
    (" 0412 3386 ", RegNo("04123386", "", "valid", "")),
    ("0412/3386", RegNo("04123386", "", "valid", "")),
    ("0412–3386", RegNo("04123386", "", "valid", "")),        # en dash
    ("'04123386", RegNo("04123386", "", "valid", "")),        # spreadsheet text mark
])
def test_reg_no_prefixes_and_separators_stripped(raw, expected):
    """Known prefixes (any case, optional separator) and separators are removed."""
    assert normalize_reg_no(raw, HR) == expected


def test_reg_no_leading_zeros_restored_from_number_cell():
    """An int cell 4123386 lost its leading zero: it is padded to 8 digits and noted."""
    assert normalize_reg_no(4123386, HR) == RegNo("04123386", "", "valid", "leading zeros restored")
    assert normalize_reg_no(4123386.0, HR) == RegNo("04123386", "", "valid", "leading zeros restored")
    assert normalize_reg_no(4123385, PLAIN) == RegNo("04123385", "", "valid", "leading zeros restored")


def test_reg_no_padded_number_cell_still_checked():
    """A padded number cell whose check digit fails is check_failed, with both notes."""
    got = normalize_reg_no(4123385, HR)
    assert got.status == "check_failed" and got.reg_no == "04123385"
    assert got.note == "leading zeros restored; luhn check digit does not match"


@pytest.mark.parametrize("raw, scheme, expected", [
    ("12345678.0", PLAIN, RegNo("12345678", "", "valid", "")),
    ("4123385.0", PLAIN, RegNo("04123385", "", "valid", "leading zeros restored")),
    ("4123386,00", HR, RegNo("04123386", "", "valid", "leading zeros restored")),
])
def test_reg_no_float_text(raw, scheme, expected):
    """Text like "12345678.0" is read as the number cell it was."""
    assert normalize_reg_no(raw, scheme) == expected


@pytest.mark.parametrize("raw", ["1.2345678E+07", "4,12E+06", "4.123386e7", "1E7"])
def test_reg_no_scientific_notation_unrecoverable(raw):
    """Scientific notation text is unrecoverable, with a note saying digits were lost."""
    assert normalize_reg_no(raw, HR) == RegNo("", "", "unrecoverable", "scientific notation: digits lost")


@pytest.mark.parametrize("raw, status, note", [
    (1.5, "unrecoverable", "number with a fraction: digits lost"),
    (float("inf"), "unrecoverable", "not a finite number"),
    (1e17, "unrecoverable", "number too large for exact digits: digits lost"),
    (True, "invalid", "a true/false value, not a number"),
    (-4123386, "invalid", "negative number"),
    (0, "invalid", "all zeros"),
    ("0000-0000", "invalid", "all zeros"),
    ("0412-338X", "invalid", "unexpected letter X"),
    ("XY-04123386", "invalid", "unexpected letters X, Y"),
    ("0412#3386", "invalid", "unexpected character '#'"),
    ("HR", "invalid", "no digits"),
    (None, "missing", ""), (float("nan"), "missing", ""), ("", "missing", ""), ("   ", "missing", ""),
    ("N/A", "missing", "placeholder text"), ("-", "missing", "placeholder text"),
])
def test_reg_no_rejections(raw, status, note):
    """Unusable cells get the right status, an empty reg_no and a note naming the problem."""
    got = normalize_reg_no(raw, HR)
    assert (got.reg_no, got.status, got.note) == ("", status, note)


def test_reg_no_invalid_keeps_seen_prefix():
    """An invalid number still reports the known prefix it was written with."""
    assert normalize_reg_no("HR-0412-33X6", HR).prefix == "HR"


def test_reg_no_short_text_padded_only_when_check_digit_agrees():
    """Short digit text is padded when the padded number passes the check digit, else wrong_length."""
    assert normalize_reg_no("4123386", HR) == RegNo("04123386", "", "valid", "leading zeros restored")
    assert normalize_reg_no("4123385", HR) == RegNo("4123385", "", "wrong_length", "7 digits, expected 8")
    assert normalize_reg_no("4123385", PLAIN) == RegNo("4123385", "", "wrong_length", "7 digits, expected 8")
    # Verhoeff depends on position, so a leading zero changes the result (derived)
    v = IdScheme(digits=4, check_digit="verhoeff")
    assert normalize_reg_no("236", v).status == "wrong_length"          # 0236 fails Verhoeff
    assert normalize_reg_no("2363", v).status == "valid"                 # Wikipedia, read-2


def test_reg_no_long_and_check_failed_keep_digits():
    """Too long numbers and failed check digits keep the cleaned digits."""
    assert normalize_reg_no("HR-0412-33861", HR) == RegNo("041233861", "HR", "wrong_length", "9 digits, expected 8")
    assert normalize_reg_no("0412-3385", HR) == RegNo("04123385", "", "check_failed",
                                                      "luhn check digit does not match")


# ---------------------------------------------------------------------------
# Names
# ---------------------------------------------------------------------------

def test_particles_constant_lists_the_specified_particles():
    """The module-level particle tuple has the compound DE LA and the single particles."""
    assert isinstance(PARTICLES, tuple) and "DE LA" in PARTICLES and "VAN" in PARTICLES and "BIN" in PARTICLES


def test_normalize_name_keys_drop_particles():
    """Particles stay in the names but leave the keys; name_key is sorted unique tokens."""
    got = normalize_name("María José", "de la Cruz García")
    assert got == Name("MARIA JOSE", "DE LA CRUZ GARCIA", "MARIA JOSE", "CRUZ GARCIA",
                       "CRUZ GARCIA JOSE MARIA", "M600", "C620")


def test_name_key_ignores_which_field_a_particle_sits_in():
    """A full name split at the wrong place ("VAN | DIJK SANNE") keeps the key of the right split."""
    assert normalize_name("Van", "Dijk Sanne").name_key == normalize_name("Sanne", "van Dijk").name_key \
        == "DIJK SANNE"


def test_normalize_name_all_particle_names_keep_their_tokens():
    """A name made only of particle words (Vietnamese Lê, Đỗ) keeps them in the key."""
    got = normalize_name("Lê", "Đỗ")
    assert (got.given_key, got.family_key, got.family_soundex) == ("LE", "DO", "D000")


@pytest.mark.parametrize("full, order, given, family", [
    ("GARCIA LOPEZ, Ana María", "given_first", "ANA MARIA", "GARCIA LOPEZ"),
    ("Garcia, Ana", "family_first", "ANA", "GARCIA"),
    ("Ana Garcia Lopez", "given_first", "ANA", "GARCIA LOPEZ"),
    ("Ana de la Cruz", "given_first", "ANA", "DE LA CRUZ"),
    ("Ana Maria de la Cruz", "given_first", "ANA MARIA", "DE LA CRUZ"),
    ("GARCIA Ana Maria", "family_first", "ANA MARIA", "GARCIA"),
    ("de la Cruz Ana", "family_first", "ANA", "DE LA CRUZ"),
    ("van der Berg Jan", "family_first", "JAN", "VAN DER BERG"),
    ("Ana", "given_first", "ANA", ""),
    ("Garcia", "family_first", "", "GARCIA"),
    ("", "given_first", "", ""),
])
def test_split_full_name(full, order, given, family):
    """Full names split by comma, else by the sheet's order, particles going with the family name."""
    assert split_full_name(full, order) == (given, family)


def test_normalize_name_uses_full_only_when_parts_empty():
    """The full name is split only when both given and family are empty."""
    assert normalize_name(None, "", "Garcia, Ana").family_name == "GARCIA"
    assert normalize_name("Luis", None, "Garcia, Ana").given_name == "LUIS"
    assert normalize_name("Luis", None, "Garcia, Ana").family_name == ""


def test_normalize_name_placeholders_are_empty():
    """Placeholder texts are not names."""
    assert normalize_name("N/A", "Unknown", None) == Name("", "", "", "", "", "", "")
    assert normalize_name("#N/A", "NN").name_key == ""
    assert normalize_name("Na", "Kim").family_name == "KIM"   # "Na" is a name, not a placeholder


def test_normalize_name_rejects_unknown_order():
    """An unknown full-name order is an error naming the allowed ones."""
    with pytest.raises(ValueError, match="given_first, family_first"):
        normalize_name(full="Ana Garcia", full_order="surname_first")


# ---------------------------------------------------------------------------
# Dates
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("raw, order, assumed, expected", [
    ("4/3/2019", "dmy", False, ParsedDate("2019-03-04", "")),
    ("4/3/2019", "mdy", False, ParsedDate("2019-04-03", "")),
    ("4/3/2019", "dmy", True, ParsedDate("2019-03-04", "ambiguous order, assumed dmy")),
    ("4/3/2019", "mdy", True, ParsedDate("2019-04-03", "ambiguous order, assumed mdy")),
    ("3/3/2019", "mdy", True, ParsedDate("2019-03-03", "")),            # a == b: not ambiguous
    ("25/12/2019", "mdy", False, ParsedDate("2019-12-25", "read as dmy (day > 12)")),
    ("12/25/2019", "dmy", True, ParsedDate("2019-12-25", "read as mdy (day > 12)")),
    ("13/25/2019", "dmy", False, ParsedDate("", "impossible date")),
    ("31/02/2019", "dmy", False, ParsedDate("", "impossible date")),
    ("29.02.2020", "dmy", False, ParsedDate("2020-02-29", "")),
    ("2019-03-04", "mdy", True, ParsedDate("2019-03-04", "")),           # ISO is never ambiguous
    ("4 Mar 2019", "mdy", True, ParsedDate("2019-03-04", "")),
    ("4 de marzo de 2019", "dmy", False, ParsedDate("2019-03-04", "")),
    ("1er février 2019", "dmy", False, ParsedDate("2019-02-01", "")),
    ("20190304", "dmy", False, ParsedDate("2019-03-04", "")),
    ("2019-03-04 00:00:00", "dmy", False, ParsedDate("2019-03-04", "")),
    ("4/3/2019 10:30 PM", "dmy", False, ParsedDate("2019-03-04", "")),
    ("1850-01-01", "dmy", False, ParsedDate("", "implausible year 1850")),
    ("2031-01-01", "dmy", False, ParsedDate("", "implausible year 2031")),
    ("soon", "dmy", False, ParsedDate("", "unparsed date")),
    ("March 2019", "dmy", False, ParsedDate("", "unparsed date")),
    ("N/A", "dmy", False, ParsedDate("", "placeholder text")),
    ("", "dmy", False, ParsedDate("", "")),
    ("2019", "dmy", False, ParsedDate("", "year only 2019")),
    ("43528", "dmy", False, ParsedDate("2019-03-04", "from serial number")),
    ("19-03-04", "ymd", False, ParsedDate("2019-03-04", "two-digit year")),
    ("4/3/2019", "ymd", False, ParsedDate("2019-03-04", "read as dmy")),
])
def test_parse_date_text_examples(raw, order, assumed, expected):
    """Text dates follow the order, ambiguity, day>12, plausibility and unparsed rules."""
    assert parse_date(raw, order=order, assumed=assumed, max_year=2030) == expected


@pytest.mark.parametrize("raw, pivot, expected", [
    ("4-3-19", None, "2019-03-04"),      # default pivot = max_year 2029
    ("4-3-29", None, "2029-03-04"),
    ("4-3-30", None, "1930-03-04"),
    ("4-3-99", None, "1999-03-04"),
    ("4-3-26", 2025, "1926-03-04"),
    ("04-MAR-19", None, "2019-03-04"),
])
def test_parse_date_two_digit_years(raw, pivot, expected):
    """Two-digit years pivot at pivot_year (default max_year) and are flagged."""
    got = parse_date(raw, order="dmy", pivot_year=pivot)
    assert got.iso == expected and "two-digit year" in got.flag


def test_parse_date_two_digit_year_can_still_be_implausible():
    """A two-digit year outside the plausible years is rejected."""
    assert parse_date("4-3-05", min_year=1910, max_year=2000) == ParsedDate("", "implausible year 1905")


@pytest.mark.parametrize("raw, expected", [
    (43528, ParsedDate("2019-03-04", "from serial number")),
    (43528.9, ParsedDate("2019-03-04", "from serial number")),
    (60, ParsedDate("", "impossible date")),
    (0, ParsedDate("", "unparsed date")),
    (10, ParsedDate("1900-01-10", "from serial number")),
    (10, ParsedDate("1900-01-10", "from serial number")),
    (99999, ParsedDate("", "implausible year 2173")),
    (2019, ParsedDate("", "year only 2019")),
    (True, ParsedDate("", "unparsed date")),
    (dt.date(2019, 3, 4), ParsedDate("2019-03-04", "")),
    (pd.Timestamp("2019-03-04 13:00"), ParsedDate("2019-03-04", "")),
    (dt.date(1890, 3, 4), ParsedDate("", "implausible year 1890")),
    (None, ParsedDate("", "")), (float("nan"), ParsedDate("", "")), (pd.NaT, ParsedDate("", "")),
])
def test_parse_date_non_text(raw, expected):
    """Numbers are 1900-system serials (or plausible years); date objects pass through."""
    assert parse_date(raw) == expected


def test_parse_date_rejects_unknown_order():
    """An unknown order is an error naming the allowed orders."""
    with pytest.raises(ValueError, match="dmy, mdy, ymd"):
        parse_date("4/3/2019", order="auto")


@pytest.mark.parametrize("raw, parts", [
    ("4/3/2019", (4, 3, 2019)), ("04.03.19", (4, 3, 19)), ("25-12-2019 10:00", (25, 12, 2019)),
    ("2019-03-04", None), ("4 Mar 2019", None), (43528, None), (None, None),
])
def test_date_parts(raw, parts):
    """date_parts returns the raw a/b/year of numeric day-month text only."""
    assert date_parts(raw) == parts


def test_infer_date_order():
    """Column order: a>12 proves dmy, b>12 proves mdy, both conflict, neither is undecided."""
    assert infer_date_order(["4/3/2019", "25/3/2019", None, 5, "2019-12-31"])[0] == "dmy"
    assert infer_date_order(["4/3/2019", "3/25/2019"])[0] == "mdy"
    assert infer_date_order(["25/3/2019", "3/25/2019"]) == (None, "conflicting: both d/m and m/d values")
    assert infer_date_order(["4/3/2019", "1/1/2020", "31/31/2019"]) == (None, "no unambiguous value")
    assert infer_date_order([]) == (None, "no unambiguous value")
    assert "25" not in infer_date_order(["25/3/2019"])[1]      # counts only, no values


# ---------------------------------------------------------------------------
# Sex
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("raw, codes, expected", [
    ("M", DEFAULT_SEX_CODES, "M"), (" female ", DEFAULT_SEX_CODES, "F"), ("Niña", DEFAULT_SEX_CODES, "F"),
    ("Varón", DEFAULT_SEX_CODES, "M"), ("U", DEFAULT_SEX_CODES, ""), ("zz", DEFAULT_SEX_CODES, ""),
    (None, DEFAULT_SEX_CODES, ""), (1, DEFAULT_SEX_CODES, ""),           # numeric codes are per agency
    (1.0, {"1": "M", "2": "F"}, "M"), ("2.0", {"1": "M", "2": "F"}, "F"), ("02", {"2": "F"}, "F"),
    (2, {"1": "M", "2": "F"}, "F"), ("m", {"m": "f"}, "F"), ("m", {"m": "?"}, ""),
])
def test_normalize_sex(raw, codes, expected):
    """Sex codes are looked up folded, numeric cells by their digits; unknown codes give ""."""
    assert normalize_sex(raw, codes) == expected


def test_default_sex_codes_are_folded_keys():
    """Default code keys are already folded lower case and map to M, F or ""."""
    for key, sex in DEFAULT_SEX_CODES.items():
        assert fold_text(key).lower() == key and sex in ("M", "F", "")


# ---------------------------------------------------------------------------
# Ages
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("raw, expected", [
    ("7", (84, 96)), (7, (84, 96)), (7.0, (84, 96)), ("7.0", (84, 96)), ("0", (0, 12)),
    ("11 mo", (11, 12)), ("11 months", (11, 12)), ("11m", (11, 12)),
    ("2 yrs", (24, 36)), ("2 years", (24, 36)), ("2y", (24, 36)), ("2 años", (24, 36)), ("7 y/o", (84, 96)),
    ("18 months", (18, 19)), ("1 yr 6 mo", (18, 19)), ("1y6m", (18, 19)), ("2 años y 3 meses", (27, 28)),
    ("newborn", (0, 1)), ("Recién nacido", (0, 1)),
    ("7.5", (90, 91.2)), ("7,5", (90, 91.2)), (7.5, (90, 91.2)),     # written precision: 7.5-7.6 years
    ("120", (1440, 1452)),
])
def test_parse_age_examples(raw, expected):
    """Ages give the month range their written value allows."""
    assert parse_age(raw) == pytest.approx(expected)


def test_parse_age_weeks_and_days():
    """Weeks and days are exact day counts in months of 30.4375 days (common practice: mean month)."""
    assert parse_age("6 weeks") == pytest.approx((42 / 30.4375, 49 / 30.4375))
    assert parse_age("6 wk") == pytest.approx((1.38, 1.61), abs=0.005)
    assert parse_age("3 days") == pytest.approx((3 / 30.4375, 4 / 30.4375))


@pytest.mark.parametrize("raw", ["-2", -2, -0.5, "121", 121, "about 7", "<1", "7-8", "6 mo 1 yr",
                                 "1 yr 6", "2 yrs 3 yrs", "abc", "", None, float("nan"), True, "N/A"])
def test_parse_age_rejections(raw):
    """Negative, over-120-year, range, comparison and unknown ages give None."""
    assert parse_age(raw) is None


@pytest.mark.parametrize("age, as_of, expected", [
    ((84, 96), dt.date(2026, 11, 1), ("2018-11-02", "2019-11-01")),       # 7 years
    ((11, 12), dt.date(2026, 11, 1), ("2025-11-02", "2025-12-01")),
    ((0, 1), dt.date(2026, 3, 1), ("2026-02-02", "2026-03-01")),
    ((1, 2), dt.date(2026, 3, 31), ("2026-02-01", "2026-02-28")),        # calendar months, not 30 days
    ((1, 2), dt.date(2026, 2, 28), ("2026-01-01", "2026-01-31")),        # month-end clamping
    ((42 / 30.4375, 49 / 30.4375), dt.date(2026, 11, 1), ("2026-09-14", "2026-09-20")),   # 6 weeks
    ((12, 24), "2024-02-29", ("2022-03-01", "2023-02-28")),
])
def test_age_to_birth_range(age, as_of, expected):
    """Birth-date bounds are as_of minus the upper bound plus a day, and as_of minus the lower bound."""
    assert age_to_birth_range(age, as_of) == expected


@settings(max_examples=200, deadline=None)
@given(years=st.integers(min_value=0, max_value=100),
       as_of=st.dates(min_value=dt.date(1950, 1, 1), max_value=dt.date(2100, 12, 31)))
def test_age_to_birth_range_bounds_have_that_age(years, as_of):
    """Both bounds of a whole-year age really are that many full years old at as_of (derived)."""
    earliest, latest = (dt.date.fromisoformat(x) for x in age_to_birth_range(parse_age(years), as_of))

    def full_years(born):
        # birthdays of 29 February fall on 28 February in other years (the clamping rule used)
        last = calendar.monthrange(as_of.year, born.month)[1]
        birthday = dt.date(as_of.year, born.month, min(born.day, last))
        return as_of.year - born.year - (as_of < birthday)

    assert full_years(latest) == years and full_years(latest + dt.timedelta(days=1)) == years - 1
    assert full_years(earliest) == years and full_years(earliest - dt.timedelta(days=1)) == years + 1


def test_age_to_birth_range_missing_and_overflow():
    """No age gives empty bounds; a bound before year 1 is empty."""
    assert age_to_birth_range(None, dt.date(2026, 1, 1)) == ("", "")
    assert age_to_birth_range((84, 96), dt.date(3, 1, 1)) == ("", "")
    assert math.isfinite(parse_age("120")[1])
