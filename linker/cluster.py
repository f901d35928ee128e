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

__all__ = ["connected_entities", "constrained_entities", "relabel_by_first"]


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


def _within_one_edit(a: str, b: str) -> bool:
    from rapidfuzz.distance import OSA
    return OSA.distance(a, b) <= 1


def _conflicts(ids: list[str]) -> bool:
    """Do any two of these identifiers lie more than one edit apart?"""
    return any(not _within_one_edit(a, b) for k, a in enumerate(ids) for b in ids[k + 1:])


def constrained_entities(n_records: int, left, right, weight, ids, overwhelming: float = np.inf) -> np.ndarray:
    """Entities from links that never join identifiers more than one edit apart without overwhelming evidence.

    ``ids`` (length ``n_records``) holds each record's trusted identifier
    ("" when it has none, or it failed validation, or its row shows it for
    two persons).  Components of the link graph whose trusted identifiers
    all lie within one edit of each other are kept as they are (the common
    case, found with one connected-components pass).  A component holding
    identifiers further apart is rebuilt greedily: its links are taken in
    order of falling ``weight`` and a link joins two groups only if every
    identifier of one is within one edit of every identifier of the other,
    or its weight is at least ``overwhelming``.  Labels as in
    :func:`connected_entities`.
    """
    left = np.asarray(left, dtype=np.int64)
    right = np.asarray(right, dtype=np.int64)
    weight = np.asarray(weight, dtype=np.float64)
    ids = np.asarray(ids, dtype=object)
    labels = connected_entities(n_records, left, right)
    if left.size == 0:
        return labels
    has = ids != ""
    frame = {"label": labels[has], "id": ids[has]}
    import pandas as pd
    distinct = pd.DataFrame(frame).drop_duplicates()
    multi = distinct["label"].value_counts()
    suspect = multi.index[multi.to_numpy() > 1].to_numpy()
    if suspect.size == 0:
        return labels
    by_label = distinct[distinct["label"].isin(suspect)].groupby("label")["id"].agg(sorted)
    bad = [lab for lab, vals in by_label.items() if _conflicts(vals)]
    if not bad:
        return labels
    out = labels.copy()
    next_label = int(labels.max()) + 1
    link_label = labels[left]
    for lab in sorted(bad):
        members = np.flatnonzero(labels == lab)
        parent = {int(m): int(m) for m in members}
        group_ids = {int(m): ({ids[m]} if ids[m] else set()) for m in members}

        def find(x):
            while parent[x] != x:
                parent[x] = parent[parent[x]]
                x = parent[x]
            return x

        sel = np.flatnonzero(link_label == lab)
        order = sel[np.lexsort((right[sel], left[sel], -weight[sel]))]
        for k in order:
            a, b = find(int(left[k])), find(int(right[k]))
            if a == b:
                continue
            if weight[k] < overwhelming and any(not _within_one_edit(x, y)
                                                for x in group_ids[a] for y in group_ids[b]):
                continue
            parent[b] = a
            group_ids[a] |= group_ids.pop(b)
        roots = np.array([find(int(m)) for m in members])
        _, sub = np.unique(roots, return_inverse=True)
        # keep the first group on the old label, give the others new labels
        first_sub = sub[0]
        for s_ in np.unique(sub):
            if s_ == first_sub:
                continue
            out[members[sub == s_]] = next_label
            next_label += 1
    return relabel_by_first(out)
