"""Tests for linker.cluster."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from linker.cluster import connected_entities


def test_components_and_singletons():
    """Linked records share a label, unlinked records are alone, labels follow smallest record index."""
    labels = connected_entities(7, [5, 1, 3], [6, 3, 4])
    assert labels.tolist() == [0, 1, 2, 1, 1, 3, 3]
    assert labels.dtype == np.int64


def test_no_links_and_no_records():
    """Without links every record is its own entity; zero records give an empty array."""
    assert connected_entities(3, [], []).tolist() == [0, 1, 2]
    assert connected_entities(0, [], []).tolist() == []


@settings(max_examples=50, deadline=None)
@given(st.integers(1, 30).flatmap(lambda n: st.tuples(st.just(n), st.lists(
    st.tuples(st.integers(0, n - 1), st.integers(0, n - 1)), max_size=40))))
def test_labels_do_not_depend_on_link_order(case):
    """Shuffled and flipped links give the same labels; first appearances are 0, 1, 2, ... (hypothesis)."""
    n, links = case
    left = [a for a, _ in links]
    right = [b for _, b in links]
    base = connected_entities(n, left, right)
    rng = np.random.default_rng(0)
    order = rng.permutation(len(links))
    again = connected_entities(n, np.array(right, dtype=np.int64)[order] if links else [],
                               np.array(left, dtype=np.int64)[order] if links else [])
    np.testing.assert_array_equal(base, again)
    _, first = np.unique(base, return_index=True)
    assert np.all(np.diff(first) > 0) and base[0] == 0
    for a, b in links:
        assert base[a] == base[b]


def test_out_of_range_link_is_an_error():
    """A link position outside the records is reported, not ignored."""
    with pytest.raises(ValueError, match="0..2"):
        connected_entities(3, [0], [3])
