"""FEBRL 1-4: the unsupervised pipeline against the reference ECM classifier.

Data: recordlinkage.datasets.load_febrl1..4 (Christen's Febrl generator; REFERENCES.md §9).
Pipeline: block -> compare -> fit -> score -> threshold (probability 0.5) -> connected components.
Reference: recordlinkage.Compare exact comparisons on the same fields and candidate pairs,
recordlinkage.ECMClassifier links, connected components.
"""

import warnings

import pytest

from linker.blocking import block, pair_completeness
from linker.cluster import connected_entities
from linker.compare import compare
from linker.evaluate import pairwise_metrics
from linker.model import FellegiSunter

import _febrl


def _reference_f1(rec, pairs):
    import recordlinkage

    X = _febrl.reference_binary(rec, pairs)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        links = recordlinkage.ECMClassifier(binarize=None).fit_predict(X)
    labels = connected_entities(len(rec), links.get_level_values(0), links.get_level_values(1))
    return pairwise_metrics(labels, rec["truth"])["f1"]


@pytest.mark.parametrize("name", ["febrl1", "febrl2", "febrl3", "febrl4"])
def test_febrl_pairwise_f1(name):
    """Pairwise F1 >= 0.995 and >= the reference ECM's F1 on the same candidate pairs."""
    rec = _febrl.febrl_records(name)
    pairs, _ = block(rec, _febrl.RULES)
    completeness = pair_completeness(pairs, rec["truth"])
    levels = compare(rec, pairs, _febrl.FIELDS)
    model = FellegiSunter(_febrl.FIELDS, seed=0).fit(rec, pairs, levels)
    prob = model.match_probability(rec, pairs, levels)
    link = prob >= 0.5
    labels = connected_entities(len(rec), pairs["left"][link], pairs["right"][link])
    ours = pairwise_metrics(labels, rec["truth"])
    ref = _reference_f1(rec, pairs)
    print(f"{name}: records {len(rec)}, candidate pairs {len(pairs)}, pair completeness {completeness:.4f}, "
          f"EM iterations {model.n_iter_}; pairwise F1 ours {ours['f1']:.4f} "
          f"(P {ours['precision']:.4f}, R {ours['recall']:.4f}), reference ECM {ref:.4f}")
    assert model.converged_
    assert ours["f1"] >= 0.995
    assert ours["f1"] >= ref
