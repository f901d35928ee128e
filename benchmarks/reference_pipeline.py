"""A plain analyst's linkage of the demo delivery, the yardstick for our own linkage.

This is the pipeline an analyst would put together in an afternoon, written
down so our results can be set beside it.  It uses our ingest only to get the
person-records with their values *as delivered* (the ``*_raw`` columns) and
none of our normalizers:

* fields from the raw values: registration number = the digits of the raw
  text (after dropping a trailing ``.0``); names lower case without accents
  (NFKD, combining marks dropped); where a row has only a full name, the last
  word is the family name and the rest the given name; birth date read by
  ``pandas.to_datetime(dayfirst=True, errors="coerce")`` (``format="mixed"``
  so each value is read on its own, and ISO dates, the way date cells reach
  us, are kept as they are); sex = the first letter, upper case;
* candidate pairs: records sharing a registration number, plus records
  sharing the Soundex of the family name and the birth year (union); built
  with a pandas self-join;
* comparison with recordlinkage's ``Compare`` (the reference tool, used for
  comparison only): registration number exact, given and family name
  Jaro-Winkler at 0.85, birth date exact, sex exact;
* recordlinkage's ``ECMClassifier`` with its default settings picks the
  matches; connected components of the matches are the entities.

Run ``python benchmarks/reference_pipeline.py`` to print its pairwise and
B-cubed scores against the demo's ground truth, the candidate pair count, the
time taken and a breakdown of the true pairs it misses.
"""

from __future__ import annotations

import re
import sys
import time
import unicodedata
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
DEMO_CONFIG = ROOT / "configs" / "sample.toml"
DEMO_TRUTH = ROOT / "sample" / "truth" / "records.csv"
DEMO_PERSONS = ROOT / "sample" / "truth" / "persons.csv"
PROVENANCE = ["source_file", "sheet", "row", "slot"]
FIELDS = ["reg_no", "given_name", "family_name", "birth_date", "sex"]

__all__ = ["analyst_fields", "candidate_pairs", "compare_pairs", "classify", "entity_labels",
           "reference_labels", "truth_labels", "loss_breakdown", "main"]


# --------------------------------------------------------------------------- fields

def _blank_to_na(s: pd.Series) -> pd.Series:
    """Empty strings become missing values (so they neither block nor agree)."""
    return s.where(s != "", np.nan)


def _fold_name(text: str) -> str:
    """Lower case, accents removed (NFKD, combining marks dropped), outer spaces trimmed."""
    text = unicodedata.normalize("NFKD", text.lower())
    return "".join(ch for ch in text if not unicodedata.combining(ch)).strip()


def _fold_names(s: pd.Series) -> pd.Series:
    """:func:`_fold_name` over a column, computed once per distinct value."""
    s = s.fillna("").astype(str)
    folded = {v: _fold_name(v) for v in pd.unique(s)}
    return s.map(folded)


def _reg_digits(raw: pd.Series) -> pd.Series:
    """Digits of the raw registration number after a trailing '.0' is dropped."""
    text = raw.fillna("").astype(str).str.strip().str.replace(r"\.0$", "", regex=True)
    return _blank_to_na(text.str.replace(r"\D", "", regex=True))


def _split_full_name(full: pd.Series) -> tuple[pd.Series, pd.Series]:
    """(given, family) of a full name: the last word is the family name, the rest the given name."""
    words = full.str.split()
    family = words.str[-1].fillna("")
    given = words.str[:-1].str.join(" ").fillna("")
    return given, family


def _birth_dates(raw: pd.Series) -> pd.Series:
    """Birth dates as ISO text (missing when unreadable), read day first."""
    text = raw.fillna("").astype(str).str.strip()
    parsed = pd.to_datetime(text.where(text != ""), dayfirst=True, errors="coerce", format="mixed")
    return pd.Series(parsed.dt.strftime("%Y-%m-%d"), index=raw.index).where(parsed.notna(), np.nan)


def analyst_fields(records: pd.DataFrame) -> pd.DataFrame:
    """The analyst's comparison fields, derived from the raw columns only.

    Parameters
    ----------
    records : DataFrame
        Person-records with ``reg_no_raw``, ``given_name_raw``,
        ``family_name_raw``, ``full_name_raw``, ``birth_date_raw`` and
        ``sex_raw``.

    Returns
    -------
    DataFrame
        One row per record, positions 0..n-1: ``reg_no``, ``given_name``,
        ``family_name``, ``birth_date`` (ISO text), ``sex``,
        ``family_soundex``, ``birth_year``, and ``from_full_name`` (True when
        the names come from splitting a full name).  Missing is NaN.
    """
    import jellyfish

    rec = records.reset_index(drop=True)
    given = _fold_names(rec["given_name_raw"])
    family = _fold_names(rec["family_name_raw"])
    full = _fold_names(rec["full_name_raw"])
    from_full = (given == "") & (family == "") & (full != "")
    split_given, split_family = _split_full_name(full[from_full])
    given = given.copy()
    family = family.copy()
    given[from_full] = split_given
    family[from_full] = split_family
    birth = _birth_dates(rec["birth_date_raw"])
    sex = rec["sex_raw"].fillna("").astype(str).str.strip().str[:1].str.upper()
    soundex = {v: jellyfish.soundex(v) for v in pd.unique(family)}
    out = pd.DataFrame({
        "reg_no": _reg_digits(rec["reg_no_raw"]),
        "given_name": _blank_to_na(given),
        "family_name": _blank_to_na(family),
        "birth_date": birth,
        "sex": _blank_to_na(sex),
        "family_soundex": _blank_to_na(family.map(soundex)),
        "birth_year": pd.to_numeric(birth.str[:4], errors="coerce"),
        "from_full_name": from_full.to_numpy(),
    })
    return out


# --------------------------------------------------------------------------- pairs

def _block(fields: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    """Pairs (left < right) of records equal on every key column; records missing a key take no part."""
    side = fields[keys].dropna().reset_index(names="pos")
    pairs = side.merge(side, on=keys, suffixes=("_l", "_r"))
    pairs = pairs[pairs["pos_l"] < pairs["pos_r"]]
    return pairs[["pos_l", "pos_r"]]


def candidate_pairs(fields: pd.DataFrame) -> pd.MultiIndex:
    """Union of the registration-number block and the (family Soundex, birth year) block, sorted."""
    both = pd.concat([_block(fields, ["reg_no"]), _block(fields, ["family_soundex", "birth_year"])])
    both = both.drop_duplicates().sort_values(["pos_l", "pos_r"])
    return pd.MultiIndex.from_arrays([both["pos_l"].to_numpy(), both["pos_r"].to_numpy()])


def compare_pairs(fields: pd.DataFrame, pairs: pd.MultiIndex) -> pd.DataFrame:
    """0/1 agreement of each candidate pair on the five fields (recordlinkage Compare)."""
    import recordlinkage

    cmp = recordlinkage.Compare(n_jobs=1)
    cmp.exact("reg_no", "reg_no", label="reg_no")
    cmp.string("given_name", "given_name", method="jarowinkler", threshold=0.85, label="given_name")
    cmp.string("family_name", "family_name", method="jarowinkler", threshold=0.85, label="family_name")
    cmp.exact("birth_date", "birth_date", label="birth_date")
    cmp.exact("sex", "sex", label="sex")
    return cmp.compute(pairs, fields[FIELDS]).astype(np.int8)


def classify(features: pd.DataFrame):
    """Matched pairs (MultiIndex) and the fitted ECMClassifier (default settings)."""
    import recordlinkage

    model = recordlinkage.ECMClassifier()
    matches = model.fit_predict(features)
    return matches, model


def entity_labels(n: int, matches: pd.MultiIndex) -> np.ndarray:
    """Connected components of the matched pairs over n records, as integer labels."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    left = matches.get_level_values(0).to_numpy(dtype=np.int64)
    right = matches.get_level_values(1).to_numpy(dtype=np.int64)
    graph = coo_matrix((np.ones(left.size, dtype=np.int8), (left, right)), shape=(n, n))
    return connected_components(graph, directed=False)[1].astype(np.int64)


def _run(records: pd.DataFrame) -> dict:
    """Every intermediate of the baseline: fields, pairs, features, matches, model, labels."""
    fields = analyst_fields(records)
    pairs = candidate_pairs(fields)
    features = compare_pairs(fields, pairs)
    matches, model = classify(features)
    labels = entity_labels(len(fields), matches)
    return {"fields": fields, "pairs": pairs, "features": features, "matches": matches,
            "model": model, "labels": labels}


def reference_labels(records: pd.DataFrame, seed: int = 0) -> np.ndarray:
    """Integer entity label per record, position-aligned with ``records``.

    ``seed`` is taken so every baseline shares one signature; this one has no
    random step (the ECM classifier starts from fixed values), so it is unused.
    """
    del seed
    return _run(records)["labels"]


# --------------------------------------------------------------------------- truth and losses

def truth_labels(records: pd.DataFrame, truth_path: Path = DEMO_TRUTH) -> np.ndarray:
    """The true person_id of each record, joined on (source_file, sheet, row, slot)."""
    truth = pd.read_csv(truth_path, dtype=str, keep_default_na=False)
    keys = records[PROVENANCE].astype(str).reset_index(drop=True)
    joined = keys.merge(truth, on=PROVENANCE, how="left", validate="many_to_one")
    missing = joined["person_id"].isna()
    if missing.any():
        raise ValueError(f"{int(missing.sum())} records have no line in {truth_path.name}")
    return joined["person_id"].to_numpy(dtype=object)


def _true_pairs(truth: np.ndarray) -> pd.DataFrame:
    """All within-person record pairs (left < right) as positions."""
    side = pd.DataFrame({"person_id": truth, "pos": np.arange(truth.size)})
    pairs = side.merge(side, on="person_id", suffixes=("_l", "_r"))
    return pairs[pairs["pos_l"] < pairs["pos_r"]].reset_index(drop=True)


def loss_breakdown(records: pd.DataFrame, run: dict, truth: np.ndarray,
                   persons_path: Path = DEMO_PERSONS) -> dict:
    """Counts of the true pairs the baseline misses, by what the pair has in it.

    A pair is missed when its two records end in different entities.  Field
    agreement is the baseline's own (its Compare run on every true pair).
    ``by_condition`` counts missed pairs where the condition holds,
    ``all_with_condition`` all true pairs where it holds; conditions overlap.
    """
    fields, labels = run["fields"], run["labels"]
    rec = records.reset_index(drop=True)
    tp = _true_pairs(truth)
    lpos, rpos = tp["pos_l"].to_numpy(), tp["pos_r"].to_numpy()
    index = pd.MultiIndex.from_arrays([lpos, rpos])
    missed = labels[lpos] != labels[rpos]
    cand = index.isin(run["pairs"])
    agree = compare_pairs(fields, index).to_numpy(dtype=bool)
    agree = dict(zip(FIELDS, agree.T))

    def col(name: str, frame: pd.DataFrame = fields) -> tuple[np.ndarray, np.ndarray]:
        values = frame[name].to_numpy(dtype=object)
        return values[lpos], values[rpos]

    def either(mask: np.ndarray) -> np.ndarray:
        return mask[lpos] | mask[rpos]

    def both_present(name: str) -> np.ndarray:
        present = fields[name].notna().to_numpy()
        return present[lpos] & present[rpos]

    no_date = fields["birth_date"].isna().to_numpy()
    has_age = (rec["age_raw"].astype(str).str.strip() != "").to_numpy()
    raw_date = (rec["birth_date_raw"].astype(str).str.strip() != "").to_numpy()
    persons = pd.read_csv(persons_path, dtype=str, keep_default_na=False).set_index("person_id")
    true_family = pd.Series(truth).map(persons["family_name"]).fillna("")
    two_part = true_family.str.contains(r"[\s-]", regex=True).to_numpy()[lpos]
    reg_l, reg_r = col("reg_no")
    reg_both = both_present("reg_no") & ~agree["reg_no"]
    zero_lost = reg_both & (pd.Series(reg_l).str.lstrip("0").to_numpy() == pd.Series(reg_r).str.lstrip("0").to_numpy())
    sci = rec["reg_no_raw"].astype(str).str.contains(r"\d[eE][+-]?\d", regex=True).to_numpy()
    date_l, date_r = col("birth_date")
    swapped_l = pd.Series(date_l).str.replace(r"^(\d{4})-(\d{2})-(\d{2})$", r"\1-\3-\2", regex=True).to_numpy()
    date_both = both_present("birth_date") & ~agree["birth_date"]
    sex_both = both_present("sex") & ~agree["sex"]
    digit_sex = fields["sex"].fillna("").str.isdigit().to_numpy()
    comma = rec["full_name_raw"].astype(str).str.contains(",", regex=False).to_numpy()
    sx_l, sx_r = col("family_soundex")
    yr_l, yr_r = col("birth_year")
    conditions = {
        "not a candidate pair (blocking)": ~cand,
        "  ... family Soundex differs or missing": ~cand & (pd.isna(sx_l) | pd.isna(sx_r) | (sx_l != sx_r)),
        "  ... a birth year missing": ~cand & (pd.isna(yr_l) | pd.isna(yr_r)),
        "candidate pair, not linked": cand,
        "a record with no birth date but an age": either(no_date & has_age),
        "a record whose birth date text did not parse": either(no_date & raw_date),
        "birth dates disagree (both parsed)": date_both,
        "  ... day and month swapped": date_both & (swapped_l == date_r),
        "two-part family name (space or hyphen, true name)": two_part,
        "  ... and family names disagree (JW < 0.85)": two_part & ~agree["family_name"],
        "family names disagree (JW < 0.85 or missing)": ~agree["family_name"],
        "given names disagree (JW < 0.85 or missing)": ~agree["given_name"],
        "a record named by a split full name": either(fields["from_full_name"].to_numpy()),
        "  ... written 'Family, Given'": either(comma),
        "reg nos disagree (both present)": reg_both,
        "  ... equal once leading zeros dropped": zero_lost,
        "  ... a raw reg no in scientific notation": reg_both & either(sci),
        "a reg no missing": ~both_present("reg_no"),
        "sex disagrees (both present)": sex_both,
        "  ... digit code (1/2) against a letter": sex_both & (digit_sex[lpos] != digit_sex[rpos]),
    }
    return {"true_pairs": int(len(tp)), "missed": int(missed.sum()),
            "by_condition": {name: int((missed & mask).sum()) for name, mask in conditions.items()},
            "all_with_condition": {name: int(mask.sum()) for name, mask in conditions.items()}}


def _false_links(run: dict, truth: np.ndarray) -> dict:
    """Matched pairs joining two persons, and what they agreed on."""
    m = run["matches"]
    lpos, rpos = m.get_level_values(0).to_numpy(), m.get_level_values(1).to_numpy()
    wrong = truth[lpos] != truth[rpos]
    feats = run["features"].loc[m[wrong]]
    pattern = feats.astype(str).agg("".join, axis=1).value_counts().head(5)
    return {"matched_pairs": int(len(m)), "wrong_matched_pairs": int(wrong.sum()),
            "top_wrong_patterns (" + "".join(f[0] for f in FIELDS) + ")": pattern.to_dict()}


# --------------------------------------------------------------------------- report

def main() -> dict:
    """Run the baseline on the demo delivery and print its scores and losses."""
    sys.path.insert(0, str(ROOT))
    from linker import load_config, run_pipeline
    from linker.evaluate import bcubed_metrics, pairwise_metrics

    t0 = time.perf_counter()
    import recordlinkage  # noqa: F401  (its import alone takes seconds; timed apart)
    import sklearn.naive_bayes  # noqa: F401
    t_import = time.perf_counter() - t0
    t0 = time.perf_counter()
    records = run_pipeline(load_config(str(DEMO_CONFIG))).records
    t_ingest = time.perf_counter() - t0
    t0 = time.perf_counter()
    run = _run(records)
    t_run = time.perf_counter() - t0
    truth = truth_labels(records)
    pw = pairwise_metrics(run["labels"], truth)
    b3 = bcubed_metrics(run["labels"], truth)
    losses = loss_breakdown(records, run, truth)
    wrong = _false_links(run, truth)
    model = run["model"]
    print(f"records {len(records):,}; candidate pairs {len(run['pairs']):,}; matched pairs "
          f"{len(run['matches']):,}; entities {np.unique(run['labels']).size:,} "
          f"(true persons {pd.unique(truth).size:,})")
    print(f"time: importing recordlinkage {t_import:.2f} s; our ingest (raw values) {t_ingest:.2f} s; "
          f"baseline fields+block+compare+ECM+components {t_run:.2f} s")
    print("ECM m: " + ", ".join(f"{k}={v[1]:.3f}" for k, v in model.m_probs.items())
          + " | u: " + ", ".join(f"{k}={v[1]:.3f}" for k, v in model.u_probs.items()))
    print(f"pairwise  P {pw['precision']:.4f}  R {pw['recall']:.4f}  F1 {pw['f1']:.4f}  "
          f"(tp {pw['tp']:,}, predicted {pw['predicted_pairs']:,}, true {pw['true_pairs']:,})")
    print(f"B-cubed   P {b3['precision']:.4f}  R {b3['recall']:.4f}  F1 {b3['f1']:.4f}")
    print(f"missed true pairs {losses['missed']:,} of {losses['true_pairs']:,}; by what the pair has "
          f"(missed / all true pairs with it):")
    for name, count in losses["by_condition"].items():
        print(f"  {name:<52} {count:>6,} / {losses['all_with_condition'][name]:>6,}")
    print(f"wrong links: {wrong}")
    return {"pairwise": pw, "bcubed": b3, "candidate_pairs": int(len(run["pairs"])),
            "import_s": t_import, "ingest_s": t_ingest, "baseline_s": t_run, "losses": losses, "false_links": wrong}


if __name__ == "__main__":
    main()
