"""Tests for linker.blocking."""

import itertools
import warnings

import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from linker.blocking import (BlockRule, OversizedBlockWarning, block, pair_completeness, reduction_ratio,
                             rule_mask)


def _pairs_set(pairs):
    return set(zip(pairs["left"].tolist(), pairs["right"].tolist()))


def _near(a: str, b: str) -> bool:
    """Brute-force reference: equal, or one substitution, or one adjacent transposition."""
    if len(a) != len(b):
        return False
    diff = [k for k in range(len(a)) if a[k] != b[k]]
    if len(diff) <= 1:
        return True
    return len(diff) == 2 and diff[1] == diff[0] + 1 and a[diff[0]] == b[diff[1]] and a[diff[1]] == b[diff[0]]


def test_near_id_finds_one_substitution_and_one_transposition_only():
    """near_id pairs one-substitution and adjacent-swap ids, not two-edit or other-length ids."""
    recs = pd.DataFrame({"reg_no": [
        "12345678",  # 0 base
        "12345679",  # 1 one substitution of 0
        "12354678",  # 2 adjacent transposition of 0
        "21345687",  # 3 two transpositions of 0
        "12345699",  # 4 two substitutions of 0 (one of 1)
        "1234567",   # 5 one digit dropped: other length
        "",          # 6 missing
    ]})
    pairs, report = block(recs, [BlockRule("near", "near_id", ("reg_no",))])
    got = _pairs_set(pairs)
    assert (0, 1) in got and (0, 2) in got
    assert (1, 4) in got  # 12345679 / 12345699: one substitution
    assert (0, 3) not in got and (0, 4) not in got and (0, 5) not in got
    assert not any(6 in p for p in got)
    ids = recs["reg_no"].tolist()
    expected = {(i, j) for i, j in itertools.combinations(range(len(ids)), 2)
                if ids[i] and ids[j] and _near(ids[i], ids[j])}
    assert got == expected
    assert report.loc[report["rule"] == "near", "pairs"].item() == len(expected)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.text(alphabet="0123", min_size=0, max_size=4), min_size=0, max_size=30))
def test_near_id_equals_brute_force(ids):
    """The variant-key join gives exactly the brute-force near pairs (hypothesis)."""
    recs = pd.DataFrame({"reg_no": pd.Series(ids, dtype=object)})
    pairs, _ = block(recs, [BlockRule("near", "near_id", ("reg_no",), cap=None)])
    expected = {(i, j) for i, j in itertools.combinations(range(len(ids)), 2)
                if ids[i] and ids[j] and _near(ids[i], ids[j])}
    assert _pairs_set(pairs) == expected


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(["", "A", "B", "C"]), st.sampled_from([None, 1990, 1991])),
                min_size=0, max_size=40))
def test_exact_rule_equals_brute_force(rows):
    """A two-column exact rule pairs exactly the records agreeing on both non-missing values."""
    recs = pd.DataFrame({"fam": [r[0] for r in rows], "year": pd.array([r[1] for r in rows], dtype="Int64")})
    pairs, _ = block(recs, [BlockRule("fy", "exact", ("fam", "year"), cap=None)])
    expected = {(i, j) for i, j in itertools.combinations(range(len(rows)), 2)
                if rows[i][0] and rows[i][1] is not None and rows[i] == rows[j]}
    assert _pairs_set(pairs) == expected


def test_capped_block_is_reported_not_expanded():
    """A block over the cap yields no pairs and is reported with rule, key and size (and warned)."""
    recs = pd.DataFrame({"fam": ["SMITH"] * 5 + ["RARE", "RARE"]})
    rule = BlockRule("fam", "exact", ("fam",), cap=4)
    with pytest.warns(OversizedBlockWarning, match="'fam': 1 block"):
        pairs, report, capped = block(recs, [rule], return_capped=True)
    assert _pairs_set(pairs) == {(5, 6)}
    assert capped.to_dict("records") == [{"rule": "fam", "key": "SMITH", "size": 5}]
    row = report.set_index("rule").loc["fam"]
    assert row["capped_blocks"] == 1 and row["capped_records"] == 5 and row["pairs"] == 1


def test_capped_warning_names_no_values():
    """The oversized-block warning names the rule and size, never the key value (personal data)."""
    recs = pd.DataFrame({"fam": ["SMITH"] * 3})
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        block(recs, [BlockRule("fam", "exact", ("fam",), cap=2)])
    assert caught and all("SMITH" not in str(w.message) for w in caught)


def test_sorted_window_pairs_neighbours():
    """sorted_window pairs each record with the window-1 records after it in key order."""
    recs = pd.DataFrame({"key": ["D", "A", "C", "B", ""]})
    pairs, _ = block(recs, [BlockRule("w", "sorted_window", ("key",), window=2)])
    # order A(1) B(3) C(2) D(0); missing key left out
    assert _pairs_set(pairs) == {(1, 3), (2, 3), (0, 2)}


def test_union_bitmask_and_order():
    """Pairs are unique, left < right, sorted, and the bitmask says which rules produced them."""
    recs = pd.DataFrame({"a": ["X", "X", "Y", "Y"], "b": ["P", "Q", "Q", "Q"]})
    rules = [BlockRule("a", "exact", ("a",)), BlockRule("b", "exact", ("b",))]
    pairs, report = block(recs, rules)
    assert list(zip(pairs.left, pairs.right)) == [(0, 1), (1, 2), (1, 3), (2, 3)]
    assert (pairs.left < pairs.right).all()
    assert rule_mask(pairs, rules, "a").tolist() == [True, False, False, True]
    assert rule_mask(pairs, rules, "b").tolist() == [False, True, True, True]
    assert report["pairs"].tolist() == [2, 3, 4]
    assert report["new_pairs"].tolist() == [2, 2, 4]


def test_reduction_ratio_and_pair_completeness():
    """Reduction ratio and pair completeness by hand on a tiny case (common practice definitions)."""
    assert reduction_ratio(9, 10) == pytest.approx(1 - 9 / 45)
    recs = pd.DataFrame({"a": ["X", "X", "Y", "Z", "Z"]})
    truth = [1, 1, 2, 2, 3]  # true pairs (0,1) and (2,3)
    rules = [BlockRule("a", "exact", ("a",))]
    pairs, _ = block(recs, rules)  # (0,1), (3,4)
    assert pair_completeness(pairs, truth) == pytest.approx(0.5)
    table = pair_completeness(pairs, truth, rules)
    assert table["pair_completeness"].tolist() == [0.5, 0.5]
    assert table["reduction_ratio"].iloc[0] == pytest.approx(1 - 2 / 10)


def test_block_is_deterministic_and_index_free():
    """Same records in a frame with another index give the same pairs."""
    recs = pd.DataFrame({"a": ["X", "Y", "X", "Y", "X"], "id": ["1", "2", "3", "2", "1"]})
    rules = [BlockRule("a", "exact", ("a",)), BlockRule("id", "near_id", ("id",))]
    p1, r1 = block(recs, rules)
    p2, r2 = block(recs.set_index(pd.Index([10, 3, 7, 1, 0])), rules)
    pd.testing.assert_frame_equal(p1, p2)
    pd.testing.assert_frame_equal(r1, r2)


def test_bad_rules_are_rejected_with_their_name():
    """Rule errors name the rule; unknown columns are named."""
    with pytest.raises(ValueError, match="'w'.*window"):
        BlockRule("w", "sorted_window", ("k",))
    with pytest.raises(ValueError, match="kind"):
        BlockRule("x", "fuzzy", ("k",))
    with pytest.raises(ValueError, match=r"\['nope'\]"):
        block(pd.DataFrame({"a": ["1"]}), [BlockRule("n", "exact", ("nope",))])
