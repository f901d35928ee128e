"""Entities from links.

An entity starts as a connected component of the link graph.  Components that
break a constraint — valid registration numbers more than one edit apart, a
reviewer's cannot-link — are split by minimum cuts over the link weights
(:func:`constrained_entities`); reviewer must-links join records outright.
Labels are deterministic: entity 0 holds record 0, and entities are numbered
in the order of their smallest record position.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pandas as pd
from rapidfuzz.distance import OSA
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
    return OSA.distance(a, b) <= 1


_FIRM = 2.0 ** 80    # capacity added to overwhelming links: cut only for a reviewer's cannot-link


def _capacity(weight: float) -> float:
    """Capacity of a link in the cut: its likelihood ratio 2**weight (weights are log2), capped.

    On the ratio scale the strongest link of a record dominates the sum of its weaker
    ones, so a record with few details follows its best evidence, not the larger group.
    """
    return 2.0 ** min(max(float(weight), -30.0), 60.0)


def _id_conflict(ids: pd.Series, skip=frozenset()) -> tuple[str, str] | None:
    """The first pair of identifiers (most records first, then by value) more than one edit apart.

    Pairs in ``skip`` (conflicts already waived) are passed over.
    """
    counts = ids.value_counts()
    order = sorted(counts.index, key=lambda v: (-counts[v], v))
    for k, a in enumerate(order):
        for b in order[k + 1:]:
            if (a, b) not in skip and not _within_one_edit(a, b):
                return a, b
    return None


def _split_component(members: np.ndarray, edges: pd.DataFrame, ids: np.ndarray,
                     cannot: list[tuple[int, int]], must: list[tuple[int, int]],
                     overwhelming: float) -> tuple[list[np.ndarray], list[tuple[int, int]]]:
    """Split one component by minimum cuts until no constraint is broken.

    Links carry their weight as capacity (overwhelming links get :data:`_FIRM`
    more; must-links are uncuttable).  Each broken constraint is resolved by a
    minimum cut between the two sides: for identifiers, all records holding
    one identifier against all records holding the other.  A constraint whose
    cut would have to go through overwhelming links (identifiers) or must-links
    (reviewer decisions) stays broken and is returned.
    """
    graph = nx.Graph()
    graph.add_nodes_from(int(m) for m in members)
    for a, b, w in edges[["left", "right", "weight"]].itertuples(index=False):
        cap = _capacity(w) + (_FIRM if w >= overwhelming else 0.0)
        graph.add_edge(int(a), int(b), capacity=cap)
    for a, b in must:
        graph.add_edge(int(a), int(b))
        graph[int(a)][int(b)].pop("capacity", None)    # no capacity: cannot be cut
    waived: set = set()                                # reviewer pairs that cannot be cut
    waived_ids: set = set()                            # identifier pairs held by overwhelming links
    unresolved: list[tuple[int, int]] = []
    while True:
        task = None
        for part in sorted((sorted(c) for c in nx.connected_components(graph)), key=lambda c: c[0]):
            part_set = set(part)
            for a, b in cannot:
                if a in part_set and b in part_set and (a, b) not in waived:
                    task = ("r", [a], [b], np.inf)
                    break
            if task:
                break
            held = pd.DataFrame({"node": part, "id": ids[part]})
            held = held[held["id"] != ""]
            pair = _id_conflict(held["id"], waived_ids) if held["id"].nunique() > 1 else None
            if pair is not None:
                task = ("i", held.loc[held["id"] == pair[0], "node"].tolist(),
                        held.loc[held["id"] == pair[1], "node"].tolist(), _FIRM)
                break
        if task is None:
            break
        kind, side_a, side_b, limit = task
        flow = graph.copy()
        for x in side_a:
            flow.add_edge("source", x)
        for y in side_b:
            flow.add_edge(y, "sink")
        try:
            value, (reach, _) = nx.minimum_cut(flow, "source", "sink")
        except nx.NetworkXUnbounded:
            value, reach = np.inf, None
        if value >= limit:                             # only firm or uncuttable links hold them together
            if kind == "r":
                waived.add((side_a[0], side_b[0]))
                unresolved.append((side_a[0], side_b[0]))
            else:
                waived_ids.add((ids[side_a[0]], ids[side_b[0]]))
            continue
        cut = [(u, v) for u, v in graph.edges() if (u in reach) != (v in reach)]
        graph.remove_edges_from(cut)
    parts = [np.array(sorted(c), dtype=np.int64) for c in nx.connected_components(graph)]
    undecided = _undecided(parts, edges, ids, must)
    if undecided:                      # their links are cut too; what they bridged falls apart
        graph.remove_edges_from(list(graph.edges(undecided)))
        parts = [np.array(sorted(c), dtype=np.int64) for c in nx.connected_components(graph)]
    return sorted(parts, key=lambda c: int(c[0])), unresolved


def _undecided(parts: list[np.ndarray], edges: pd.DataFrame, ids: np.ndarray,
               must: list[tuple[int, int]], margin: float = 1.0) -> list[int]:
    """Records without an identifier whose best link into another part is about as strong
    (within ``margin``, log2) as their best link into their own part: they become entities
    of their own.

    Such a record (say a name and nothing else) could belong to either side of the
    split; guessing would be a wrong link half of the time, so its links go to review.
    """
    if len(parts) < 2 or edges.empty:
        return []
    part_of = {int(x): k for k, p in enumerate(parts) for x in p}
    e = edges[["left", "right", "weight"]]
    both = pd.concat([e.rename(columns={"left": "rec", "right": "other"}),
                      e.rename(columns={"right": "rec", "left": "other"})], ignore_index=True)
    both = both[both["rec"].map(ids.__getitem__) == ""]
    if both.empty:
        return []
    both["same"] = both["rec"].map(part_of) == both["other"].map(part_of)
    best = both.groupby(["rec", "same"])["weight"].max().unstack()
    if True not in best.columns or False not in best.columns:
        return []
    pinned = {int(x) for pair in must for x in pair}
    undecided = best.index[(best[False] >= best[True] - margin)].astype(int)
    return sorted(set(undecided.tolist()) - pinned)


def constrained_entities(n_records: int, left, right, weight, ids, overwhelming: float = np.inf,
                         cannot=None, must=None, report: list | None = None) -> np.ndarray:
    """Entities from links under constraints; components that break one are split by minimum cuts.

    ``ids`` (length ``n_records``) holds each record's trusted identifier
    ("" when it has none, or it failed validation, or its row shows it for two
    persons): two records whose identifiers lie more than one edit apart may
    not share an entity unless links of weight >= ``overwhelming`` hold them
    together.  ``cannot`` and ``must`` are record-position pairs from reviewer
    decisions: a cannot-link always splits (unless must-links join the pair,
    which is then reported), a must-link always joins.  A component breaking a
    constraint is split by removing its weakest links — a minimum cut between
    the conflicting records, weights as capacities — never by dropping
    records.  Components without conflicts stay as one connected-components
    pass found them.  Reviewer cannot-links that could not be honoured are
    appended to ``report``.  Labels as in :func:`connected_entities`.
    """
    left = np.asarray(left, dtype=np.int64)
    right = np.asarray(right, dtype=np.int64)
    weight = np.asarray(weight, dtype=np.float64)
    ids = np.asarray(ids, dtype=object)
    cannot = [] if cannot is None else [tuple(map(int, p)) for p in cannot]
    must = [] if must is None else [tuple(map(int, p)) for p in must]
    must_l = np.array([a for a, _ in must], dtype=np.int64)
    must_r = np.array([b for _, b in must], dtype=np.int64)
    labels = connected_entities(n_records, np.concatenate([left, must_l]), np.concatenate([right, must_r]))
    if n_records == 0:
        return labels
    has = ids != ""
    distinct = pd.DataFrame({"label": labels[has], "id": ids[has]}).drop_duplicates()
    multi = distinct["label"].value_counts()
    suspect = set(multi.index[multi.to_numpy() > 1].tolist())
    bad = {lab for lab, vals in distinct[distinct["label"].isin(suspect)].groupby("label")["id"]
           if _id_conflict(vals) is not None}
    bad |= {int(labels[a]) for a, b in cannot if labels[a] == labels[b]}
    if not bad:
        return labels
    out = labels.copy()
    next_label = int(labels.max()) + 1
    edges = pd.DataFrame({"left": left, "right": right, "weight": weight, "label": labels[left]})
    for lab in sorted(bad):
        members = np.flatnonzero(labels == lab)
        member_set = set(members.tolist())
        parts, unresolved = _split_component(
            members, edges[edges["label"] == lab], ids,
            [p for p in cannot if p[0] in member_set and p[1] in member_set],
            [p for p in must if p[0] in member_set], overwhelming)
        if report is not None:
            report.extend(unresolved)
        for part in parts[1:]:                         # the first part keeps the old label
            out[part] = next_label
            next_label += 1
    return relabel_by_first(out)
