"""Quality of a linkage against known truth.

* Pairwise precision / recall / F1 over within-cluster record pairs
  (Christen & Goiser 2007): a predicted pair is a pair of records put in one
  cluster; a true pair is a pair of records of one true entity.
* B-cubed precision / recall / F1 (Bagga & Baldwin 1998): per record,
  precision = |its predicted cluster ∩ its true entity| / |predicted cluster|,
  recall = the same over |true entity|, averaged over records.
* :func:`pair_metrics` scores a set of predicted pairs (before clustering).

All counting goes through a contingency table of (predicted, true) labels
(numpy ``unique`` with counts), never over pairs of records.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from .errors import InputError

__all__ = ["cluster_metrics", "pairwise_metrics", "bcubed_metrics", "pair_metrics", "truth_labels",
           "evaluate_entities", "read_truth"]


def _unique(x: np.ndarray) -> np.ndarray:
    """Sorted distinct values by sorting (numpy 2's hash-based ``np.unique`` is far slower on int64 keys)."""
    x = np.sort(np.asarray(x).ravel())
    if x.size == 0:
        return x
    return x[np.concatenate(([True], x[1:] != x[:-1]))]


def _codes(labels) -> np.ndarray:
    return pd.factorize(pd.Series(np.asarray(labels, dtype=object)))[0].astype(np.int64)


def _contingency(pred, truth):
    p, t = _codes(pred), _codes(truth)
    if p.size != t.size:
        raise ValueError(f"labels differ in length: {p.size} predicted vs {t.size} true")
    width = int(t.max()) + 1 if t.size else 1
    cell, cell_n = np.unique(p * width + t, return_counts=True)
    cell_p, cell_t = cell // width, cell % width
    p_size = np.bincount(p)
    t_size = np.bincount(t)
    return cell_p, cell_t, cell_n.astype(np.int64), p_size.astype(np.int64), t_size.astype(np.int64)


def _prf(tp: float, n_pred: float, n_true: float) -> dict:
    precision = tp / n_pred if n_pred else 1.0
    recall = tp / n_true if n_true else 1.0
    f1 = 2 * precision * recall / (precision + recall) if precision + recall else 0.0
    return {"precision": float(precision), "recall": float(recall), "f1": float(f1)}


def _c2(x):
    x = np.asarray(x, dtype=np.int64)
    return x * (x - 1) // 2


def pairwise_metrics(pred_labels, truth_labels) -> dict:
    """Pairwise precision, recall, F1 and the pair counts (tp, predicted_pairs, true_pairs)."""
    _, _, cell_n, p_size, t_size = _contingency(pred_labels, truth_labels)
    tp, n_pred, n_true = int(_c2(cell_n).sum()), int(_c2(p_size).sum()), int(_c2(t_size).sum())
    out = _prf(tp, n_pred, n_true)
    out.update({"tp": tp, "predicted_pairs": n_pred, "true_pairs": n_true})
    return out


def bcubed_metrics(pred_labels, truth_labels) -> dict:
    """B-cubed precision, recall and F1 (harmonic mean of the two averages)."""
    cell_p, cell_t, cell_n, p_size, t_size = _contingency(pred_labels, truth_labels)
    n = cell_n.sum()
    if n == 0:
        return {"precision": 1.0, "recall": 1.0, "f1": 1.0}
    # each of the cell's n records scores n / |cluster|
    precision = float((cell_n * cell_n / p_size[cell_p]).sum() / n)
    recall = float((cell_n * cell_n / t_size[cell_t]).sum() / n)
    f1 = 2 * precision * recall / (precision + recall) if precision + recall else 0.0
    return {"precision": precision, "recall": recall, "f1": float(f1)}


def cluster_metrics(pred_labels, truth_labels) -> pd.DataFrame:
    """Both measures in one frame: rows ``pairwise`` and ``bcubed``; columns precision, recall, f1."""
    pw, b3 = pairwise_metrics(pred_labels, truth_labels), bcubed_metrics(pred_labels, truth_labels)
    return pd.DataFrame([{k: pw[k] for k in ("precision", "recall", "f1")}, b3], index=["pairwise", "bcubed"])


def pair_metrics(left, right, truth_labels) -> dict:
    """Precision, recall, F1 of predicted record pairs against all true within-entity pairs.

    Pairs are taken as unordered and duplicates count once; self-pairs are ignored.
    """
    t = _codes(truth_labels)
    left = np.asarray(left, dtype=np.int64)
    right = np.asarray(right, dtype=np.int64)
    lo, hi = np.minimum(left, right), np.maximum(left, right)
    keep = lo != hi
    key = _unique(lo[keep] * max(t.size, 1) + hi[keep])
    lo, hi = key // max(t.size, 1), key % max(t.size, 1)
    tp = int((t[lo] == t[hi]).sum())
    n_true = int(_c2(np.bincount(t)).sum()) if t.size else 0
    out = _prf(tp, key.size, n_true)
    out.update({"tp": tp, "predicted_pairs": int(key.size), "true_pairs": n_true})
    return out


# --- truth files -----------------------------------------------------------------------------------

TRUTH_PERSON = "person_id"
_PROVENANCE = ("source_file", "sheet", "row", "slot")


def truth_labels(records: pd.DataFrame, truth: pd.DataFrame) -> tuple[pd.Series, int]:
    """The true person of each record, aligned to ``records`` (missing where the truth is silent).

    ``truth`` holds ``person_id`` and either ``record_id`` or the four provenance
    columns (source_file, sheet, row, slot).  Returns the labels and the number
    of truth rows that match no record.  Raises ValueError naming what is wrong.
    """
    _check_truth(truth)
    keys = ["record_id"] if "record_id" in truth.columns else list(_PROVENANCE)
    missing = [c for c in keys if c not in records.columns]
    if missing:
        raise ValueError(f"the records have no {', '.join(missing)} column")
    t = truth[keys + [TRUTH_PERSON]].astype(str)
    left = records[keys].astype(str).reset_index(drop=True)
    joined = left.merge(t, on=keys, how="left", validate="many_to_one")
    labels = joined[TRUTH_PERSON]
    labels = labels.where(labels.notna() & (labels != ""))
    labels.index = records.index
    matched = t.merge(left.drop_duplicates(), on=keys, how="inner")
    return labels, int(len(t) - len(matched))


def evaluate_entities(records: pd.DataFrame, truth: pd.DataFrame, label_column: str = "entity_id") -> pd.DataFrame:
    """Pairwise and B-cubed precision, recall and F1 of ``label_column`` against a truth table.

    Only records the truth covers are scored; the frame also reports how many
    records had no truth and how many truth rows matched no record.
    """
    if label_column not in records.columns:
        raise ValueError(f"the records have no {label_column!r} column")
    labels, unmatched = truth_labels(records, truth)
    covered = labels.notna().to_numpy()
    pred = records[label_column].astype(str).to_numpy()[covered]
    true = labels.to_numpy()[covered]
    pw, b3 = pairwise_metrics(pred, true), bcubed_metrics(pred, true)
    rows = []
    for name, m in (("pairwise", pw), ("bcubed", b3)):
        rows.append({"measure": name, "precision": m["precision"], "recall": m["recall"], "f1": m["f1"],
                     "records_scored": int(covered.sum()),
                     "records_without_truth": int((~covered).sum()),
                     "truth_rows_unmatched": unmatched})
    return pd.DataFrame(rows)


def read_truth(path) -> pd.DataFrame:
    """Read a truth CSV (all columns as text) and check its shape; errors name the file."""
    path = Path(path)
    try:
        truth = pd.read_csv(path, dtype=str, keep_default_na=False, encoding="utf-8-sig")
    except FileNotFoundError:
        raise InputError(path, "no such truth file") from None
    except (OSError, UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError) as err:
        raise InputError(path, f"cannot read the truth file ({type(err).__name__})") from None
    try:
        _check_truth(truth)
    except ValueError as err:
        raise InputError(path, str(err)) from None
    return truth


def _check_truth(truth: pd.DataFrame) -> None:
    if TRUTH_PERSON not in truth.columns:
        raise ValueError(f"the truth file has no {TRUTH_PERSON!r} column")
    keys = ["record_id"] if "record_id" in truth.columns else list(_PROVENANCE)
    if not all(c in truth.columns for c in keys):
        raise ValueError("the truth file needs a 'record_id' column or the columns " + ", ".join(_PROVENANCE))
    dup = truth.duplicated(keys, keep="first")
    if dup.any():
        line = int(np.flatnonzero(dup.to_numpy())[0]) + 2
        raise ValueError(f"line {line} names a record that another line names too")
