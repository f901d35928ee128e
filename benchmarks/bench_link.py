"""Throughput of compare + score on >= 1,000,000 candidate pairs of synthetic person records.

Run as a script (``python benchmarks/bench_link.py``) or with pytest
(``python -m pytest benchmarks/bench_link.py -m bench -s``).  Prints pairs/s of
our compare+score, the same pairs through recordlinkage's Compare on the same
fields (the reference tool, compare only), their ratio, and peak memory
(resource.getrusage, max resident set size).

Records are invented (seeded): fictional given/family names built from
syllables, 8-digit registration numbers, birth dates, sex; 30% of persons are
recorded again with a typo in one field.
"""

from __future__ import annotations

import resource
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from linker.blocking import BlockRule, block  # noqa: E402
from linker.compare import DEFAULT_PERSON_FIELDS, compare  # noqa: E402
from linker.cluster import connected_entities  # noqa: E402
from linker.evaluate import pairwise_metrics  # noqa: E402
from linker.model import DEFAULT_PERSON_GUARDS, FellegiSunter  # noqa: E402

SYLLABLES = np.array(["BA", "KO", "RI", "MEL", "TAN", "SU", "VOR", "LIN", "DA", "NE", "PAS", "TU", "GOR", "EL",
                      "MI", "ZA", "RON", "KA", "HEL", "OS"])


def _names(rng, size, parts):
    picks = rng.integers(0, SYLLABLES.size, size=(size, parts))
    return np.array(["".join(SYLLABLES[p]) for p in picks], dtype=object)


def _typo(rng, s: str) -> str:
    if len(s) < 2:
        return s
    k = int(rng.integers(0, len(s)))
    return s[:k] + "XYZQ"[int(rng.integers(0, 4))] + s[k + 1:]


def synthetic_records(n_persons: int = 60_000, dup_share: float = 0.3, seed: int = 1) -> pd.DataFrame:
    """Seeded fictional person records with the schema's person columns (and a ``truth`` column)."""
    import jellyfish

    rng = np.random.default_rng(seed)
    given_pool = _names(rng, 400, 2)
    family_pool = _names(rng, 1500, 3)
    # mildly skewed name frequencies: a few common names, a long tail
    given = given_pool[np.minimum(rng.geometric(1 / 120, n_persons) - 1, given_pool.size - 1)]
    family = family_pool[rng.integers(0, family_pool.size, n_persons)]
    birth = pd.Timestamp("2000-01-01") + pd.to_timedelta(rng.integers(0, 18 * 365, n_persons), unit="D")
    dob = birth.strftime("%Y-%m-%d").to_numpy(dtype=object)
    reg = np.char.zfill(rng.integers(0, 10**8, n_persons).astype(str), 8).astype(object)
    sex = rng.choice(np.array(["M", "F"], dtype=object), n_persons)
    base = pd.DataFrame({"truth": np.arange(n_persons), "reg_no": reg, "given_name": given, "family_name": family,
                         "birth_date": dob, "sex": sex})
    dups = base.sample(frac=dup_share, random_state=seed).copy()
    field = rng.integers(0, 5, len(dups))
    for k, col in enumerate(["reg_no", "given_name", "family_name", "birth_date"]):
        sel = field == k
        dups.loc[dups.index[sel], col] = [_typo(rng, v) if col != "birth_date" else v[:8] + f"{int(v[8:]) % 28 + 1:02d}"
                                          for v in dups.loc[dups.index[sel], col]]
    dups.loc[dups.index[field == 4], "reg_no"] = ""
    rec = pd.concat([base, dups], ignore_index=True)
    rec = rec.sample(frac=1.0, random_state=seed).reset_index(drop=True)
    rec.insert(0, "record_id", [f"r{i:07d}" for i in range(len(rec))])
    rec["given_key"] = rec["given_name"]
    rec["family_key"] = rec["family_name"]
    rec["name_key"] = [" ".join(sorted({g, f})) for g, f in zip(rec["given_name"], rec["family_name"])]
    sx = {v: jellyfish.soundex(v) for v in pd.unique(pd.concat([rec["given_name"], rec["family_name"]]))}
    rec["given_soundex"] = rec["given_name"].map(sx)
    rec["family_soundex"] = rec["family_name"].map(sx)
    rec["birth_year"] = pd.array(rec["birth_date"].str[:4].astype(int), dtype="Int64")
    rec["birth_date_min"] = ""
    rec["birth_date_max"] = ""
    return rec


RULES = (
    BlockRule("reg_no", "exact", ("reg_no",), cap=50),
    BlockRule("reg_no_near", "near_id", ("reg_no",), cap=50),
    BlockRule("family_sx_year", "exact", ("family_soundex", "birth_year"), cap=2000),
    BlockRule("name_window", "sorted_window", ("name_key",), window=12),
)


def _reference_compare(rec: pd.DataFrame, pairs: pd.DataFrame) -> float:
    """Seconds recordlinkage's Compare takes on the same pairs and fields."""
    import recordlinkage

    frame = rec[["reg_no", "given_name", "family_name", "birth_date", "sex"]]
    frame = frame.astype(object).where(frame != "")
    index = pd.MultiIndex.from_arrays([pairs["left"].to_numpy(), pairs["right"].to_numpy()])
    cmp = recordlinkage.Compare(n_jobs=1)
    cmp.string("reg_no", "reg_no", method="damerau_levenshtein", label="reg_no")
    cmp.string("given_name", "given_name", method="jarowinkler", label="given_name")
    cmp.string("family_name", "family_name", method="jarowinkler", label="family_name")
    cmp.exact("birth_date", "birth_date", label="birth_date")
    cmp.exact("sex", "sex", label="sex")
    t0 = time.perf_counter()
    cmp.compute(index, frame)
    return time.perf_counter() - t0


def _peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # ru_maxrss is KiB on Linux


def run(n_persons: int = 60_000, with_reference: bool = True) -> dict:
    t0 = time.perf_counter()
    rec = synthetic_records(n_persons)
    t_gen = time.perf_counter() - t0
    t0 = time.perf_counter()
    pairs, report = block(rec, RULES)
    t_block = time.perf_counter() - t0
    n_pairs = len(pairs)
    t0 = time.perf_counter()
    model = FellegiSunter(DEFAULT_PERSON_FIELDS, guards=DEFAULT_PERSON_GUARDS, seed=0)
    model.fit(rec, pairs.iloc[:200_000])  # parameters from a slice; throughput is measured below
    t_fit = time.perf_counter() - t0
    t0 = time.perf_counter()
    levels = compare(rec, pairs, DEFAULT_PERSON_FIELDS)
    t_cmp = time.perf_counter() - t0
    t0 = time.perf_counter()
    weight = model.match_weight(rec, pairs, levels)
    t_score = time.perf_counter() - t0
    peak_ours = _peak_mib()
    link = weight > 0
    quality = pairwise_metrics(connected_entities(len(rec), pairs["left"][link], pairs["right"][link]), rec["truth"])
    out = {"records": len(rec), "pairs": n_pairs, "generate_s": t_gen, "block_s": t_block, "fit_s": t_fit,
           "compare_s": t_cmp, "score_s": t_score, "pairs_per_s": n_pairs / (t_cmp + t_score),
           "links": int((weight > 0).sum()), "peak_mib_ours": peak_ours}
    print(f"records {len(rec):,}; candidate pairs {n_pairs:,} (block {t_block:.2f} s)")
    print(f"fit (200,000 pairs + random pairs) {t_fit:.2f} s, EM iterations {model.n_iter_}")
    print(f"compare {t_cmp:.2f} s + score {t_score:.2f} s = {n_pairs / (t_cmp + t_score):,.0f} pairs/s; "
          f"links {out['links']:,}; pairwise F1 against the generator's truth {quality['f1']:.4f}")
    print(f"peak memory after our pipeline: {peak_ours:,.0f} MiB")
    if with_reference:
        t_ref = _reference_compare(rec, pairs)
        out.update({"reference_compare_s": t_ref, "reference_pairs_per_s": n_pairs / t_ref,
                    "speed_ratio": t_ref / (t_cmp + t_score), "peak_mib_all": _peak_mib()})
        print(f"reference Compare (same pairs, same fields) {t_ref:.2f} s = {n_pairs / t_ref:,.0f} pairs/s; "
              f"ours compare+score is {out['speed_ratio']:.1f}x faster")
        print(f"peak memory including the reference run: {out['peak_mib_all']:,.0f} MiB")
    return out


@pytest.mark.bench
def test_bench_link():
    """>= 1,000,000 candidate pairs go through compare + score; figures are printed."""
    out = run()
    assert out["pairs"] >= 1_000_000
    assert out["pairs_per_s"] > 0


if __name__ == "__main__":
    run()
