"""Tukey's HSD for a 150-entry, 4-replicate completely randomized trial (11,175 pairs).

Ours: the difference and its standard error per pair, then ``tukey_kramer`` p-values and interval
half-widths, with the per-k and per-df caches of the studentized range emptied before every
call (so each timing includes fitting the distribution). Peer: ``scipy.stats.tukey_hsd`` on the
same plots, its p-value matrix and ``confidence_interval()``. The p-values and interval ends of
the two are compared as well.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from tests.benchmarks.common import Row, best_time
from trialdesk.core import studentized_range
from trialdesk.core.range_tests import tukey_kramer

ENTRIES = 150
REPLICATES = 4
ALPHA = 0.05


def _plots() -> np.ndarray:
    """Invented yields (t/ha): entry effects plus plot error, entries x replicates."""
    rng = np.random.default_rng(150)
    entry_effect = rng.normal(0.0, 0.4, (ENTRIES, 1))
    return 6.0 + entry_effect + rng.normal(0.0, 0.5, (ENTRIES, REPLICATES))


def _ours(plots: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    studentized_range._range_tail.cache_clear()
    studentized_range._chi_bounds.cache_clear()
    means = plots.mean(axis=1)
    df = ENTRIES * (REPLICATES - 1)
    mse = ((plots - means[:, None]) ** 2).sum() / df
    a, b = np.triu_indices(ENTRIES, 1)
    difference = means[a] - means[b]
    se = np.full(difference.shape, np.sqrt(mse * 2.0 / REPLICATES))
    p, half_width = tukey_kramer(difference, se, ENTRIES, df, ALPHA)
    return difference, p, half_width


def _peer(plots: np.ndarray):
    result = stats.tukey_hsd(*plots)
    return result, result.confidence_interval(1.0 - ALPHA)


def run() -> list[Row]:
    plots = _plots()
    ours_out, peer_out = [], []
    ours_time = best_time(lambda: ours_out.append(_ours(plots)), repeat=3)
    peer_time = best_time(lambda: peer_out.append(_peer(plots)), repeat=1)  # a minute or so
    difference, p, half_width = ours_out[-1]
    result, ci = peer_out[-1]
    a, b = np.triu_indices(ENTRIES, 1)
    p_gap = float(np.abs(p - result.pvalue[a, b]).max())
    ci_gap = float(
        max(
            np.abs(difference - half_width - ci.low[a, b]).max(),
            np.abs(difference + half_width - ci.high[a, b]).max(),
        )
    )
    pairs = a.size
    return [
        Row(
            benchmark=f"Tukey HSD, {ENTRIES} entries x {REPLICATES} reps, {pairs} pairs",
            ours=ours_time,
            peer="scipy.stats.tukey_hsd + confidence_interval()",
            peer_value=peer_time,
            target="at least 100x faster",
            met=peer_time >= 100.0 * ours_time,
        ),
        Row(
            benchmark=f"max |p ours - p scipy| over {pairs} pairs (interval ends: {ci_gap:.1e})",
            ours=p_gap,
            peer="allowed difference",
            peer_value=1e-6,
            target="at most 1e-6 (p-values and interval ends)",
            met=p_gap <= 1e-6 and ci_gap <= 1e-6,
            unit="",
        ),
    ]
