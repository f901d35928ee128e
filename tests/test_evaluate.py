"""Tests for linker.evaluate."""

import itertools

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from linker.evaluate import bcubed_metrics, cluster_metrics, pair_metrics, pairwise_metrics

# REFERENCES.md section 6 worked cases (derived; B-cubed per Bagga & Baldwin 1998 as restated by
# Gooi & Allan 2004; pairwise per Christen & Goiser 2007)
TRUTH_BB = [1] * 5 + [2] * 2 + [3] * 5


@pytest.mark.parametrize("pred, truth, b3p, b3r, pp, pr, pf", [
    # gold {a,b,c}{d,e}; pred {a,b}{c,d,e}
    ([0, 0, 1, 1, 1], ["g1", "g1", "g1", "g2", "g2"], 11 / 15, 11 / 15, 0.5, 0.5, 0.5),
    # B&B: merge {6,7} with {8-12}
    ([1] * 5 + [2] * 7, TRUTH_BB, 64 / 84, 1.0, 21 / 31, 1.0, 0.8077),
    # B&B: merge {1-5} with {8-12}
    ([1] * 5 + [2] * 2 + [1] * 5, TRUTH_BB, 7 / 12, 1.0, 21 / 46, 1.0, 0.6269),
])
def test_reference_cases(pred, truth, b3p, b3r, pp, pr, pf):
    """B-cubed and pairwise values of the REFERENCES.md §6 table."""
    b3 = bcubed_metrics(pred, truth)
    pw = pairwise_metrics(pred, truth)
    assert b3["precision"] == pytest.approx(b3p) and b3["recall"] == pytest.approx(b3r)
    assert pw["precision"] == pytest.approx(pp) and pw["recall"] == pytest.approx(pr)
    assert pw["f1"] == pytest.approx(pf, abs=5e-5)


def test_perfect_and_all_singletons():
    """Identical clusterings score 1; all-singleton predictions have pairwise recall 0 and B-cubed precision 1."""
    truth = [0, 0, 1, 2, 2, 2]
    assert pairwise_metrics(truth, truth)["f1"] == 1.0 and bcubed_metrics(truth, truth)["f1"] == 1.0
    single = list(range(6))
    assert pairwise_metrics(single, truth)["recall"] == 0.0
    assert bcubed_metrics(single, truth)["precision"] == 1.0
    frame = cluster_metrics(single, truth)
    assert list(frame.index) == ["pairwise", "bcubed"]


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 4), st.integers(0, 4)), min_size=1, max_size=25))
def test_contingency_counts_equal_brute_force(rows):
    """Counting via the contingency table equals the O(n^2) definitions (hypothesis)."""
    pred = [r[0] for r in rows]
    truth = [r[1] for r in rows]
    n = len(rows)
    same_p = {(i, j) for i, j in itertools.combinations(range(n), 2) if pred[i] == pred[j]}
    same_t = {(i, j) for i, j in itertools.combinations(range(n), 2) if truth[i] == truth[j]}
    pw = pairwise_metrics(pred, truth)
    assert (pw["tp"], pw["predicted_pairs"], pw["true_pairs"]) == (len(same_p & same_t), len(same_p), len(same_t))
    prec = np.mean([sum(1 for j in range(n) if pred[j] == pred[i] and truth[j] == truth[i])
                    / sum(1 for j in range(n) if pred[j] == pred[i]) for i in range(n)])
    rec = np.mean([sum(1 for j in range(n) if pred[j] == pred[i] and truth[j] == truth[i])
                   / sum(1 for j in range(n) if truth[j] == truth[i]) for i in range(n)])
    b3 = bcubed_metrics(pred, truth)
    assert b3["precision"] == pytest.approx(prec) and b3["recall"] == pytest.approx(rec)
    pm = pair_metrics([i for i, _ in same_p], [j for _, j in same_p], truth)
    assert pm["tp"] == pw["tp"] and pm["precision"] == pytest.approx(pw["precision"])


def test_pair_metrics_dedupes_and_ignores_order():
    """Predicted pairs count once whatever their order; self-pairs are dropped."""
    truth = ["a", "a", "b", "b", "c"]
    pm = pair_metrics([0, 1, 2, 3, 4], [1, 0, 3, 4, 4], truth)
    assert (pm["tp"], pm["predicted_pairs"], pm["true_pairs"]) == (2, 3, 2)
    assert pm["precision"] == pytest.approx(2 / 3) and pm["recall"] == 1.0


def test_length_mismatch_is_an_error():
    """Label arrays of different length are refused."""
    with pytest.raises(ValueError, match="differ in length"):
        pairwise_metrics([0, 1], [0])


def test_truth_labels_by_provenance_and_by_record_id():
    from linker.evaluate import evaluate_entities, truth_labels

    records = pd.DataFrame({"record_id": ["r1", "r2", "r3", "r4"], "source_file": ["a.xlsx"] * 4,
                            "sheet": ["S"] * 4, "row": ["2", "3", "4", "5"], "slot": ["child"] * 4,
                            "entity_id": ["E1", "E1", "E2", "E3"]})
    by_prov = pd.DataFrame({"source_file": ["a.xlsx"] * 4, "sheet": ["S"] * 4, "row": ["2", "3", "4", "9"],
                            "slot": ["child"] * 4, "person_id": ["P1", "P1", "P1", "P9"]})
    labels, unmatched = truth_labels(records, by_prov)
    assert labels.tolist()[:3] == ["P1", "P1", "P1"] and pd.isna(labels.iloc[3])
    assert unmatched == 1
    scores = evaluate_entities(records, by_prov).set_index("measure")
    # 3 scored records, one true entity of 3 -> 3 true pairs; predicted pairs among them: (r1, r2)
    assert scores.loc["pairwise", "precision"] == 1.0
    assert scores.loc["pairwise", "recall"] == pytest.approx(1 / 3)
    assert scores.loc["pairwise", "records_without_truth"] == 1
    by_id = pd.DataFrame({"record_id": ["r1", "r2", "r3", "r4"], "person_id": ["P1", "P1", "P2", "P3"]})
    assert evaluate_entities(records, by_id).set_index("measure").loc["bcubed", "f1"] == 1.0


def test_truth_naming_one_record_twice_is_refused():
    from linker.evaluate import truth_labels

    records = pd.DataFrame({"record_id": ["r1"]})
    with pytest.raises(ValueError, match="line 3"):
        truth_labels(records, pd.DataFrame({"record_id": ["r1", "r1"], "person_id": ["P1", "P2"]}))
