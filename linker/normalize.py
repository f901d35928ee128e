"""Per-value normalizers: text folding, registration numbers, names, dates, sex, ages.

Every public function here takes ONE cell value and returns plain Python
values.  The normalize stage calls them once per distinct value of a column
and broadcasts the result, so they must be fast and must never raise on bad
data: a value that cannot be read comes back empty with a status or flag
that says why.  No pandas is used inside the per-value functions.

Conventions
-----------
* Missing input (``None``, NaN, ``pandas.NA``/``NaT``, blank text) gives the
  empty result (``""``, status ``missing``, ``None`` for ages).
* Folded text is upper case ASCII-ish letters and digits separated by single
  spaces (letters of other scripts are kept as they are).
* Dates are ISO strings ``YYYY-MM-DD`` or ``""``.
* Notes and flags never repeat the value itself (no personal data), only what
  happened to it.
"""

from __future__ import annotations

import calendar
import datetime as dt
import math
import numbers
import re
import unicodedata
from dataclasses import dataclass
from decimal import Decimal, InvalidOperation
from typing import Iterable, Mapping

import jellyfish

__all__ = [
    "fold_text",
    "fold_header",
    "IdScheme",
    "RegNo",
    "normalize_reg_no",
    "luhn_check_digit",
    "verhoeff_check_digit",
    "damm_check_digit",
    "check_digit_valid",
    "PARTICLES",
    "Name",
    "normalize_name",
    "split_full_name",
    "excel_serial_to_date",
    "ParsedDate",
    "parse_date",
    "date_parts",
    "infer_date_order",
    "DEFAULT_SEX_CODES",
    "normalize_sex",
    "parse_age",
    "age_to_birth_range",
]


# ---------------------------------------------------------------------------
# Missing values and plain text
# ---------------------------------------------------------------------------

# Cell texts that stand for "no value".  Compared after strip() and upper().
# "NA" alone is not here: it is also a family name.
_PLACEHOLDERS = frozenset({
    "N/A", "N.A.", "N/D", "NULL", "NONE", "NAN", "NIL", "NAT", "-", "--", "---", "?", "??",
    "UNKNOWN", "UNK", "NOT KNOWN", "NOT RECORDED", "NOT STATED",
    "DESCONOCIDO", "DESCONOCIDA", "INCONNU", "INCONNUE",
    # spreadsheet error values
    "#N/A", "#REF!", "#VALUE!", "#NAME?", "#DIV/0!", "#NUM!", "#NULL!",
})


def _is_missing(value) -> bool:
    """True for None, NaN (any float type), pandas NA/NaT and numpy NaT."""
    if value is None:
        return True
    if isinstance(value, str):
        return False
    if isinstance(value, float):
        return value != value
    name = type(value).__name__
    if name in ("NAType", "NaTType"):
        return True
    if name.startswith(("float", "datetime64", "timedelta64")):
        try:
            return bool(value != value)
        except (TypeError, ValueError):
            return False
    return False


def _to_text(value) -> str:
    """A cell value as text: missing -> "", whole floats without ".0"."""
    if isinstance(value, str):
        return value
    if _is_missing(value):
        return ""
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if isinstance(value, float) and value.is_integer() and abs(value) < 1e15:
        return str(int(value))
    return str(value)


# Letters that Unicode decomposition leaves alone.
_SPECIAL_LETTERS = {
    "ß": "SS", "ẞ": "SS", "Ø": "O", "ø": "O", "Ł": "L", "ł": "L", "Æ": "AE", "æ": "AE",
    "Œ": "OE", "œ": "OE", "Đ": "D", "đ": "D", "Ð": "D", "ð": "D", "Þ": "TH", "þ": "TH",
    "ı": "I", "Ħ": "H", "ħ": "H",
}
# Apostrophe-like marks: removed, so O'Brien -> OBRIEN (the acute accent sign
# U+00B4 is here because NFKD would turn it into a space).
_APOSTROPHES = "'`´‘’‛′＇ʹʻʼʽʾʿˈ"
_FOLD_TABLE = {ord(k): v for k, v in _SPECIAL_LETTERS.items()}
_FOLD_TABLE.update({ord(c): None for c in _APOSTROPHES})
_ASCII_APOS_TABLE = {ord("'"): None, ord("`"): None}
_NON_ALNUM = re.compile(r"[\W_]+")


def _strip_marks(text: str) -> str:
    """NFKD decomposition without the combining marks."""
    decomposed = unicodedata.normalize("NFKD", text)
    if decomposed.isascii():          # no combining marks
        return decomposed
    return "".join([c for c in decomposed if not unicodedata.combining(c)])


def _fold_once(text: str) -> str:
    text = _strip_marks(text.translate(_FOLD_TABLE)).translate(_FOLD_TABLE)
    text = _strip_marks(text.upper()).translate(_FOLD_TABLE)
    return " ".join(_NON_ALNUM.sub(" ", text).split())


def fold_text(value) -> str:
    """Fold a cell value to upper-case, accent-free, punctuation-free text.

    Parameters
    ----------
    value : object
        Any cell value; ``None``/NaN give ``""``, other non-text values are
        read as text first (whole floats without ``.0``).

    Returns
    -------
    str
        Unicode NFKD with combining marks dropped; ß, Ø, Ł, Æ, Œ, Đ, Ð, Þ, ı
        spelled out in ASCII; upper case; apostrophes and backticks removed;
        every other non-alphanumeric character (hyphens, punctuation,
        underscores) read as a space; whitespace collapsed and stripped.

    Examples
    --------
    >>> fold_text("  O'Brien-García ")
    'OBRIEN GARCIA'
    >>> fold_text("Straße")
    'STRASSE'
    """
    text = _to_text(value)
    if not text:
        return ""
    if text.isascii():
        return " ".join(_NON_ALNUM.sub(" ", text.translate(_ASCII_APOS_TABLE)).upper().split())
    for _ in range(4):   # upper() can expose new marks; stop at a fixed point
        folded = _fold_once(text)
        if folded == text:
            break
        text = folded
        if text.isascii() and text.upper() == text:
            break        # upper-case ASCII letters, digits and single spaces: a fixed point
    return text


_NUMERO_SIGN = re.compile(r"([nN])\s*°")


def fold_header(value) -> str:
    """Fold a header cell for matching against the configured header names.

    Parameters
    ----------
    value : object
        A header cell.

    Returns
    -------
    str
        Lower case, accents folded, ``#`` (and ``N°``) read as ``no``, every
        punctuation mark and space removed.

    Examples
    --------
    >>> fold_header("Child D.O.B.")
    'childdob'
    >>> fold_header("Guardian Reg #")
    'guardianregno'
    >>> fold_header("Número de registro")
    'numeroderegistro'
    """
    text = _to_text(value)
    if not text:
        return ""
    text = _NUMERO_SIGN.sub(r"\1o", text).replace("#", " no ")
    out = _NON_ALNUM.sub("", fold_text(text).lower())
    if not out.isascii():
        for _ in range(4):
            again = _NON_ALNUM.sub("", fold_text(out).lower())
            if again == out:
                break
            out = again
    return out


# ---------------------------------------------------------------------------
# Check digits
# ---------------------------------------------------------------------------

_VERHOEFF_D = (
    (0, 1, 2, 3, 4, 5, 6, 7, 8, 9), (1, 2, 3, 4, 0, 6, 7, 8, 9, 5),
    (2, 3, 4, 0, 1, 7, 8, 9, 5, 6), (3, 4, 0, 1, 2, 8, 9, 5, 6, 7),
    (4, 0, 1, 2, 3, 9, 5, 6, 7, 8), (5, 9, 8, 7, 6, 0, 4, 3, 2, 1),
    (6, 5, 9, 8, 7, 1, 0, 4, 3, 2), (7, 6, 5, 9, 8, 2, 1, 0, 4, 3),
    (8, 7, 6, 5, 9, 3, 2, 1, 0, 4), (9, 8, 7, 6, 5, 4, 3, 2, 1, 0),
)
_VERHOEFF_P = (
    (0, 1, 2, 3, 4, 5, 6, 7, 8, 9), (1, 5, 7, 6, 2, 8, 3, 0, 9, 4),
    (5, 8, 0, 3, 7, 9, 6, 1, 4, 2), (8, 9, 1, 6, 0, 4, 3, 5, 2, 7),
    (9, 4, 5, 3, 1, 2, 6, 8, 7, 0), (4, 2, 8, 6, 5, 7, 3, 9, 0, 1),
    (2, 7, 9, 3, 8, 0, 6, 4, 1, 5), (7, 0, 4, 6, 9, 1, 3, 2, 5, 8),
)
_VERHOEFF_INV = (0, 4, 3, 2, 1, 5, 6, 7, 8, 9)
_DAMM = (
    (0, 3, 1, 7, 5, 9, 8, 6, 4, 2), (7, 0, 9, 2, 1, 5, 4, 8, 6, 3),
    (4, 2, 0, 6, 8, 7, 1, 3, 5, 9), (1, 7, 5, 0, 9, 8, 3, 4, 2, 6),
    (6, 1, 2, 3, 0, 4, 5, 9, 7, 8), (3, 6, 7, 4, 2, 0, 9, 5, 8, 1),
    (5, 8, 6, 9, 7, 2, 0, 1, 3, 4), (8, 9, 4, 5, 3, 6, 2, 0, 1, 7),
    (9, 4, 3, 8, 6, 1, 7, 2, 0, 5), (2, 5, 8, 1, 4, 3, 6, 7, 9, 0),
)
_CHECK_DIGIT_ALGORITHMS = ("none", "luhn", "verhoeff", "damm")


def _is_digits(text: str) -> bool:
    return bool(text) and text.isascii() and text.isdigit()


def _require_digits(payload: str) -> str:
    if not isinstance(payload, str) or not _is_digits(payload):
        raise ValueError(f"check digit payload must be a non-empty string of digits 0-9, got {payload!r}")
    return payload


def _luhn_sum(digits: str, double_first: bool) -> int:
    total = 0
    for i, ch in enumerate(reversed(digits)):
        d = ord(ch) - 48
        if (i % 2 == 0) == double_first:
            d *= 2
            if d > 9:
                d -= 9
        total += d
    return total


def luhn_check_digit(payload: str) -> str:
    """Luhn (mod 10) check digit of a digit string.

    Parameters
    ----------
    payload : str
        The digits the check digit protects (without the check digit).

    Returns
    -------
    str
        One digit.

    Raises
    ------
    ValueError
        If ``payload`` is not a non-empty string of digits.

    Examples
    --------
    >>> luhn_check_digit("7992739871")
    '3'
    """
    return str((10 - _luhn_sum(_require_digits(payload), True) % 10) % 10)


def verhoeff_check_digit(payload: str) -> str:
    """Verhoeff (dihedral group D5) check digit of a digit string.

    Parameters
    ----------
    payload : str
        The digits the check digit protects.

    Returns
    -------
    str
        One digit.

    Examples
    --------
    >>> verhoeff_check_digit("236")
    '3'
    """
    c = 0
    for i, ch in enumerate(reversed(_require_digits(payload))):
        c = _VERHOEFF_D[c][_VERHOEFF_P[(i + 1) % 8][ord(ch) - 48]]
    return str(_VERHOEFF_INV[c])


def damm_check_digit(payload: str) -> str:
    """Damm (totally anti-symmetric quasigroup of order 10) check digit.

    Parameters
    ----------
    payload : str
        The digits the check digit protects.

    Returns
    -------
    str
        One digit.

    Examples
    --------
    >>> damm_check_digit("572")
    '4'
    """
    interim = 0
    for ch in _require_digits(payload):
        interim = _DAMM[interim][ord(ch) - 48]
    return str(interim)


def check_digit_valid(number: str, algorithm: str) -> bool:
    """Whether the last digit of ``number`` is its check digit under ``algorithm``.

    Parameters
    ----------
    number : str
        Digits including the check digit as the last one.
    algorithm : {"none", "luhn", "verhoeff", "damm"}
        ``"none"`` accepts every digit string.

    Returns
    -------
    bool
        False for anything that is not a non-empty string of digits 0-9.

    Raises
    ------
    ValueError
        For an unknown algorithm name.
    """
    if algorithm not in _CHECK_DIGIT_ALGORITHMS:
        raise ValueError(f"unknown check digit algorithm {algorithm!r}; "
                         f"known: {', '.join(_CHECK_DIGIT_ALGORITHMS)}")
    if not isinstance(number, str) or not _is_digits(number):
        return False
    if algorithm == "none":
        return True
    if algorithm == "luhn":
        return _luhn_sum(number, False) % 10 == 0
    if algorithm == "verhoeff":
        c = 0
        for i, ch in enumerate(reversed(number)):
            c = _VERHOEFF_D[c][_VERHOEFF_P[i % 8][ord(ch) - 48]]
        return c == 0
    interim = 0
    for ch in number:
        interim = _DAMM[interim][ord(ch) - 48]
    return interim == 0


# ---------------------------------------------------------------------------
# Registration numbers
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class IdScheme:
    """How registration numbers of one register are written.

    Parameters
    ----------
    digits : int
        Digit count of a full number (check digit included).
    prefixes : tuple of str
        Letter prefixes that may be written before the digits ("HR"); matched
        case-insensitively.  Stored upper case.
    separators : tuple of str
        Strings writers put between digit groups; removed anywhere.
    check_digit : {"none", "luhn", "verhoeff", "damm"}
        Algorithm of the last digit.
    """

    digits: int = 8
    prefixes: tuple[str, ...] = ()
    separators: tuple[str, ...] = ("-", " ", "/", ".")
    check_digit: str = "none"

    def __post_init__(self):
        if isinstance(self.digits, bool) or not isinstance(self.digits, int) or self.digits < 1:
            raise ValueError(f"IdScheme digits must be a positive integer, got {self.digits!r}")
        if self.check_digit not in _CHECK_DIGIT_ALGORITHMS:
            raise ValueError(f"IdScheme check_digit must be one of {', '.join(_CHECK_DIGIT_ALGORITHMS)}, "
                             f"got {self.check_digit!r}")
        object.__setattr__(self, "prefixes",
                           tuple(p.strip().upper() for p in self.prefixes if p.strip()))
        object.__setattr__(self, "separators", tuple(s for s in self.separators if s))


@dataclass(frozen=True)
class RegNo:
    """A normalized registration number.

    Attributes
    ----------
    reg_no : str
        The cleaned digits whenever only digits remain (also for
        ``wrong_length`` and ``check_failed``); ``""`` for ``missing``,
        ``unrecoverable`` and ``invalid``.
    prefix : str
        The known letter prefix that was written (upper case), else ``""``.
    status : str
        valid | check_failed | wrong_length | unrecoverable | invalid | missing.
    note : str
        What was done or found, ``"; "`` separated; ``""`` when clean.
    """

    reg_no: str
    prefix: str
    status: str
    note: str


_REG_MISSING = RegNo("", "", "missing", "")
_SCIENTIFIC = re.compile(r"^[+-]?\d+(?:[.,]\d*)?\s*[eE]\s*[+-]?\d+$")
_FLOAT_TEXT = re.compile(r"^(\d+)[.,]0{1,2}$")
_DASHES = {ord(c): "-" for c in "‐‑‒–—―−﹣－"}
_LARGEST_EXACT_FLOAT = 2 ** 53


def _reg_from_digits(digits: str, scheme: IdScheme, numeric: bool, prefix: str,
                     notes: list[str]) -> RegNo:
    """Status of a digit string (``numeric``: it came from a number cell)."""
    if digits.count("0") == len(digits):
        return RegNo("", prefix, "invalid", "; ".join(notes + ["all zeros"]))
    want = scheme.digits
    algorithm = scheme.check_digit
    n = len(digits)
    if n < want:
        padded = digits.zfill(want)
        if numeric or (algorithm != "none" and check_digit_valid(padded, algorithm)):
            digits = padded
            notes = notes + ["leading zeros restored"]
        else:
            return RegNo(digits, prefix, "wrong_length",
                         "; ".join(notes + [f"{n} digits, expected {want}"]))
    elif n > want:
        return RegNo(digits, prefix, "wrong_length", "; ".join(notes + [f"{n} digits, expected {want}"]))
    if algorithm == "none" or check_digit_valid(digits, algorithm):
        return RegNo(digits, prefix, "valid", "; ".join(notes))
    return RegNo(digits, prefix, "check_failed", "; ".join(notes + [f"{algorithm} check digit does not match"]))


def _describe_leftovers(text: str) -> str:
    letters = list(dict.fromkeys(c for c in text if c.isalpha()))
    others = list(dict.fromkeys(c for c in text if not c.isalpha() and not (c.isascii() and c.isdigit())))
    parts = []
    if letters:
        parts.append(("letter " if len(letters) == 1 else "letters ") + ", ".join(letters[:6]))
    if others:
        shown = ", ".join("space" if c == " " else repr(c) for c in others[:6])
        parts.append(("character " if len(others) == 1 else "characters ") + shown)
    return "unexpected " + " and ".join(parts)


def _reg_from_text(text: str, scheme: IdScheme) -> RegNo:
    text = text.strip().strip("\ufeff").strip()
    if not text:
        return _REG_MISSING
    if text.upper() in _PLACEHOLDERS:
        return RegNo("", "", "missing", "placeholder text")
    if not text.isascii():
        text = unicodedata.normalize("NFKC", text).translate(_DASHES).strip()
    if text.startswith("'"):          # the spreadsheet "keep as text" mark
        text = text[1:].strip()
    if _SCIENTIFIC.match(text):
        return RegNo("", "", "unrecoverable", "scientific notation: digits lost")
    m = _FLOAT_TEXT.match(text)
    if m:
        return _reg_from_digits(m.group(1), scheme, True, "", [])
    prefix = ""
    for known in sorted(scheme.prefixes, key=len, reverse=True):
        if text[:len(known)].upper() == known:
            prefix = known
            text = text[len(known):].lstrip()
            break
    for sep in scheme.separators:
        text = text.replace(sep, "")
    if " " in scheme.separators:
        text = "".join(text.split())
    if not text:
        return RegNo("", prefix, "invalid", "no digits")
    if _is_digits(text):
        return _reg_from_digits(text, scheme, False, prefix, [])
    return RegNo("", prefix, "invalid", _describe_leftovers(text))


def _reg_from_int(number: int, scheme: IdScheme) -> RegNo:
    if number < 0:
        return RegNo("", "", "invalid", "negative number")
    return _reg_from_digits(str(number), scheme, True, "", [])


def normalize_reg_no(value, scheme: IdScheme = IdScheme()) -> RegNo:
    """Normalize one registration number cell.

    Parameters
    ----------
    value : None, float, int, bool or str
        The cell as delivered.
    scheme : IdScheme
        Digit count, prefixes, separators and check digit of the register.

    Returns
    -------
    RegNo
        See :class:`RegNo`.  The rules, in order:

        * blank, NaN or a placeholder ("N/A", "unknown", "-") -> ``missing``;
        * a number cell (int, whole float) lost its leading zeros: they are
          left-padded back to ``scheme.digits`` (note "leading zeros restored");
          text ``"12345678.0"`` (one or two zeros after the point) is read the
          same way; a fractional or non-finite float, or a float beyond 2**53,
          is ``unrecoverable``; ``True``/``False`` is ``invalid``;
        * text in scientific notation ("1.2345678E+07", "4,12E+06") is
          ``unrecoverable`` (note "scientific notation: digits lost");
        * otherwise surrounding space, a leading ``'``, one known prefix
          (case-insensitive, optionally followed by a separator or space) and
          every separator are removed; anything else left -> ``invalid`` with
          a note naming the letters/characters;
        * digits only: all zeros -> ``invalid``; shorter than
          ``scheme.digits`` -> padded ("leading zeros restored") only when a
          check digit scheme is set and the padded number passes it, else
          ``wrong_length``; longer -> ``wrong_length``; right length -> the
          check digit decides ``valid`` or ``check_failed``.

    Examples
    --------
    >>> s = IdScheme(digits=8, prefixes=("HR",), check_digit="luhn")
    >>> normalize_reg_no("HR-0412-3386", s)
    RegNo(reg_no='04123386', prefix='HR', status='valid', note='')
    >>> normalize_reg_no(4123386, s).note
    'leading zeros restored'
    """
    if isinstance(value, str):
        return _reg_from_text(value, scheme)
    if _is_missing(value):
        return _REG_MISSING
    if isinstance(value, bool) or type(value).__name__ == "bool_":
        return RegNo("", "", "invalid", "a true/false value, not a number")
    if isinstance(value, numbers.Integral):
        return _reg_from_int(int(value), scheme)
    if isinstance(value, numbers.Real):
        number = float(value)
        if not math.isfinite(number):
            return RegNo("", "", "unrecoverable", "not a finite number")
        if abs(number) >= _LARGEST_EXACT_FLOAT:
            return RegNo("", "", "unrecoverable", "number too large for exact digits: digits lost")
        if not number.is_integer():
            return RegNo("", "", "unrecoverable", "number with a fraction: digits lost")
        return _reg_from_int(int(number), scheme)
    return _reg_from_text(str(value), scheme)


# ---------------------------------------------------------------------------
# Names
# ---------------------------------------------------------------------------

# Name particles: kept in given_name / family_name, dropped from the keys.
PARTICLES = ("DE", "DEL", "DE LA", "DA", "DAS", "DO", "DOS", "VAN", "VON", "DER", "DEN",
             "DI", "DU", "LA", "LE", "Y", "BIN", "BEN", "AL", "EL")
_PARTICLE_TOKENS = frozenset(t for p in PARTICLES for t in p.split())
# Folded texts that stand for "no name".
_NAME_PLACEHOLDERS = frozenset({
    "N A", "NONE", "NULL", "NAN", "NIL", "UNKNOWN", "UNK", "NN", "N N", "NOT KNOWN",
    "NOT RECORDED", "NOT STATED", "NO NAME", "SIN NOMBRE", "DESCONOCIDO", "DESCONOCIDA",
    "INCONNU", "INCONNUE",
})
_NAME_ORDERS = ("given_first", "family_first")
_NON_AZ = re.compile(r"[^A-Z]+")


@dataclass(frozen=True)
class Name:
    """A normalized person name (every field ``""`` when missing).

    Attributes
    ----------
    given_name, family_name : str
        Folded (see :func:`fold_text`), particles kept.
    given_key, family_key : str
        The tokens without particles, space separated (all tokens when they
        are all particles, so "LE" or "DO" alone stay).
    name_key : str
        Sorted unique tokens of ``given_key`` and ``family_key``.
    given_soundex, family_soundex : str
        American Soundex of the first key token (its letters A-Z; ``""``
        when it has none).
    """

    given_name: str
    family_name: str
    given_key: str
    family_key: str
    name_key: str
    given_soundex: str
    family_soundex: str


def _name_part(value) -> str:
    text = _to_text(value)
    if text.strip().upper() in _PLACEHOLDERS:
        return ""
    folded = fold_text(text)
    return "" if folded in _NAME_PLACEHOLDERS else folded


def _key(tokens: list[str]) -> list[str]:
    kept = [t for t in tokens if t not in _PARTICLE_TOKENS]
    return kept or tokens


def _soundex(tokens: list[str]) -> str:
    if not tokens:
        return ""
    letters = _NON_AZ.sub("", tokens[0])
    return jellyfish.soundex(letters) if letters else ""


def split_full_name(full, order: str = "given_first") -> tuple[str, str]:
    """Split a full-name cell into folded (given, family).

    Parameters
    ----------
    full : object
        The full-name cell.
    order : {"given_first", "family_first"}
        How the sheet writes names without a comma.

    Returns
    -------
    (str, str)
        ``(given, family)``, both folded.  "FAMILY, Given" (a comma) is read
        family first whatever ``order`` says.  ``given_first``: the first
        token is the given name and the rest the family name, except that a
        particle after the first token starts the family name, so
        "Ana Maria de la Cruz" -> ("ANA MARIA", "DE LA CRUZ").
        ``family_first``: the first token with the particles before it is
        the family name, the rest the given name.

    Raises
    ------
    ValueError
        For an unknown ``order``.
    """
    if order not in _NAME_ORDERS:
        raise ValueError(f"full name order must be one of {', '.join(_NAME_ORDERS)}, got {order!r}")
    text = _to_text(full)
    if "," in text:
        family, given = text.split(",", 1)
        return _name_part(given), _name_part(family)
    return _split_tokens(_name_part(text).split(), order)


def _split_tokens(tokens: list[str], order: str) -> tuple[str, str]:
    """The (given, family) cut of a folded full name without a comma (see :func:`split_full_name`)."""
    if not tokens:
        return "", ""
    if order == "given_first":
        cut = 1
        for i in range(1, len(tokens) - 1):
            if tokens[i] in _PARTICLE_TOKENS:
                cut = i
                break
        return " ".join(tokens[:cut]), " ".join(tokens[cut:])
    i = 0
    while i < len(tokens) - 1 and tokens[i] in _PARTICLE_TOKENS:
        i += 1
    return " ".join(tokens[i + 1:]), " ".join(tokens[:i + 1])


def _order_free_key(tokens: list[str]) -> str:
    """Sorted distinct tokens without particles (all tokens when every one is a particle).

    The same set whichever field a token sits in, so "VAN | DIJK SANNE" and
    "SANNE | VAN DIJK" share the key "DIJK SANNE".
    """
    kept = set(tokens) - _PARTICLE_TOKENS
    return " ".join(sorted(kept or set(tokens)))


def normalize_name(given=None, family=None, full=None, full_order: str = "given_first") -> Name:
    """Normalize the name of one person.

    Parameters
    ----------
    given, family : object, optional
        Given-name and family-name cells.
    full : object, optional
        Full-name cell; used only when both ``given`` and ``family`` are
        empty (see :func:`split_full_name`).
    full_order : {"given_first", "family_first"}
        How ``full`` is written when it has no comma.

    Returns
    -------
    Name
        Placeholder texts ("N/A", "unknown", "NN", "#N/A") count as empty.

    Examples
    --------
    >>> normalize_name("María", "de la Cruz García").family_key
    'CRUZ GARCIA'
    >>> normalize_name(full="GARCIA, Ana").name_key
    'ANA GARCIA'
    """
    if full_order not in _NAME_ORDERS:
        raise ValueError(f"full name order must be one of {', '.join(_NAME_ORDERS)}, got {full_order!r}")
    g = _name_part(given)
    f = _name_part(family)
    if not g and not f:
        g, f = split_full_name(full, full_order)
    gk = _key(g.split())
    fk = _key(f.split())
    return Name(
        given_name=g,
        family_name=f,
        given_key=" ".join(gk),
        family_key=" ".join(fk),
        name_key=_order_free_key(g.split() + f.split()),
        given_soundex=_soundex(gk),
        family_soundex=_soundex(fk),
    )


# ---------------------------------------------------------------------------
# Dates
# ---------------------------------------------------------------------------

_EXCEL_1900_BASE = dt.date(1899, 12, 31)
_EXCEL_1904_BASE = dt.date(1904, 1, 1)
_EXCEL_1900_MAX = 2958465        # 9999-12-31
_EXCEL_1904_MAX = 2957003        # 9999-12-31
# Default upper year: the 1930-2029 window spreadsheet programs use for
# two-digit years (from memory).  Callers should pass the year of their as-of date.
_DEFAULT_MAX_YEAR = 2029


def excel_serial_to_date(serial: float, system: int = 1900) -> dt.date | None:
    """The calendar date of a spreadsheet date serial (ECMA-376 date representation).

    Parameters
    ----------
    serial : float
        Day serial; the fractional part (time of day) is ignored.
    system : {1900, 1904}
        1900 system: serial 1 is 1900-01-01, serial 60 is the fictitious
        1900-02-29 (-> ``None``), later serials are shifted back one day.
        1904 system: serial 0 is 1904-01-01.

    Returns
    -------
    datetime.date or None
        ``None`` for serial 60 (1900 system), for serials outside the valid
        range (before the epoch or after 9999-12-31) and for non-numbers.

    Raises
    ------
    ValueError
        For a system other than 1900 or 1904.

    Examples
    --------
    >>> excel_serial_to_date(38749)
    datetime.date(2006, 2, 1)
    >>> excel_serial_to_date(0, system=1904)
    datetime.date(1904, 1, 1)
    """
    if system not in (1900, 1904):
        raise ValueError(f"date system must be 1900 or 1904, got {system!r}")
    if isinstance(serial, bool):
        return None
    try:
        number = float(serial)
    except (TypeError, ValueError, OverflowError):
        return None
    if not math.isfinite(number):
        return None
    n = math.floor(number)
    if system == 1900:
        if n < 1 or n == 60 or n > _EXCEL_1900_MAX:
            return None
        return _EXCEL_1900_BASE + dt.timedelta(days=n if n < 60 else n - 1)
    if n < 0 or n > _EXCEL_1904_MAX:
        return None
    return _EXCEL_1904_BASE + dt.timedelta(days=n)


@dataclass(frozen=True)
class ParsedDate:
    """A parsed date cell.

    Attributes
    ----------
    iso : str
        ``YYYY-MM-DD`` or ``""``.
    flag : str
        What was assumed or why the value was rejected, ``"; "`` separated;
        ``""`` when clean.
    """

    iso: str
    flag: str


_DATE_MISSING = ParsedDate("", "")
_DATE_ORDERS = ("dmy", "mdy", "ymd")
_TIME_SUFFIX = re.compile(
    r"(?:(?<=\d)T|\s+|^)\d{1,2}:\d{2}(?::\d{2}(?:[.,]\d+)?)?\s*(?:[AaPp]\.?\s?[Mm]\.?)?"
    r"\s*(?:Z|UTC|GMT|[+-]\d{2}:?\d{2})?$")
_NUMERIC_DATE = re.compile(r"^(\d{1,4})\s*[-/.]\s*(\d{1,2})\s*[-/.]\s*(\d{1,4})\.?$")
_SERIAL_TEXT = re.compile(r"^\d{5}(?:\.\d+)?$")
_DATE_TOKENS = re.compile(r"\d+|[A-Z]+")
_MONTHS = {}
for _number, _names in enumerate((
    "JANUARY JAN ENERO ENE JANVIER JANV JANEIRO",
    "FEBRUARY FEB FEBRERO FEVRIER FEVR FEV FEVEREIRO",
    "MARCH MAR MARZO MARS MARCO",
    "APRIL APR ABRIL ABR AVRIL AVR",
    "MAY MAYO MAI MAIO",
    "JUNE JUN JUNIO JUIN JUNHO",
    "JULY JUL JULIO JUILLET JUIL JULHO",
    "AUGUST AUG AGOSTO AGO AOUT",
    "SEPTEMBER SEPT SEP SEPTIEMBRE SETIEMBRE SET SEPTEMBRE SETEMBRO",
    "OCTOBER OCT OCTUBRE OCTOBRE OUTUBRO OUT",
    "NOVEMBER NOV NOVIEMBRE NOVEMBRE NOVEMBRO",
    "DECEMBER DEC DICIEMBRE DIC DECEMBRE DEZEMBRO DEZ",
), start=1):
    for _name in _names.split():
        _MONTHS[_name] = _number
_DATE_FILLERS = frozenset(
    "DE DEL OF THE LE EL ST ND RD TH ER O "
    "MONDAY TUESDAY WEDNESDAY THURSDAY FRIDAY SATURDAY SUNDAY "
    "MON TUE TUES WED THU THUR THURS FRI SAT SUN "
    "LUNES MARTES MIERCOLES JUEVES VIERNES SABADO DOMINGO "
    "LUNDI MARDI MERCREDI JEUDI VENDREDI SAMEDI DIMANCHE".split())


def _strip_time(text: str) -> str:
    return _TIME_SUFFIX.sub("", text).strip()


def _finish(y: int, m: int, d: int, flags: list[str], min_year: int, max_year: int) -> ParsedDate:
    try:
        day = dt.date(y, m, d)
    except (ValueError, OverflowError):
        return ParsedDate("", "impossible date")
    return _from_date(day, flags, min_year, max_year)


def _from_date(day: dt.date, flags: list[str], min_year: int, max_year: int) -> ParsedDate:
    if day.year < min_year or day.year > max_year:
        return ParsedDate("", f"implausible year {day.year}")
    return ParsedDate(day.isoformat(), "; ".join(flags))


def _full_year(yy: int, pivot: int, flags: list[str]) -> int:
    flags.append("two-digit year")
    century = pivot // 100 * 100
    return century + yy if yy <= pivot % 100 else century - 100 + yy


def _from_serial(number: float, min_year: int, max_year: int) -> ParsedDate:
    if number.is_integer() and min_year <= number <= max_year and 1000 <= number <= 9999:
        return ParsedDate("", f"year only {int(number)}")
    day = excel_serial_to_date(number)
    if day is None:
        if math.floor(number) == 60:
            return ParsedDate("", "impossible date")   # the fictitious 1900-02-29
        return ParsedDate("", "unparsed date")
    return _from_date(day, ["from serial number"], min_year, max_year)


def _abc_date(a: int, b: int, y: int, two_digit: bool, order: str, assumed: bool,
              pivot: int, min_year: int, max_year: int) -> ParsedDate:
    """A date written a/b/y (day and month in ``order``)."""
    flags: list[str] = []
    if order == "ymd":            # year-first order cannot apply to a/b/yyyy text
        order = "dmy"
        flags.append("read as dmy")
    if two_digit:
        y = _full_year(y, pivot, flags)
    day, month = (a, b) if order == "dmy" else (b, a)
    other = "mdy" if order == "dmy" else "dmy"
    if month > 12 and day <= 12:
        day, month = month, day
        flags.append(f"read as {other} (day > 12)")
    elif a <= 12 and b <= 12 and a != b and assumed:
        flags.append(f"ambiguous order, assumed {order}")
    return _finish(y, month, day, flags, min_year, max_year)


def _month_name_date(text: str, pivot: int, min_year: int, max_year: int) -> ParsedDate | None:
    tokens = [t for t in _DATE_TOKENS.findall(fold_text(text)) if t not in _DATE_FILLERS]
    if len(tokens) != 3:
        return None
    months = [t for t in tokens if t in _MONTHS]
    numbers_ = [t for t in tokens if t.isdigit()]
    if len(months) != 1 or len(numbers_) != 2:
        return None
    month = _MONTHS[months[0]]
    first, second = numbers_
    if tokens[2] == months[0] and len(first) != 4:
        return None                     # "4 2019 March" and the like
    if len(first) == 4:
        year_text, day_text = first, second
    else:
        day_text, year_text = first, second
    if len(day_text) > 2 or len(year_text) not in (2, 4):
        return None
    flags: list[str] = []
    year = int(year_text)
    if len(year_text) == 2:
        year = _full_year(year, pivot, flags)
    return _finish(year, month, int(day_text), flags, min_year, max_year)


def _parse_date_text(text: str, order: str, min_year: int, max_year: int, assumed: bool,
                     pivot: int) -> ParsedDate:
    text = text.strip()
    if not text:
        return _DATE_MISSING
    if text.upper() in _PLACEHOLDERS:
        return ParsedDate("", "placeholder text")
    if not text.isascii():
        text = unicodedata.normalize("NFKC", text).translate(_DASHES).strip()
    text = _strip_time(text)
    m = _NUMERIC_DATE.match(text)
    if m:
        g1, g2, g3 = m.groups()
        if len(g1) == 4:                                   # 2019-03-04, 2019/3/4
            if len(g3) > 2:
                return ParsedDate("", "unparsed date")
            return _finish(int(g1), int(g2), int(g3), [], min_year, max_year)
        if len(g1) > 2 or len(g3) not in (2, 4):
            return ParsedDate("", "unparsed date")
        if order == "ymd" and len(g3) == 2:                # 19-03-04 read year first
            flags: list[str] = []
            year = _full_year(int(g1), pivot, flags)
            return _finish(year, int(g2), int(g3), flags, min_year, max_year)
        return _abc_date(int(g1), int(g2), int(g3), len(g3) == 2, order, assumed,
                         pivot, min_year, max_year)
    if len(text) == 8 and _is_digits(text):                # 20190304
        got = _finish(int(text[:4]), int(text[4:6]), int(text[6:]), [], min_year, max_year)
        if got.iso:
            return got
        return _abc_date(int(text[:2]), int(text[2:4]), int(text[4:]), False,
                         order, assumed, pivot, min_year, max_year)
    if len(text) == 4 and _is_digits(text):
        year = int(text)
        if min_year <= year <= max_year:
            return ParsedDate("", f"year only {year}")
        return ParsedDate("", f"implausible year {year}")
    if _SERIAL_TEXT.match(text):                           # a serial written as text
        return _from_serial(float(text), min_year, max_year)
    got = _month_name_date(text, pivot, min_year, max_year)
    return got if got is not None else ParsedDate("", "unparsed date")


def parse_date(value, order: str = "dmy", min_year: int = 1900, max_year: int = _DEFAULT_MAX_YEAR,
               assumed: bool = False, pivot_year: int | None = None) -> ParsedDate:
    """Parse one date cell.

    Parameters
    ----------
    value : date, datetime, pandas.Timestamp, int, float or str
        Date objects give their date (time ignored).  Numbers are 1900-system
        spreadsheet serials (flag "from serial number"); a whole number that
        is a plausible year (1000-9999 and within ``min_year``..``max_year``)
        gives iso ``""`` with flag "year only YYYY".  Text may be ISO
        ("2019-03-04", "2019/03/04"), numeric day/month ("04.03.2019",
        "4/3/2019", "4-3-19"), with a month name in English, Spanish, French
        or Portuguese ("4 Mar 2019", "March 4, 2019", "04MAR2019",
        "4 de marzo de 2019"), eight digits "20190304" (year first; when that
        is no date, read as ddmmyyyy/mmddyyyy per ``order``), a five-digit
        serial "43528", or a year "2019".  A trailing time is ignored.
    order : {"dmy", "mdy", "ymd"}
        How a/b/y text is read.  ``ymd`` applies to all-two-digit text
        ("19-03-04"); a/b/yyyy text is then read as dmy (flag "read as dmy").
    min_year, max_year : int
        Plausible years; outside them iso is ``""`` and the flag
        "implausible year YYYY".
    assumed : bool
        True when ``order`` is a fallback rather than known: a/b text with
        both parts <= 12 and different then gets the flag
        "ambiguous order, assumed <order>".
    pivot_year : int, optional
        Two-digit years yy become ``century(pivot)+yy`` when
        ``yy <= pivot_year % 100``, else the century before (flag
        "two-digit year").  Default ``max_year``.

    Returns
    -------
    ParsedDate
        Other flags: "read as <other order> (day > 12)" when the month place
        holds a number above 12; "impossible date" (31/02, serial 60);
        "unparsed date"; "placeholder text" ("N/A", "unknown").  Blank gives
        ``ParsedDate("", "")``.

    Examples
    --------
    >>> parse_date("4/3/2019")
    ParsedDate(iso='2019-03-04', flag='')
    >>> parse_date("13/25/2019", order="mdy").iso
    ''
    >>> parse_date("25/12/2019", order="mdy").flag
    'read as dmy (day > 12)'
    """
    if order not in _DATE_ORDERS:
        raise ValueError(f"date order must be one of {', '.join(_DATE_ORDERS)}, got {order!r}")
    pivot = max_year if pivot_year is None else pivot_year
    if isinstance(value, str):
        return _parse_date_text(value, order, min_year, max_year, assumed, pivot)
    if _is_missing(value):
        return _DATE_MISSING
    if isinstance(value, dt.datetime):
        return _from_date(value.date(), [], min_year, max_year)
    if isinstance(value, dt.date):
        return _from_date(value, [], min_year, max_year)
    if isinstance(value, bool) or type(value).__name__ == "bool_":
        return ParsedDate("", "unparsed date")
    if isinstance(value, numbers.Real):
        number = float(value)
        if not math.isfinite(number):
            return ParsedDate("", "unparsed date")
        return _from_serial(number, min_year, max_year)
    if isinstance(value, dt.time):
        return ParsedDate("", "unparsed date")
    return _parse_date_text(str(value), order, min_year, max_year, assumed, pivot)


def date_parts(text) -> tuple[int, int, int] | None:
    """The raw numbers of an a/b/y numeric date, for inferring the d/m order.

    Parameters
    ----------
    text : object
        A date cell; only text written with ``/``, ``.`` or ``-`` between a
        1-2 digit, a 1-2 digit and a 2 or 4 digit number counts (a trailing
        time is ignored).

    Returns
    -------
    (int, int, int) or None
        ``(a, b, year)`` as written ("4-3-19" -> (4, 3, 19)); ``None`` for
        anything else (ISO text, month names, non-text).
    """
    if not isinstance(text, str):
        return None
    m = _NUMERIC_DATE.match(_strip_time(text.strip()))
    if not m:
        return None
    g1, g2, g3 = m.groups()
    if len(g1) > 2 or len(g3) not in (2, 4):
        return None
    return int(g1), int(g2), int(g3)


def infer_date_order(values: Iterable) -> tuple[str | None, str]:
    """Infer the d/m order of one column from its unambiguous text values.

    Parameters
    ----------
    values : iterable
        The column's cells; non-text cells are ignored.

    Returns
    -------
    (str or None, str)
        ``("dmy", why)`` when some value has a first number above 12 (and
        a second one at most 12) and none the reverse; ``("mdy", why)`` for
        the reverse; ``(None, "conflicting: both d/m and m/d values")`` when
        both are seen; ``(None, "no unambiguous value")`` otherwise.  The
        explanation gives counts only, never values.
    """
    day_first = month_first = 0
    for value in values:
        parts = date_parts(value)
        if parts is None:
            continue
        a, b, _ = parts
        if a > 12 and 1 <= b <= 12:
            day_first += 1
        elif b > 12 and 1 <= a <= 12:
            month_first += 1
    if day_first and month_first:
        return None, "conflicting: both d/m and m/d values"
    if day_first:
        return "dmy", f"{day_first} value(s) with a first number above 12"
    if month_first:
        return "mdy", f"{month_first} value(s) with a second number above 12"
    return None, "no unambiguous value"


# ---------------------------------------------------------------------------
# Sex
# ---------------------------------------------------------------------------

# Written codes (folded, lower case) -> M | F | "" (unknown on purpose).
# Numeric codes are agency-specific and left to the configuration.
DEFAULT_SEX_CODES = {
    "m": "M", "male": "M", "man": "M", "boy": "M", "masc": "M", "masculine": "M",
    "h": "M", "hombre": "M", "masculino": "M", "varon": "M", "nino": "M",
    "masculin": "M", "homme": "M", "garcon": "M",
    "f": "F", "female": "F", "woman": "F", "girl": "F", "fem": "F", "feminine": "F",
    "mujer": "F", "femenino": "F", "feminino": "F", "nina": "F", "feminin": "F",
    "femme": "F", "fille": "F",
    "u": "", "unknown": "", "x": "", "other": "", "desconocido": "", "inconnu": "",
}
_WHOLE_NUMBER_TEXT = re.compile(r"^\s*(\d+)[.,]0+\s*$")
_CODE_DIGITS = re.compile(r"^\s*(\d+)(?:[.,]0+)?\s*$")


def normalize_sex(value, codes: Mapping[str, str] = DEFAULT_SEX_CODES) -> str:
    """Map a written sex code to ``"M"``, ``"F"`` or ``""``.

    Parameters
    ----------
    value : object
        The cell; looked up as ``fold_text(value).lower()``, and for number
        cells and "1.0"-style text also by its whole-number digits ("1").
    codes : mapping of str to str
        Folded lower-case code -> ``"M"``, ``"F"`` or ``""``.

    Returns
    -------
    str
        ``""`` for blanks, unknown codes and codes mapped to unknown (the
        caller notes unknown codes).

    Examples
    --------
    >>> normalize_sex(" Female ", DEFAULT_SEX_CODES)
    'F'
    >>> normalize_sex(1.0, {"1": "M", "2": "F"})
    'M'
    """
    key = fold_text(value).lower()
    if not key:
        return ""
    hit = codes.get(key)
    if hit is None and not isinstance(value, bool):
        digits = None
        if isinstance(value, numbers.Real) and not _is_missing(value):
            number = float(value)
            if math.isfinite(number) and number.is_integer():
                digits = str(int(number))
        elif isinstance(value, str):
            m = _CODE_DIGITS.match(value)
            digits = m.group(1) if m else None
        if digits is not None:
            hit = codes.get(digits)
            if hit is None and digits != digits.lstrip("0"):
                hit = codes.get(digits.lstrip("0") or "0")
    if hit is None:
        return ""
    hit = str(hit).strip().upper()
    return hit if hit in ("M", "F") else ""


# ---------------------------------------------------------------------------
# Ages
# ---------------------------------------------------------------------------

_DAYS_PER_MONTH = 365.25 / 12          # 30.4375, the mean Gregorian-Julian month
_AGE_UNITS = {}                        # word -> (rank, months per unit)
for _rank, (_factor, _words) in enumerate((
    (Decimal(12), "y yr yrs year years yo a ano anos anio anios an ans"),
    (Decimal(1), "m mo mos mon mons mth mths month months mes meses mois"),
    (7 / _DAYS_PER_MONTH, "w wk wks week weeks sem sems semana semanas semaine semaines"),
    (1 / _DAYS_PER_MONTH, "d day days dia dias jour jours j"),
)):
    for _word in _words.split():
        _AGE_UNITS[_word] = (_rank, _factor)
_AGE_FILLERS = frozenset("and y e et old de of age aged".split())
_NEWBORN = frozenset({"newborn", "new born", "neonate", "neonato", "neonata", "recien nacido",
                      "recien nacida", "nouveau ne", "nouveau nee"})
_AGE_TOKENS = re.compile(r"\d+(?:[.,]\d+)?|[a-z]+")
_AGE_BAD_CHARS = re.compile(r"[^a-z0-9\s.,()\-]")
_YEARS_OLD = re.compile(r"\by\s*/\s*o\b\.?|\by\.\s*o\.")
_MAX_AGE_MONTHS = Decimal(120 * 12)


def _age_range(parts: list[tuple[Decimal, int, object]]) -> tuple[float, float] | None:
    """(value, rank, months per unit) components, largest unit first -> month range."""
    ranks = [r for _, r, _ in parts]
    if ranks != sorted(set(ranks)):
        return None                    # repeated or out-of-order units
    if any(v != v.to_integral_value() for v, _, _ in parts[:-1]):
        return None                    # "1.5 yr 6 mo"
    lo = Decimal(0)
    for v, _, factor in parts[:-1]:
        lo += v * factor if isinstance(factor, Decimal) else Decimal(float(v) * factor)
    last, _, factor = parts[-1]
    exponent = last.as_tuple().exponent
    step = Decimal(1).scaleb(exponent if isinstance(exponent, int) and exponent < 0 else 0)
    if isinstance(factor, Decimal):
        lo_total, hi_total = lo + last * factor, lo + (last + step) * factor
    else:
        lo_total = lo + Decimal(float(last) * factor)
        hi_total = lo + Decimal(float(last + step) * factor)
    if lo_total < 0 or lo_total > _MAX_AGE_MONTHS:
        return None
    return float(lo_total), float(hi_total)


def _parse_age_text(text: str) -> tuple[float, float] | None:
    text = text.strip()
    if not text or text.upper() in _PLACEHOLDERS:
        return None
    text = _strip_marks(text.translate(_FOLD_TABLE).translate(_DASHES)).lower().strip()
    if text.startswith("-") or text.startswith("+"):
        return None
    if " ".join(re.findall(r"[a-z]+", text)) in _NEWBORN and not re.search(r"\d", text):
        return 0.0, 1.0
    m = _WHOLE_NUMBER_TEXT.match(text)
    if m:
        text = m.group(1)
    text = _YEARS_OLD.sub(" yo ", text)
    if _AGE_BAD_CHARS.search(text):
        return None
    parts: list[tuple[Decimal, int, object]] = []
    pending: Decimal | None = None
    for tok in _AGE_TOKENS.findall(text):
        if tok[0].isdigit():
            if pending is not None:
                return None            # two numbers in a row ("7-8")
            try:
                pending = Decimal(tok.replace(",", "."))
            except InvalidOperation:
                return None
        elif pending is not None:
            unit = _AGE_UNITS.get(tok)
            if unit is None:
                return None
            parts.append((pending, unit[0], unit[1]))
            pending = None
        elif tok not in _AGE_FILLERS:
            return None
    if pending is not None:
        if parts:
            return None                # "1 yr 6": the unit of 6 is unknown
        parts.append((pending, 0, Decimal(12)))   # a bare number is years
    if not parts:
        return None
    return _age_range(parts)


def parse_age(value) -> tuple[float, float] | None:
    """The range of ages in months that a written age allows.

    A stated age is read as truncated at its last written unit and digit, the
    way people state ages ("7" = seven full years, not yet eight):

    * ``7``, ``"7"``, ``7.0`` -> (84, 96); ``"2 yrs"``, ``"2y"``, ``"2 años"``
      -> (24, 36); a bare number is years;
    * ``"11 mo"``, ``"11m"``, ``"11 months"`` -> (11, 12);
      ``"1 yr 6 mo"`` -> (18, 19);
    * ``"6 weeks"`` -> (42, 49) days in months of 30.4375 days
      (~ (1.38, 1.61)); ``"3 days"`` likewise;
    * decimals keep their written precision: ``"7.5"`` -> 7.5 to 7.6 years
      = (90, 91.2); ``"7,5"`` is the same;
    * ``"newborn"`` (also "recién nacido", "neonate") -> (0, 1).

    Parameters
    ----------
    value : object
        The age cell.

    Returns
    -------
    (float, float) or None
        ``(low, high)`` months, the age being at least ``low`` and below
        ``high``.  ``None`` for blanks, negative ages, ages above 120 years,
        ranges ("7-8"), comparisons ("<1") and anything not understood.
    """
    if isinstance(value, str):
        return _parse_age_text(value)
    if _is_missing(value) or isinstance(value, bool) or type(value).__name__ == "bool_":
        return None
    if isinstance(value, numbers.Integral):
        n = int(value)
        if n < 0 or n > 120:
            return None
        return float(n * 12), float((n + 1) * 12)
    if isinstance(value, numbers.Real):
        number = float(value)
        if not math.isfinite(number) or number < 0 or number > 121:
            return None
        if number.is_integer():
            return parse_age(int(number))
        return _parse_age_text(f"{number:.6f}".rstrip("0"))
    return None


def _add_months(day: dt.date, months: int) -> dt.date:
    """``day`` plus ``months`` calendar months, the day clamped to the month's end."""
    y, m = divmod(day.year * 12 + day.month - 1 + months, 12)
    return dt.date(y, m + 1, min(day.day, calendar.monthrange(y, m + 1)[1]))


def _whole(x: float) -> int | None:
    r = round(x)
    return int(r) if abs(x - r) < 1e-9 else None


def _whole_days(months: float) -> int:
    """Fewest whole days of age that reach ``months`` (of 30.4375 days)."""
    return math.ceil(round(months * _DAYS_PER_MONTH, 6))


def _latest_birth(as_of: dt.date, low: float) -> dt.date:
    """Latest birth date whose age at ``as_of`` is at least ``low`` months."""
    months = _whole(low)
    if months is None:
        return as_of - dt.timedelta(days=_whole_days(low))
    born = _add_months(as_of, -months)
    one = dt.timedelta(days=1)
    while _add_months(born + one, months) <= as_of:   # month-end clamping
        born += one
    return born


def _earliest_birth(as_of: dt.date, high: float) -> dt.date:
    """Earliest birth date whose age at ``as_of`` is below ``high`` months."""
    months = _whole(high)
    one = dt.timedelta(days=1)
    if months is None:
        return as_of - dt.timedelta(days=_whole_days(high)) + one
    born = _add_months(as_of, -months) + one
    while _add_months(born, months) <= as_of:          # month-end clamping
        born += one
    return born


def age_to_birth_range(age_range_months, as_of: dt.date) -> tuple[str, str]:
    """Birth dates consistent with an age range at a reference date.

    Parameters
    ----------
    age_range_months : (float, float) or None
        ``(low, high)`` months from :func:`parse_age`.
    as_of : datetime.date or str
        The date the age refers to (ISO text accepted).

    Returns
    -------
    (str, str)
        ``(earliest, latest)`` ISO dates: earliest = ``as_of`` minus ``high``
        plus one day, latest = ``as_of`` minus ``low``.  Whole months are
        calendar months (a month back from 31 March is 28/29 February; the
        bounds are then moved over the days that month-end clamping makes
        equivalent).  Fractional months are read as days (months of 30.4375
        days, ages counted in whole days); a range holding no whole day
        gives the one nearest day as both bounds.  ``("", "")``
        for ``None``; a bound before year 1 is ``""``.

    Examples
    --------
    >>> age_to_birth_range((84.0, 96.0), dt.date(2026, 11, 1))
    ('2018-11-02', '2019-11-01')
    """
    if age_range_months is None:
        return "", ""
    if isinstance(as_of, str):
        as_of = dt.date.fromisoformat(as_of)
    elif isinstance(as_of, dt.datetime):
        as_of = as_of.date()
    low, high = age_range_months
    out = []
    for fn, bound in ((_earliest_birth, high), (_latest_birth, low)):
        try:
            out.append(fn(as_of, float(bound)).isoformat())
        except (OverflowError, ValueError):
            out.append("")
    if out[0] and out[1] and out[0] > out[1]:   # a range narrower than one day
        out[0] = out[1]
    return out[0], out[1]
