"""Entities from links.

For now an entity is a connected component of the link graph.  Labels are
deterministic: entity 0 holds record 0, and entities are numbered in the
order of their smallest record position.  (Constraints that split components
come later; :func:`connected_entities` keeps its signature.)
"""

from __future__ import annotations

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

__all__ = ["connected_entities", "relabel_by_first"]


def relabel_by_first(labels) -> np.ndarray:
    """Renumber labels 0.. in the order of each label's first (smallest) position."""
    labels = np.asarray(labels)
    if labels.size == 0:
        return np.zeros(0, dtype=np.int64)
    uniq, first, inverse = np.unique(labels, return_index=True, return_inverse=True)
    rank = np.empty(uniq.size, dtype=np.int64)
    rank[np.argsort(first, kind="stable")] = np.arange(uniq.size)
    return rank[np.asarray(inverse).ravel()]


def connected_entities(n_records: int, left, right) -> np.ndarray:
    """Entity label per record (int64, length ``n_records``): connected components of the links.

    ``left``/``right`` are record positions of linked pairs; records in no link
    are entities of their own.
    """
    left = np.asarray(left, dtype=np.int64)
    right = np.asarray(right, dtype=np.int64)
    if left.shape != right.shape:
        raise ValueError(f"connected_entities: left and right differ in length ({left.size} vs {right.size})")
    if left.size and (min(left.min(), right.min()) < 0 or max(left.max(), right.max()) >= n_records):
        raise ValueError(f"connected_entities: link positions must lie in 0..{n_records - 1}")
    if n_records == 0:
        return np.zeros(0, dtype=np.int64)
    graph = coo_matrix((np.ones(left.size, dtype=np.int8), (left, right)), shape=(n_records, n_records)).tocsr()
    _, labels = connected_components(graph, directed=False)
    return relabel_by_first(labels)
