"""Sanity of the analyst baseline (benchmarks/reference_pipeline.py) on the demo delivery."""

from __future__ import annotations

import numpy as np

from benchmarks.reference_pipeline import DEMO_CONFIG, reference_labels, truth_labels
from linker import load_config, run_pipeline
from linker.evaluate import pairwise_metrics


def test_reference_baseline_runs_on_demo():
    """The baseline gives one integer label per demo record, scored against the truth (F1 printed)."""
    records = run_pipeline(load_config(str(DEMO_CONFIG))).records
    labels = reference_labels(records, seed=0)
    truth = truth_labels(records)
    assert isinstance(labels, np.ndarray) and np.issubdtype(labels.dtype, np.integer)
    assert labels.shape == (len(records),) and truth.shape == (len(records),)
    # it links something and does not lump everything together
    assert 1 < np.unique(labels).size < len(records)
    pw = pairwise_metrics(labels, truth)
    print(f"reference baseline on the demo: pairwise P {pw['precision']:.4f} R {pw['recall']:.4f} "
          f"F1 {pw['f1']:.4f}")
    assert 0.0 < pw["f1"] < 1.0
