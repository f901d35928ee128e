#!/usr/bin/env python3
"""Seeded generator of large fictional deliveries with truth, for the performance benchmarks.

Everything here is invented: the Westmarch Transit Authority and three partner
offices, syllable-built names, and an 8-digit "transit register number" (7
payload digits and a Luhn check digit).  A delivery is four CSV files, one
person per row, in four header vocabularies, plus ``truth.csv`` (provenance ->
person) and ``bench.toml``, a linker config for it.

Messiness, per record: registration number missing, written with a prefix and
separators, leading zero lost, one digit changed or two adjacent digits swapped;
a typo in a name; given and family name swapped; an age instead of a birth
date (one file states ages only); a birth date a day off or day and month
swapped; sex missing.  Names follow a skewed frequency (a few very common
names, a long tail) so that blocks on names grow large, as they do in real
registers, and family members share their family name.

``python benchmarks/generate.py --records 100000 --out DIR`` writes one; the
same seed and size give the same bytes.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import pandas as pd

SEED = 20261202
ONSETS = np.array(["b", "d", "f", "g", "h", "k", "l", "m", "n", "p", "r", "s", "t", "v", "z", "br", "dr", "gr",
                   "kl", "st", "tr", "sh", "ch", "th", "j", "w"])
VOWELS = np.array(["a", "e", "i", "o", "u", "ai", "ea", "ou", "y", "é"])
CODAS = np.array(["", "", "", "n", "r", "l", "s", "th", "m", "x", "nd", "rt"])
LOCATIONS = np.array(["ASHBY CROSSING", "BRENNOCK YARD", "COLDWATER HALT", "DUNMERE POST", "ELLERBY GATE",
                      "FENWICK STATION", "GALLOWMERE", "HOLLIN BRIDGE", "IVERSHAW", "KESTREL POINT"])

# file name -> (header of each field, date format, sex codes, registration number style)
FILES = {
    "wta_register.csv": ({"reg_no": "Reg No", "given_name": "First Name", "family_name": "Last Name",
                          "birth_date": "DOB", "sex": "Sex", "intake_date": "Intake Date",
                          "location": "Location", "role": "Member Type", "case": "Case ID"},
                         "%Y-%m-%d", ("M", "F"), "plain"),
    "shelter_intake.csv": ({"reg_no": "TR Number", "given_name": "Given Name", "family_name": "Surname",
                            "birth_date": "Date of Birth", "sex": "Gender", "intake_date": "Arrival Date",
                            "location": "Shelter", "role": "Role", "case": "Case ID"},
                           "%d/%m/%Y", ("male", "female"), "prefixed"),
    "crossing_log.csv": ({"reg_no": "Registration Number", "full_name": "Full Name", "age": "Age",
                          "sex": "Sex", "intake_date": "Crossing Date", "location": "Station",
                          "role": "Member Type", "case": "Case ID"},
                         "%Y-%m-%d", ("M", "F"), "number"),
    "tracing_office.csv": ({"reg_no": "Register No", "given_name": "Given Names", "family_name": "Family Name",
                            "birth_date": "Birth Date", "sex": "Sex", "intake_date": "Intake Date",
                            "location": "Station", "role": "Member Type", "case": "Case ID"},
                           "%Y-%m-%d", ("m", "f"), "grouped"),
}
FILE_SHARE = np.array([0.35, 0.25, 0.15, 0.25])
AS_OF = "2026-11-01"


def _names(rng: np.random.Generator, size: int, syllables: tuple[int, int]) -> np.ndarray:
    """``size`` distinct invented names of ``syllables`` (min, max) syllables each, upper case."""
    out: list[str] = []
    seen: set[str] = set()
    while len(out) < size:
        k = size - len(out) + 64
        n = rng.integers(syllables[0], syllables[1] + 1, k)
        parts = [ONSETS[rng.integers(0, ONSETS.size, k)] + VOWELS[rng.integers(0, VOWELS.size, k)]
                 for _ in range(syllables[1])]
        coda = CODAS[rng.integers(0, CODAS.size, k)]
        for i in range(k):
            name = ("".join(p[i] for p in parts[: n[i]]) + coda[i]).upper()
            if name not in seen and len(name) >= 3:
                seen.add(name)
                out.append(name)
    return np.array(out[:size], dtype=object)


def _zipf_pick(rng: np.random.Generator, pool_size: int, size: int, a: float) -> np.ndarray:
    """Indices into a pool with frequency falling as rank^-a (a few common values, a long tail)."""
    p = 1.0 / np.arange(1, pool_size + 1) ** a
    return rng.choice(pool_size, size=size, p=p / p.sum())


def luhn_digits(payload: np.ndarray) -> np.ndarray:
    """Luhn check digit of each 7-digit payload (integers), vectorized (common practice)."""
    digits = np.stack([(payload // 10 ** k) % 10 for k in range(7)], axis=1)   # rightmost first
    doubled = digits[:, 0::2] * 2
    doubled = np.where(doubled > 9, doubled - 9, doubled)
    total = doubled.sum(axis=1) + digits[:, 1::2].sum(axis=1)
    return (10 - total % 10) % 10


def persons(n_persons: int, rng: np.random.Generator) -> pd.DataFrame:
    """Families of one or two parents and one to four children; unique registration numbers."""
    sizes = rng.choice([2, 3, 4, 5, 6], size=n_persons // 2 + 10, p=[0.25, 0.35, 0.2, 0.12, 0.08])
    family = np.repeat(np.arange(sizes.size), sizes)[:n_persons]
    first = np.r_[True, family[1:] != family[:-1]]
    rank = np.arange(n_persons) - np.maximum.accumulate(np.where(first, np.arange(n_persons), 0))
    n_parents = rng.choice([1, 2], size=sizes.size, p=[0.6, 0.4])
    parent = rank < n_parents[family]
    parent &= ~((rank == 1) & (sizes[family] == 2))          # a family of two: one parent, one child
    given_pool = _names(rng, max(3000, n_persons // 60), (2, 3))
    family_pool = _names(rng, max(5000, n_persons // 8), (2, 4))
    fam_name = family_pool[_zipf_pick(rng, family_pool.size, sizes.size, 0.7)][family]
    given = given_pool[_zipf_pick(rng, given_pool.size, n_persons, 0.9)]
    payload = rng.choice(10 ** 7, size=n_persons, replace=False)
    reg = payload * 10 + luhn_digits(payload)
    family_birth = np.datetime64("1965-01-01") + rng.integers(0, 25 * 365, sizes.size).astype("timedelta64[D]")
    child_birth = np.datetime64("2008-01-01") + rng.integers(0, 17 * 365, n_persons).astype("timedelta64[D]")
    birth = np.where(parent, family_birth[family] + rng.integers(-1500, 1500, n_persons).astype("timedelta64[D]"),
                     child_birth)
    return pd.DataFrame({
        "person_id": [f"Q{i:08d}" for i in range(n_persons)], "family": family, "role":
        np.where(parent, "parent", "child"), "given_name": given, "family_name": fam_name,
        "reg_no": np.char.zfill(reg.astype(str), 8).astype(object), "birth_date": birth,
        "sex": rng.choice(np.array(["M", "F"]), n_persons),
        "location": LOCATIONS[_zipf_pick(rng, LOCATIONS.size, sizes.size, 0.8)][family],
        "intake": np.datetime64("2025-03-01") + rng.integers(0, 560, sizes.size).astype("timedelta64[D]")[family],
    })


def _typo(rng: np.random.Generator, values: np.ndarray) -> np.ndarray:
    out = values.copy()
    pos = rng.random(len(values))
    letters = np.array(list("ABDEIKLMNORSTU"))
    for i, v in enumerate(values):
        if len(v) > 2:
            k = int(pos[i] * len(v))
            out[i] = v[:k] + letters[(k * 7 + len(v)) % letters.size] + v[k + 1:]
    return out


def _reg_text(reg: np.ndarray, style: str) -> np.ndarray:
    if style == "prefixed":
        return np.array([f"TR-{r[:3]}-{r[3:]}" for r in reg], dtype=object)
    if style == "grouped":
        return np.array([f"{r[:4]} {r[4:]}" for r in reg], dtype=object)
    if style == "number":                                    # written as a number: leading zeros lost
        return np.array([r.lstrip("0") or "0" for r in reg], dtype=object)
    return reg


def records(people: pd.DataFrame, n_records: int, rng: np.random.Generator) -> pd.DataFrame:
    """``n_records`` person-records: every person at least once, the rest spread over persons and files."""
    n = len(people)
    who = np.r_[np.arange(n), rng.integers(0, n, max(n_records - n, 0))][:n_records]
    rng.shuffle(who)
    rec = people.iloc[who].reset_index(drop=True)
    rec["file"] = rng.choice(len(FILES), size=len(rec), p=FILE_SHARE)
    u = rng.random((len(rec), 12))
    reg = rec["reg_no"].to_numpy(dtype=object).copy()
    changed = u[:, 0] < 0.015
    digit = (rng.integers(0, 8, len(rec)))
    for i in np.flatnonzero(changed):
        r, k = reg[i], digit[i]
        reg[i] = r[:k] + str((int(r[k]) + 1 + int(u[i, 1] * 8)) % 10) + r[k + 1:]
    swapped = (u[:, 0] >= 0.015) & (u[:, 0] < 0.025)
    for i in np.flatnonzero(swapped):
        r, k = reg[i], min(digit[i], 6)
        reg[i] = r[:k] + r[k + 1] + r[k] + r[k + 2:]
    reg[u[:, 2] < 0.08] = ""
    rec["reg_no"] = reg
    given = rec["given_name"].to_numpy(dtype=object)
    family = rec["family_name"].to_numpy(dtype=object)
    given = np.where(u[:, 3] < 0.04, _typo(rng, given), given)
    family = np.where(u[:, 4] < 0.04, _typo(rng, family), family)
    swap = u[:, 5] < 0.015
    given, family = np.where(swap, family, given), np.where(swap, given, family)
    plain = u[:, 6] < 0.3                                    # accents dropped by some writers
    rec["given_name"] = np.where(plain, np.char.replace(given.astype(str), "É", "E").astype(object), given)
    rec["family_name"] = np.where(plain, np.char.replace(family.astype(str), "É", "E").astype(object), family)
    birth = rec["birth_date"].to_numpy().copy()
    birth = np.where(u[:, 7] < 0.02, birth + np.timedelta64(1, "D"), birth)
    rec["birth_missing"] = u[:, 8] < 0.03
    rec["birth_swap"] = u[:, 9] < 0.01
    rec["birth"] = birth
    rec["age_only"] = u[:, 10] < 0.05
    rec["sex_missing"] = u[:, 11] < 0.04
    return rec


def _render(rec: pd.DataFrame, name: str, spec) -> pd.DataFrame:
    headers, date_fmt, sex_codes, style = spec
    birth = pd.Series(pd.to_datetime(rec["birth"]))
    text = birth.dt.strftime(date_fmt).to_numpy(dtype=object)
    swapped = rec["birth_swap"].to_numpy() & (birth.dt.day <= 12).to_numpy()
    if swapped.any():
        alt = pd.to_datetime({"year": birth.dt.year, "month": birth.dt.day, "day": birth.dt.month},
                             errors="coerce")
        text = np.where(swapped, alt.dt.strftime(date_fmt).fillna("").to_numpy(dtype=object), text)
    text = np.where(rec["birth_missing"].to_numpy(), "", text)
    intake = pd.Series(pd.to_datetime(rec["intake"]))
    age = ((intake - birth).dt.days // 365.25).astype(int).astype(str).to_numpy(dtype=object)
    sex = np.where(rec["sex"].to_numpy() == "M", sex_codes[0], sex_codes[1]).astype(object)
    sex = np.where(rec["sex_missing"].to_numpy(), "", sex)
    reg = np.where(rec["reg_no"].to_numpy() == "", "", _reg_text(rec["reg_no"].to_numpy(dtype=object), style))
    out = {"reg_no": reg, "sex": sex, "intake_date": intake.dt.strftime(date_fmt).to_numpy(dtype=object),
           "location": rec["location"].to_numpy(dtype=object), "role": rec["role"].to_numpy(dtype=object),
           "case": np.char.add("C", rec["family"].to_numpy().astype(str)).astype(object)}
    if "full_name" in headers:
        out["full_name"] = (rec["given_name"] + " " + rec["family_name"]).to_numpy(dtype=object)
        out["age"] = age
    else:
        out["given_name"] = rec["given_name"].to_numpy(dtype=object)
        out["family_name"] = rec["family_name"].to_numpy(dtype=object)
        out["birth_date"] = np.where(rec["age_only"].to_numpy() & (text != ""), "", text)
        if "age" in headers:
            out["age"] = np.where(rec["age_only"].to_numpy(), age, "")
    return pd.DataFrame({headers[k]: out[k] for k in headers})


CONFIG = """# linker config of a generated benchmark delivery (invented data)
[delivery]
folder = "delivery"
patterns = ["*.csv"]

[identifier]
label = "transit register number"
digits = 8
prefixes = ["TR"]
check_digit = "luhn"

[dates]
order = "auto"
fallback_order = "dmy"
as_of = "{as_of}"
age_reference = ["intake_date"]

[slots.child.columns]
reg_no = ["child reg no"]

[slots.parent.columns]
reg_no = ["parent reg no"]

[fields]
reg_no = ["reg no", "tr number", "registration number", "register no"]
given_name = ["first name", "given name", "given names"]
family_name = ["last name", "surname", "family name"]
full_name = ["full name"]
birth_date = ["dob", "date of birth", "birth date"]
age = ["age"]
sex = ["sex", "gender"]
intake_date = ["intake date", "arrival date", "crossing date"]
location = ["location", "shelter", "station"]

[[relations]]
child = "child"
parent = "parent"

[[sheets]]
file = "shelter_intake.csv"
slot_column = "role"
slot_values = {{ child = "child", parent = "parent" }}
date_order = "dmy"
family_column = "case id"

[[sheets]]
file = "*.csv"
slot_column = "member type"
slot_values = {{ child = "child", parent = "parent" }}
family_column = "case id"
"""


def write_delivery(out: str | Path, n_records: int, seed: int = SEED) -> Path:
    """Write ``delivery/*.csv``, ``truth.csv`` and ``bench.toml`` under ``out``; returns the config path."""
    out = Path(out)
    (out / "delivery").mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    people = persons(max(int(n_records / 2.5), 10), rng)
    rec = records(people, n_records, rng)
    truth = []
    for k, (name, spec) in enumerate(FILES.items()):
        part = rec[rec["file"] == k].reset_index(drop=True)
        _render(part, name, spec).to_csv(out / "delivery" / name, index=False, lineterminator="\n")
        truth.append(pd.DataFrame({"source_file": name, "sheet": Path(name).stem,
                                   "row": np.arange(len(part)) + 2, "slot": part["role"],
                                   "person_id": part["person_id"]}))
    pd.concat(truth, ignore_index=True).to_csv(out / "truth.csv", index=False, lineterminator="\n")
    cfg = out / "bench.toml"
    cfg.write_text(CONFIG.format(as_of=AS_OF), encoding="utf-8")
    return cfg


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Write a generated benchmark delivery with truth (invented data).")
    ap.add_argument("--records", type=int, default=100_000)
    ap.add_argument("--out", required=True)
    ap.add_argument("--seed", type=int, default=SEED)
    args = ap.parse_args(argv)
    print(write_delivery(args.out, args.records, args.seed))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
