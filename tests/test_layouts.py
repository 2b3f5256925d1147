"""Trial layouts: randomization, plot numbering in the field, alpha designs, the trial file written
and the ``trialdesk layout`` command.

The outside references: the definitions of the designs (Cochran & Cox 1957, Experimental Designs,
2nd ed.; Patterson & Williams 1976, Biometrika 63:83-92, for alpha designs), the efficiency factor
as the harmonic mean of the canonical efficiency factors and as the ratio of average variances
(John & Williams 1995, Cyclic and Computer Generated Designs, 2nd ed.), the lattice efficiency
factors (Cochran & Cox 1957, from memory), and, for the upper bound of Patterson & Williams (1976),
an exhaustive enumeration of every resolvable design of a few small sizes. Formulas quoted from
memory say so. Eigenvalues are compared with ``rtol=1e-9``: they come from LAPACK on matrices of
small whole numbers, where rounding error stays near 1e-13.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import openpyxl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from trialdesk.core import layouts
from trialdesk.core.cli import main
from trialdesk.core.errors import TrialInputError
from trialdesk.core.exporter import export_fieldbook
from trialdesk.core.layouts import (
    LayoutSettingError,
    alpha_array,
    alpha_blocks,
    canonical_efficiency_factors,
    efficiency_factor,
    efficiency_upper_bound,
    make_layout,
    numbered_entries,
    read_entry_list,
    write_layout,
)
from trialdesk.core.trialfile import TrialFile
from trialdesk.desktop.launcher import _is_batch

RTOL = 1e-9  # eigenvalues of small whole-number matrices: rounding error near 1e-13


def codes(n: int) -> list[str]:
    return [f"V{i:02d}" for i in range(1, n + 1)]


def plots_of(layout, rep):
    return [p for p in layout.plots if p.rep == rep]


def blocks_of(layout):
    """The layout's incomplete blocks as lists of entry codes."""
    found: dict = {}
    for p in layout.plots:
        found.setdefault((p.rep, p.incomplete_block), []).append(p.entry)
    return list(found.values())


def pair_counts(blocks, entries):
    """How often each pair of entries shares a block, counted directly from the blocks."""
    counts = dict.fromkeys(itertools.combinations(sorted(entries), 2), 0)
    for block in blocks:
        for pair in itertools.combinations(sorted(block), 2):
            counts[pair] += 1
    return counts


def information_factors(blocks, t):
    """Canonical efficiency factors computed here: eigenvalues of C / r with
    C = r I - N N' / k (John & Williams 1995, from memory), the mean's zero left out."""
    k = len(blocks[0])
    r = len(blocks) * k // t
    n = np.zeros((t, len(blocks)))
    for b, block in enumerate(blocks):
        n[block, b] = 1
    return np.linalg.eigvalsh((r * np.eye(t) - n @ n.T / k) / r)[1:], n, r


# -- the designs ----------------------------------------------------------------------------------


def test_rcbd_every_entry_once_in_each_replicate():
    # A randomized complete block design: each replicate holds every entry once (Cochran & Cox
    # 1957, from memory).
    layout = make_layout(codes(12), checks=["CHK-A", "CHK-B"], design="rcbd", reps=4, seed=5)
    assert layout.entries[-2:] == ("CHK-A", "CHK-B")
    for rep in range(1, 5):
        assert sorted(p.entry for p in plots_of(layout, rep)) == sorted(layout.entries)
    labels = [p.plot for p in layout.plots]
    assert len(set(labels)) == len(labels) == 14 * 4
    assert {p.entry for p in layout.plots if p.is_check} == {"CHK-A", "CHK-B"}
    assert all(p.row is None and p.column is None for p in layout.plots)
    assert layout.efficiency is None and layout.concurrence.maximum == 4


def test_crd_every_entry_reps_times_without_blocks():
    # A completely randomized design: each entry on r plots, no blocks (Cochran & Cox 1957).
    layout = make_layout(codes(7), design="crd", reps=3, seed=11)
    frame = layout.to_frame()
    assert (frame["entry"].value_counts() == 3).all() and len(frame) == 21
    assert frame["rep"].isna().all() and layout.concurrence is None
    assert list(frame["plot"]) == [str(101 + i) for i in range(21)]


def test_checks_in_the_entry_list_are_not_added_twice():
    layout = make_layout(["A", "B", "C"], checks=["B", "D"], design="rcbd", reps=2, seed=1)
    assert layout.entries == ("A", "B", "C", "D") and layout.checks == ("B", "D")
    assert {p.entry for p in layout.plots if p.is_check} == {"B", "D"}


def test_alpha_resolvable_blocks_of_k():
    # An alpha design is resolvable: each replicate holds every entry once, in s blocks of k
    # plots (Patterson & Williams 1976, Biometrika 63:83-92).
    layout = make_layout(codes(29), checks=["CHK"], design="alpha", reps=3, block_size=5,
                         seed=99)
    for rep in range(1, 4):
        sown = plots_of(layout, rep)
        assert sorted(p.entry for p in sown) == sorted(layout.entries)
        sizes = {}
        for p in sown:
            sizes[p.incomplete_block] = sizes.get(p.incomplete_block, 0) + 1
        assert sizes == {b: 5 for b in range(1, 7)}
    # Plots of one incomplete block are neighbours in field order.
    keys = [(p.rep, p.incomplete_block) for p in layout.plots]
    assert keys == sorted(keys)


def test_alpha_blocks_develop_the_array_cyclically():
    # Block l of replicate j holds treatment i s + (alpha[i, j] + l) mod s for each row i
    # (Patterson & Williams 1976), written out by hand for s = 3, k = 2, r = 2.
    blocks = alpha_blocks(np.array([[0, 0], [0, 1]]), 3)
    assert blocks.tolist() == [[[0, 3], [1, 4], [2, 5]], [[0, 4], [1, 5], [2, 3]]]


# -- randomization --------------------------------------------------------------------------------


def test_same_seed_same_layout_other_seed_other_layout():
    for design, size in (("rcbd", None), ("crd", None), ("alpha", 4)):
        first = make_layout(codes(20), design=design, reps=3, block_size=size, seed=2026)
        again = make_layout(codes(20), design=design, reps=3, block_size=size, seed=2026)
        other = make_layout(codes(20), design=design, reps=3, block_size=size, seed=2027)
        assert first == again
        assert [p.entry for p in first.plots] != [p.entry for p in other.plots]


def test_pinned_layouts():
    # Exact layouts for fixed seeds: numpy.random.default_rng's permutation stream (PCG64). A
    # change in numpy's algorithms would show here, and the documentation would need a note.
    rcbd = make_layout(["A", "B", "C", "D"], checks=["CHK"], design="rcbd", reps=2, seed=42)
    assert [(p.plot, p.entry) for p in rcbd.plots] == [
        ("101", "CHK"), ("102", "C"), ("103", "D"), ("104", "B"), ("105", "A"),
        ("201", "D"), ("202", "A"), ("203", "B"), ("204", "C"), ("205", "CHK")]
    alpha = make_layout([f"E{i}" for i in range(1, 7)], design="alpha", reps=2, block_size=3,
                        seed=42)
    assert alpha.generating_array == ((0, 0), (0, 0), (0, 1))
    assert [(p.plot, p.incomplete_block, p.entry) for p in alpha.plots] == [
        ("101", 1, "E4"), ("102", 1, "E6"), ("103", 1, "E2"), ("104", 2, "E1"),
        ("105", 2, "E3"), ("106", 2, "E5"), ("201", 1, "E4"), ("202", 1, "E1"),
        ("203", 1, "E6"), ("204", 2, "E2"), ("205", 2, "E5"), ("206", 2, "E3")]
    crd = make_layout(["A", "B", "C"], design="crd", reps=2, seed=42, rows=2, columns=3,
                      serpentine=True)
    assert [(p.plot, p.row, p.column, p.entry) for p in crd.plots] == [
        ("101", 1, 1, "A"), ("102", 1, 2, "C"), ("103", 1, 3, "C"), ("104", 2, 3, "B"),
        ("105", 2, 2, "B"), ("106", 2, 1, "A")]


# -- the field ------------------------------------------------------------------------------------


def test_serpentine_plots_in_order_are_neighbours():
    # Serpentine numbering: consecutive plots share an edge in the field (common practice).
    layout = make_layout(codes(10), design="rcbd", reps=3, rows=5, columns=7, serpentine=True,
                         seed=3)
    for a, b in itertools.pairwise(layout.plots):
        assert abs(a.row - b.row) + abs(a.column - b.column) == 1
    assert [(p.row, p.column) for p in layout.plots[6:9]] == [(1, 7), (2, 7), (2, 6)]
    assert layout.plots[10].plot == "201"  # replicate 2 starts on the 11th plot of the field


def test_rows_run_left_to_right_without_serpentine():
    layout = make_layout(codes(6), design="rcbd", reps=2, rows=3, columns=4, seed=3)
    assert [(p.row, p.column) for p in layout.plots] == [
        (1, 1), (1, 2), (1, 3), (1, 4), (2, 1), (2, 2), (2, 3), (2, 4), (3, 1), (3, 2),
        (3, 3), (3, 4)]


def test_plot_numbers_per_replicate():
    small = make_layout(codes(99), design="rcbd", reps=2, seed=1)
    assert small.plots[0].plot == "101" and small.plots[98].plot == "199"
    assert small.plots[99].plot == "201"
    large = make_layout(codes(100), design="rcbd", reps=2, seed=1)
    assert large.plots[0].plot == "1001" and large.plots[99].plot == "1100"
    assert large.plots[100].plot == "2001"


# -- alpha designs: concurrences and efficiency ---------------------------------------------------


def test_pairs_share_at_most_one_block_when_s_is_prime():
    # With s prime, k <= s and r <= s, alpha[i, j] = i j mod s makes every difference
    # alpha[i, j] - alpha[i', j] = (i - i') j distinct over j, so no pair meets twice: an
    # alpha(0, 1) design (Patterson & Williams 1976).
    for t, k, r in ((15, 3, 3), (35, 5, 4), (49, 7, 3), (44, 4, 3), (143, 11, 2)):
        layout = make_layout(codes(t), design="alpha", reps=r, block_size=k, seed=t)
        counts = pair_counts(blocks_of(layout), layout.entries)
        assert max(counts.values()) == 1 == layout.concurrence.maximum
        assert dict(layout.concurrence.counts) == {
            n: sum(c == n for c in counts.values()) for n in (0, 1)}


def test_pairs_share_at_most_two_blocks_when_blocks_outnumber_s():
    # k > s: two rows of the array agree in the first two columns, so some pairs meet twice;
    # never three times (Patterson & Williams 1976: alpha(0, 1, 2)).
    layout = make_layout(codes(24), design="alpha", reps=3, block_size=6, seed=1)
    counts = pair_counts(blocks_of(layout), layout.entries)
    assert max(counts.values()) == 2 == layout.concurrence.maximum


def test_efficiency_factor_two_ways():
    # E is the harmonic mean of the canonical efficiency factors, and also the ratio of the
    # variance of a difference in complete blocks, 2 / r, to the average variance of a
    # difference of two entries, from a generalized inverse of C (John & Williams 1995, from
    # memory).
    for t, k, r in ((30, 5, 3), (24, 4, 2), (36, 6, 3), (24, 6, 3)):
        layout = make_layout(codes(t), design="alpha", reps=r, block_size=k, seed=8)
        number = {code: i for i, code in enumerate(layout.entries)}
        blocks = [[number[c] for c in block] for block in blocks_of(layout)]
        factors, n, r_ = information_factors(blocks, t)
        harmonic = (t - 1) / np.sum(1 / factors)
        omega = np.linalg.pinv(r_ * np.eye(t) - n @ n.T / k)
        variances = [omega[i, i] + omega[j, j] - 2 * omega[i, j]
                     for i, j in itertools.combinations(range(t), 2)]
        assert_allclose(layout.efficiency.factor, harmonic, rtol=RTOL)
        assert_allclose(layout.efficiency.factor, (2 / r) / np.mean(variances), rtol=RTOL)
        assert_allclose(canonical_efficiency_factors(blocks, t), factors, rtol=RTOL, atol=1e-12)
        assert_allclose(efficiency_factor(factors), harmonic, rtol=RTOL)


def partitions(items, k):
    """Every split of ``items`` into blocks of ``k``."""
    if not items:
        yield []
        return
    for rest in itertools.combinations(items[1:], k - 1):
        block = (items[0], *rest)
        for others in partitions([x for x in items if x not in block], k):
            yield [block, *others]


def best_resolvable(t, k, r):
    """The highest efficiency factor of every resolvable design (first replicate fixed, which
    loses nothing: any design can be relabelled so), computed by brute force."""
    parts = []
    for split in partitions(list(range(t)), k):
        n = np.zeros((t, t // k))
        for b, block in enumerate(split):
            n[list(block), b] = 1
        parts.append(n @ n.T)
    parts = np.stack(parts)
    combos = np.array(list(itertools.combinations_with_replacement(range(len(parts)), r - 1)))
    concurrence = parts[0] + parts[combos].sum(axis=1)
    factors = np.linalg.eigvalsh(np.eye(t) - concurrence / (r * k))[:, 1:]
    connected = (factors > 1e-9).all(axis=1)
    harmonic = (t - 1) / (1 / np.where(connected[:, None], factors, 1.0)).sum(axis=1)
    return float(np.where(connected, harmonic, 0.0).max())


@pytest.mark.parametrize(("t", "k", "r", "lattice"), [
    (4, 2, 2, True), (4, 2, 3, True), (6, 2, 3, False), (6, 3, 2, False), (6, 3, 3, False),
    (8, 2, 2, False), (8, 4, 3, False), (9, 3, 2, True), (9, 3, 3, True), (10, 5, 2, False),
    (12, 3, 2, False), (12, 4, 2, False),
])
def test_upper_bound_against_every_resolvable_design(t, k, r, lattice):
    # The bound (Patterson & Williams 1976, from memory) holds for every resolvable design of
    # these sizes, enumerated here one by one, and square lattices reach it; our alpha design is
    # one of those designs, so it can be no better than the best.
    best = best_resolvable(t, k, r)
    bound = efficiency_upper_bound(t, k, r)
    assert best <= bound * (1 + RTOL)
    if lattice:
        assert_allclose(best, bound, rtol=RTOL)
    try:
        ours = make_layout(codes(t), design="alpha", reps=r, block_size=k, seed=1)
    except LayoutSettingError:
        return
    assert ours.efficiency.factor <= best * (1 + RTOL)


def test_search_finds_the_best_generating_array():
    # 5^6 = 15625 arrays for t = 20, k = 4, r = 3: too many to try one by one in the program,
    # which searches by exchange instead; here every array is tried, with efficiency factors
    # from the full information matrix (John & Williams 1995, from memory).
    t, k, r = 20, 4, 3
    s = t // k
    cells = np.array(list(itertools.product(range(s), repeat=(k - 1) * (r - 1))))
    arrays = np.zeros((len(cells), k, r), dtype=int)
    arrays[:, 1:, 1:] = cells.reshape(-1, k - 1, r - 1)
    blocks = np.stack([alpha_blocks(a, s).reshape(r * s, k) for a in arrays])
    incidence = np.zeros((len(arrays), t, r * s))
    incidence[np.arange(len(arrays))[:, None, None], blocks,
              np.arange(r * s)[None, :, None]] = 1
    concurrence = incidence @ np.swapaxes(incidence, 1, 2)
    factors = np.linalg.eigvalsh(np.eye(t) - concurrence / (r * k))[:, 1:]
    upper = np.triu_indices(t, 1)
    most = concurrence[:, upper[0], upper[1]].max(axis=1)
    connected = (factors > 1e-9).all(axis=1)
    harmonic = np.where(connected, (t - 1) / (1 / np.where(factors > 1e-9, factors, 1)).sum(1),
                        0.0)
    best = harmonic[most == most.min()].max()
    layout = make_layout(codes(t), design="alpha", reps=r, block_size=k, seed=4)
    assert layout.concurrence.maximum == most.min() == 1
    assert_allclose(layout.efficiency.factor, best, rtol=RTOL)
    assert (alpha_array(t, k, r) == layout.generating_array).all()


@pytest.mark.parametrize("k", [2, 3, 5, 7])
def test_simple_lattice(k):
    # Simple lattice, t = k^2, r = 2: E = (k + 1) / (k + 3) (Cochran & Cox 1957, from
    # memory), the bound itself.
    layout = make_layout(codes(k * k), design="alpha", reps=2, block_size=k, seed=k)
    assert_allclose(layout.efficiency.factor, (k + 1) / (k + 3), rtol=RTOL)
    assert_allclose(layout.efficiency.upper_bound, (k + 1) / (k + 3), rtol=RTOL)


@pytest.mark.parametrize("k", [3, 5, 7])
def test_triple_lattice(k):
    # Triple lattice, t = k^2, r = 3: efficiency factors 2/3 for the 3(k - 1) contrasts between
    # blocks of a replicate and 1 for the other (k - 1)(k - 2), so E = (k^2 - 1) / (3(k - 1)
    # 3/2 + (k - 1)(k - 2)) = (2k + 2) / (2k + 5). Derived here, checked on the eigenvalues
    # and, for k = 3, against every resolvable design in test_upper_bound_against_... above.
    layout = make_layout(codes(k * k), design="alpha", reps=3, block_size=k, seed=k)
    number = {code: i for i, code in enumerate(layout.entries)}
    factors, _, _ = information_factors(
        [[number[c] for c in block] for block in blocks_of(layout)], k * k)
    assert_allclose(np.sort(factors), [2 / 3] * (3 * (k - 1)) + [1] * ((k - 1) * (k - 2)),
                    rtol=RTOL)
    assert_allclose(layout.efficiency.factor, (2 * k + 2) / (2 * k + 5), rtol=RTOL)
    assert_allclose(layout.efficiency.upper_bound, (2 * k + 2) / (2 * k + 5), rtol=RTOL)


def test_efficiency_within_bound_over_a_grid():
    # Patterson & Williams (1976): no resolvable design beats the bound.
    for t, k, r in itertools.product((12, 20, 24, 30, 36, 48, 60), (2, 3, 4, 5, 6), (2, 3, 4)):
        if t % k or t == k:
            continue
        try:
            layout = make_layout(codes(t), design="alpha", reps=r, block_size=k, seed=t + k)
        except LayoutSettingError as exc:
            assert exc.setting == "block_size" and k > t // k
            continue
        assert 0 < layout.efficiency.factor <= layout.efficiency.upper_bound * (1 + RTOL)


@settings(max_examples=40, deadline=None)
@given(s=st.integers(2, 7), k=st.integers(2, 5), r=st.integers(2, 4),
       seed=st.integers(0, 2**63 - 1))
def test_alpha_property(s, k, r, seed):
    t = s * k
    try:
        layout = make_layout(codes(t), design="alpha", reps=r, block_size=k, seed=seed)
    except LayoutSettingError as exc:
        # Refused only when k > s: two rows of any array then agree in its first two columns,
        # so their entries meet twice already (Patterson & Williams 1976), and a third
        # replicate can make it three.
        assert exc.setting == "block_size" and k > s
        return
    for rep in range(1, r + 1):
        assert sorted(p.entry for p in plots_of(layout, rep)) == sorted(layout.entries)
    assert all(len(block) == k for block in blocks_of(layout))
    assert max(pair_counts(blocks_of(layout), layout.entries).values()) <= 2
    assert 0 < layout.efficiency.factor <= layout.efficiency.upper_bound * (1 + RTOL)
    if k <= s and r <= s and all(s % d for d in range(2, s)):  # s prime: alpha(0, 1)
        assert layout.concurrence.maximum == 1


# -- bad settings and the design's own checks -----------------------------------------------------


@pytest.mark.parametrize(("kwargs", "setting", "words"), [
    ({"design": "rcbd", "reps": 1}, "reps", "2 or more"),
    ({"design": "alpha", "reps": 2, "block_size": 4}, "block_size", "does not divide the 10"),
    ({"design": "alpha", "reps": 2}, "block_size", "needs a block size"),
    ({"design": "alpha", "reps": 2, "block_size": 10}, "block_size", "one block per replicate"),
    ({"design": "rcbd", "reps": 2, "block_size": 5}, "block_size", "alpha designs only"),
    ({"design": "rcbd", "reps": 2, "rows": 3, "columns": 6}, "rows", "fewer than the 20"),
    ({"design": "rcbd", "reps": 2, "rows": 4}, "columns", "together"),
    ({"design": "rcbd", "reps": 2, "serpentine": True}, "serpentine", "rows and columns"),
    ({"design": "latin", "reps": 2}, "design", "rcbd, crd, alpha"),
    ({"design": "rcbd", "reps": 2, "seed": -1}, "seed", "whole number"),
])
def test_bad_settings_name_the_setting(kwargs, setting, words):
    with pytest.raises(LayoutSettingError, match=words) as caught:
        make_layout(codes(10), **{"seed": 1, **kwargs})
    assert caught.value.setting == setting


def test_bad_entries():
    with pytest.raises(LayoutSettingError, match="given twice"):
        make_layout(["A", "B", "A"], design="rcbd", reps=2, seed=1)
    with pytest.raises(LayoutSettingError, match="at least 2"):
        make_layout(["A"], design="rcbd", reps=2, seed=1)


def test_no_alpha_design_with_pairs_meeting_at_most_twice():
    # s = 2, k = 6, r = 3: each row of the array is (0, x, y) mod 2, four kinds only, so two of
    # the six rows agree everywhere and their entries meet in all three replicates.
    with pytest.raises(LayoutSettingError, match="smaller block size") as caught:
        make_layout(codes(12), design="alpha", reps=3, block_size=6, seed=1)
    assert caught.value.setting == "block_size"


def test_a_broken_design_is_caught(monkeypatch):
    real = layouts.alpha_blocks

    def duplicated(array, s):
        blocks = real(array, s)
        blocks[1, 0, 0] = blocks[1, 1, 0]  # an entry twice in replicate 2, another missing
        return blocks

    monkeypatch.setattr(layouts, "alpha_blocks", duplicated)
    with pytest.raises(TrialInputError, match="design construction failed: replicate 2"):
        make_layout(codes(12), design="alpha", reps=2, block_size=3, seed=1)
    monkeypatch.undo()
    # Two identical rows of the array: their entries meet in every replicate.
    twins = np.array([[0, 0, 0], [0, 0, 0], [0, 1, 2]])
    monkeypatch.setattr(layouts, "alpha_array", lambda t, k, r: twins)
    with pytest.raises(TrialInputError, match="shares 3 incomplete blocks"):
        make_layout(codes(12), design="alpha", reps=3, block_size=3, seed=1)
    # All rows identical: every replicate is split the same way, the design is disconnected.
    monkeypatch.setattr(layouts, "alpha_array", lambda t, k, r: np.zeros((k, r), dtype=int))
    with pytest.raises(TrialInputError, match="efficiency factor 0.0 is not within"):
        make_layout(codes(12), design="alpha", reps=3, block_size=3, seed=1)


# -- entry lists ----------------------------------------------------------------------------------


def test_numbered_entries():
    assert numbered_entries(2) == ("E001", "E002")
    assert numbered_entries(1200)[-1] == "E1200"


def test_read_entry_list(tmp_path):
    plain = tmp_path / "entries.txt"
    plain.write_text("G-101\n\nG-102\nG-103\n", encoding="utf-8")
    assert read_entry_list(plain).codes == ("G-101", "G-102", "G-103")
    table = tmp_path / "entries.csv"
    table.write_text("Code;Name;origin\nL1;Early red;x\nL2;;y\n", encoding="utf-8")
    found = read_entry_list(table)
    assert found.codes == ("L1", "L2") and found.name_map() == {"L1": "Early red"}
    twice = tmp_path / "twice.csv"
    twice.write_text("entry,name\nA,a\nB,b\nA,c\n", encoding="utf-8")
    with pytest.raises(TrialInputError, match=r"row 4, column 'entry': the entry 'A' appears "
                       r"twice \(first on row 2\)"):
        read_entry_list(twice)
    empty = tmp_path / "empty.csv"
    empty.write_text("entry,name\nA,a\n,b\n", encoding="utf-8")
    with pytest.raises(TrialInputError, match="row 3, column 'entry': the entry code is empty"):
        read_entry_list(empty)
    unnamed = tmp_path / "unnamed.csv"
    unnamed.write_text("variety,name\nA,a\n", encoding="utf-8")
    with pytest.raises(TrialInputError, match="none named entry or code"):
        read_entry_list(unnamed)


# -- the trial file and the field book ------------------------------------------------------------


def test_write_layout_and_blank_field_book(tmp_path):
    layout = make_layout(codes(11), checks=["CHK"], design="alpha", reps=2, block_size=4,
                         rows=4, columns=6, serpentine=True, seed=31)
    path = write_layout(layout, tmp_path / "maize.trial", facts={"station": "North farm"},
                        traits=("grain_yield", "plant_height"), names={"V01": "Early white"})
    with TrialFile.open(path, read_only=True) as trial:
        facts = trial.facts()
        assert facts["layout_seed"] == 31 and facts["design"] == "alpha"
        assert facts["name"] == "maize" and facts["station"] == "North farm"
        plots = trial.plots()
        frame = layout.to_frame()
        assert list(plots["plot"]) == list(frame["plot"])
        assert list(plots["incomplete_block"]) == [str(b) for b in frame["incomplete_block"]]
        assert list(plots["block"]) == [str(b) for b in frame["rep"]]
        assert list(plots["row"]) == list(frame["row"])
        assert list(plots["column"]) == list(frame["column"])
        assert list(plots["entry"]) == list(frame["entry"])
        entries = trial.entries().set_index("code")
        assert entries.at["CHK", "role"] == "check" and entries.at["V01", "role"] == "test"
        assert entries.at["V01", "name"] == "Early white"
        assert list(trial.traits()["name"]) == ["grain_yield", "plant_height"]
        assert trial.values().isna().all().all()
        kept = trial.settings("layout")
        assert kept["seed"] == 31 and kept["block_size"] == 4 and kept["serpentine"] is True
        assert kept["generating_array"] == [list(row) for row in layout.generating_array]
        assert kept["efficiency_factor"] == layout.efficiency.factor
        book = tmp_path / "maize.xlsx"
        assert export_fieldbook(trial, book, blank=True) == 24
    with pytest.raises(TrialInputError, match="exists already"):
        write_layout(layout, path)
    rows = list(openpyxl.load_workbook(book).active.iter_rows(values_only=True))
    assert rows[0] == ("plot", "block", "incomplete_block", "row", "column", "entry",
                       "grain_yield", "plant_height", "notes")
    assert [r[0] for r in rows[1:]] == list(frame["plot"])
    assert [r[5] for r in rows[1:]] == list(frame["entry"])
    assert [(r[3], r[4]) for r in rows[1:4]] == [(1, 1), (1, 2), (1, 3)]
    assert all(r[6] is None and r[8] is None for r in rows[1:])


def test_numpy_whole_numbers_are_kept_as_plain_numbers(tmp_path):
    layout = make_layout(codes(6), design="alpha", reps=np.int64(2), block_size=np.int64(3),
                         rows=np.int64(3), columns=np.int64(4), seed=np.uint32(8))
    assert type(layout.reps) is int and type(layout.plots[0].row) is int
    with TrialFile.open(write_layout(layout, tmp_path / "n.trial"), read_only=True) as trial:
        assert trial.settings("layout")["block_size"] == 3


def test_write_layout_refuses_a_contradicting_fact(tmp_path):
    layout = make_layout(codes(4), design="rcbd", reps=2, seed=3)
    with pytest.raises(TrialInputError, match="the fact 'layout_seed' is 4"):
        write_layout(layout, tmp_path / "x.trial", facts={"layout_seed": 4})
    assert not list(tmp_path.iterdir())


# -- the command ----------------------------------------------------------------------------------


def test_layout_command(tmp_path, capsys):
    output, book = tmp_path / "wheat.trial", tmp_path / "wheat.xlsx"
    code = main(["layout", "--entries", "22", "--checks", "CHK-1", "CHK-2", "--design", "alpha",
                 "--reps", "3", "--block-size", "6", "--rows", "8", "--columns", "9",
                 "--serpentine", "--seed", "2026", "--output", str(output), "--fieldbook",
                 str(book), "--trait", "grain_yield", "--trait", "heading_days"])
    out = capsys.readouterr().out
    assert code == 0
    assert "Alpha design: 24 entries (2 checks) in 3 replicates" in out
    assert "Efficiency factor" in out and "upper bound" in out
    assert "Same seed, same layout: rerun with --seed 2026 to get this layout again." in out
    assert "Pairs of entries sharing an incomplete block" in out
    assert sorted(p.name for p in tmp_path.iterdir()) == ["wheat.trial", "wheat.xlsx"]
    with TrialFile.open(output, read_only=True) as trial:
        assert trial.facts()["layout_seed"] == 2026
        assert list(trial.plots()["entry"][:3]) == [
            p.entry for p in make_layout(numbered_entries(22), checks=["CHK-1", "CHK-2"],
                                         design="alpha", reps=3, block_size=6, rows=8,
                                         columns=9, serpentine=True, seed=2026).plots[:3]]
    assert openpyxl.load_workbook(book).active.max_row == 73


def test_layout_command_reads_an_entry_file(tmp_path, capsys):
    entries = tmp_path / "lines.csv"
    entries.write_text("entry,name\nL-1,Red\nL-2,Blue\nL-3,Green\n", encoding="utf-8")
    assert main(["layout", "--entries", str(entries), "--design", "rcbd", "--reps", "2",
                 "--seed", "1", "-o", str(tmp_path / "t.trial")]) == 0
    assert "Randomized complete blocks: 3 entries (0 checks)" in capsys.readouterr().out
    with TrialFile.open(tmp_path / "t.trial", read_only=True) as trial:
        assert list(trial.entries()["name"]) == ["Red", "Blue", "Green"]


@pytest.mark.parametrize(("extra", "words"), [
    (["--design", "rcbd", "--reps", "1"], "--reps: the number of replicates must be"),
    (["--design", "alpha", "--reps", "2", "--block-size", "4"],
     "--block-size: a block size of 4 does not divide the 10 entries"),
    (["--design", "rcbd", "--reps", "2", "--rows", "3", "--columns", "5"],
     "--rows: a field of 3 rows x 5 columns has 15 places, fewer than the 20 plots"),
    (["--design", "rcbd", "--reps", "2", "--columns", "5"], "--rows: give the field's rows"),
    (["--design", "rcbd", "--reps", "2", "--pdf", "map.pdf"], "PDF field map is drawn by the"),
    (["--design", "rcbd", "--reps", "2", "--fieldbook", "no/such/folder/f.xlsx"],
     "--fieldbook: the folder for the field book does not exist"),
    (["--design", "rcbd", "--reps", "2", "--fieldbook", "f.pdf"], "must end in .xlsx or .csv"),
])
def test_layout_command_bad_input(tmp_path, capsys, monkeypatch, extra, words):
    monkeypatch.chdir(tmp_path)
    code = main(["layout", "--entries", "10", "--seed", "5", "-o", "t.trial", *extra])
    err = capsys.readouterr().err
    assert code == 2 and words in err and "Traceback" not in err
    assert not list(tmp_path.iterdir())


def test_layout_command_refuses_existing_files(tmp_path, capsys):
    taken = tmp_path / "taken.trial"
    taken.write_bytes(b"keep me")
    assert main(["layout", "--entries", "4", "--design", "crd", "--reps", "2", "--seed", "1",
                 "-o", str(taken)]) == 2
    assert "the file named by --output exists already" in capsys.readouterr().err
    notes = tmp_path / "notes.xlsx"
    notes.write_bytes(b"keep me too")
    assert main(["layout", "--entries", "4", "--design", "crd", "--reps", "2", "--seed", "1",
                 "-o", str(tmp_path / "new.trial"), "--fieldbook", str(notes)]) == 2
    assert "the file named by --fieldbook exists already" in capsys.readouterr().err
    assert taken.read_bytes() == b"keep me" and notes.read_bytes() == b"keep me too"
    assert not (tmp_path / "new.trial").exists()


def test_layout_command_bad_entry_file(tmp_path, capsys):
    entries = tmp_path / "lines.txt"
    entries.write_text("A\nB\nA\n", encoding="utf-8")
    assert main(["layout", "--entries", str(entries), "--design", "rcbd", "--reps", "2",
                 "--seed", "1", "-o", str(tmp_path / "t.trial")]) == 2
    err = capsys.readouterr().err
    assert "lines.txt, row 3" in err and "appears twice" in err


def test_layout_command_passes_the_layout_to_the_pdf_writer(tmp_path, capsys):
    drawn = []
    code = main(["layout", "--entries", "6", "--design", "rcbd", "--reps", "2", "--seed", "9",
                 "-o", str(tmp_path / "t.trial"), "--pdf", str(tmp_path / "map.pdf"),
                 "--paper", "Letter"], pdf_writer=lambda *call: drawn.append(call))
    assert code == 0 and len(drawn) == 1
    layout, path, paper = drawn[0]
    assert isinstance(layout, layouts.Layout) and layout.seed == 9
    assert path == str(tmp_path / "map.pdf") and paper == "Letter"
    assert f"Wrote the field map to {path}." in capsys.readouterr().out


def test_layout_is_a_batch_command():
    assert _is_batch(["layout", "--entries", "4"])


def test_summary_counts_pairs():
    layout = make_layout(codes(9), design="alpha", reps=2, block_size=3, seed=1)
    # 36 pairs of 9 entries: each of 2 x 3 blocks holds 3 pairs, 18 pairs meet once.
    assert layout.concurrence.counts == ((0, 18), (1, 18)) and math.comb(9, 2) == 36
    assert "never 18, once 18 (at most once)" in layout.text()
