"""Content fingerprints: how a record and a pair of records are recognised from one production to the next.

File names, sheet names and row positions change when an agency re-exports or
reorders its files; the compared values of a person-record do not.  A record's
fingerprint is a hash of its normalized compared fields, so reviewer decisions
and entity IDs follow the content, not the position.  Records with identical
compared values share a fingerprint (they are indistinguishable to the linker).
"""

from __future__ import annotations

import hashlib

import pandas as pd

__all__ = ["FINGERPRINT_FIELDS", "record_fingerprints", "pair_key", "pair_keys"]

# the normalized fields the comparison reads (see linker.compare.DEFAULT_PERSON_FIELDS)
FINGERPRINT_FIELDS = ("reg_no", "given_name", "family_name", "birth_date", "birth_date_min",
                      "birth_date_max", "sex")


def _digest(text: str, prefix: str) -> str:
    return prefix + hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def record_fingerprints(records: pd.DataFrame) -> pd.Series:
    """One fingerprint per record ("F" + 16 hex digits) from :data:`FINGERPRINT_FIELDS`.

    Missing columns and empty values count as "" so text read back from CSV and
    the in-memory frame give the same fingerprints.
    """
    parts = []
    for col in FINGERPRINT_FIELDS:
        if col in records.columns:
            s = records[col].astype(str).str.strip().replace({"nan": "", "NaT": "", "<NA>": "", "None": ""})
        else:
            s = pd.Series("", index=records.index)
        parts.append(s)
    joined = parts[0].str.cat(parts[1:], sep="\x1f")
    return joined.map(lambda t: _digest(t, "F")).rename("fingerprint")


def pair_key(fp_a: str, fp_b: str) -> str:
    """Order-free key of a pair of fingerprints ("K" + 16 hex digits)."""
    lo, hi = sorted((str(fp_a), str(fp_b)))
    return _digest(lo + "~" + hi, "K")


def pair_keys(fp_a: pd.Series, fp_b: pd.Series) -> pd.Series:
    """:func:`pair_key` over two aligned series."""
    return pd.Series([pair_key(a, b) for a, b in zip(fp_a, fp_b)], index=fp_a.index, name="pair_key")
