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


# --- constrained clustering: minimum cuts (constructed graphs) -------------------------------------

from linker.cluster import constrained_entities  # noqa: E402


def _groups(labels):
    out = {}
    for pos, lab in enumerate(labels):
        out.setdefault(int(lab), []).append(pos)
    return sorted(out.values())


def test_identifier_conflict_is_split_at_the_weakest_link():
    """Two strongly linked triangles joined by one weak link; the triangles hold numbers 5 edits apart.

    The minimum cut between the two numbers' records is the weak bridge (2-3): it goes, the
    triangles stay whole, and no record is lost."""
    left = [0, 1, 0, 3, 4, 3, 2]
    right = [1, 2, 2, 4, 5, 5, 3]
    weight = [15, 14, 13, 15, 14, 13, 4]
    ids = ["11111118", "", "", "99999990", "", ""]
    labels = constrained_entities(6, left, right, weight, ids)
    assert labels.size == 6
    assert _groups(labels) == [[0, 1, 2], [3, 4, 5]]


def test_cut_takes_the_cheapest_set_of_links_not_the_single_weakest():
    """Records 0 (id A) and 3 (id B) joined by paths 0-1-3 (weights 9, 5) and 0-2-3 (weights 2, 9).
    The single weakest link (0-2) alone does not separate them; the minimum cut is {0-2, 1-3}
    (capacities are likelihood ratios 2**weight: 2**5 + 2**2 against 2**9 + 2**2 or 2**5 + 2**9)."""
    left = [0, 1, 0, 2]
    right = [1, 3, 2, 3]
    weight = [9.0, 5.0, 2.0, 9.0]
    ids = ["AAAA1111", "", "", "BBBB2222"]
    labels = constrained_entities(4, left, right, weight, ids)
    # 0 keeps 1, 3 keeps 2
    assert _groups(labels) == [[0, 1], [2, 3]]


def test_a_record_torn_between_both_sides_stands_alone():
    """Record 1 (a name and nothing else) links as strongly to id A's record as to id B's:
    the split cannot tell where it belongs, so it becomes its own entity (its links go to review)."""
    left, right, weight = [0, 1, 2], [1, 2, 3], [8.0, 8.0, 12.0]
    ids = ["AAAA1111", "", "BBBB2222", ""]
    assert _groups(constrained_entities(4, left, right, weight, ids)) == [[0], [1], [2, 3]]
    # a clearly stronger side keeps it
    assert _groups(constrained_entities(4, left, right, [11.0, 8.0, 12.0], ids)) == [[0, 1], [2, 3]]


def test_numbers_one_edit_apart_are_no_conflict():
    labels = constrained_entities(3, [0, 1], [1, 2], [5.0, 5.0], ["12345678", "12345687", "12345677"])
    assert _groups(labels) == [[0, 1, 2]]


def test_overwhelming_links_may_join_distant_numbers():
    left, right, weight = [0, 1], [1, 2], [25.0, 21.0]
    ids = ["11111118", "", "99999990"]
    assert _groups(constrained_entities(3, left, right, weight, ids, overwhelming=20.0)) == [[0, 1, 2]]
    # below the threshold the weaker link goes
    assert _groups(constrained_entities(3, left, right, weight, ids, overwhelming=30.0)) == [[0, 1], [2]]


def test_reviewer_cannot_link_splits_and_must_link_joins():
    left, right, weight = [0, 1, 2], [1, 2, 3], [10.0, 3.0, 10.0]
    ids = [""] * 5
    # cannot-link between 0 and 3: the weak middle link goes
    assert _groups(constrained_entities(5, left, right, weight, ids, cannot=[(0, 3)])) == [[0, 1], [2, 3], [4]]
    # a must-link joins 4 to 3 although no link proposes it
    assert _groups(constrained_entities(5, left, right, weight, ids, must=[(3, 4)])) == [[0, 1, 2, 3, 4]]
    # a reviewer cannot-link beats even an overwhelming link
    assert _groups(constrained_entities(2, [0], [1], [50.0], ["", ""], overwhelming=20.0,
                                        cannot=[(0, 1)])) == [[0], [1]]


def test_cannot_link_that_must_links_contradict_is_reported_not_forced():
    report = []
    labels = constrained_entities(3, [0], [1], [9.0], ["", "", ""], cannot=[(0, 2)], must=[(1, 2)],
                                  report=report)
    # 0-1 is an ordinary link: the cut removes it, so the cannot-link holds
    assert _groups(labels) == [[0], [1, 2]] and report == []
    report = []
    labels = constrained_entities(3, [], [], [], ["", "", ""], cannot=[(0, 2)], must=[(0, 1), (1, 2)],
                                  report=report)
    assert _groups(labels) == [[0, 1, 2]] and report == [(0, 2)]


def test_split_is_deterministic_and_keeps_unconflicted_components_whole():
    left = [0, 1, 2, 5, 6]
    right = [1, 2, 3, 6, 7]
    weight = [9.0, 2.0, 9.0, 4.0, 4.0]
    ids = ["11111118", "", "", "99999990", "", "22222226", "", "22222226"]
    first = constrained_entities(8, left, right, weight, ids)
    for _ in range(3):
        assert (constrained_entities(8, left, right, weight, ids) == first).all()
    assert _groups(first) == [[0, 1], [2, 3], [4], [5, 6, 7]]


def test_must_link_over_a_proposed_link_holds_against_an_identifier_conflict():
    """A reviewer's 'same person' on a pair the model also linked makes that link uncuttable,
    even though the two records show registration numbers far apart."""
    left, right, weight = [0, 1], [1, 2], [3.0, 12.0]
    ids = ["11111118", "99999990", ""]
    assert _groups(constrained_entities(3, left, right, weight, ids)) == [[0], [1, 2]]
    assert _groups(constrained_entities(3, left, right, weight, ids, must=[(0, 1)])) == [[0, 1, 2]]
