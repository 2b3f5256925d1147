"""Grouping letters for a large preliminary trial: 300 entries, 3 replicates, Tukey HSD pattern."""

from __future__ import annotations

import re

import numpy as np
from scipy.stats import studentized_range

from tests.benchmarks.common import Row, best_time
from trialdesk.core.letters import grouping_letters

ENTRIES = 300
REPLICATES = 3
ERROR_MEAN_SQUARE = 0.36  # invented: residual SD 0.6 t/ha
BUDGET = 1.0  # seconds


def _tukey_pattern(seed: int = 7) -> tuple[np.ndarray, np.ndarray]:
    """Invented entry means (t/ha) and the pairs Tukey's HSD at 0.05 declares different."""
    rng = np.random.default_rng(seed)
    sed = np.sqrt(2 * ERROR_MEAN_SQUARE / REPLICATES)
    means = rng.normal(6.0, 3 * sed, ENTRIES)  # entries spread over about +-9 SED
    df_error = (ENTRIES - 1) * (REPLICATES - 1)  # RCBD error degrees of freedom
    q = studentized_range.ppf(0.95, ENTRIES, df_error)
    hsd = q * np.sqrt(ERROR_MEAN_SQUARE / REPLICATES)  # Tukey (1953): q x SEm, equal replication
    return means, np.abs(np.subtract.outer(means, means)) > hsd


def run() -> list[Row]:
    means, different = _tukey_pattern()
    letters = grouping_letters(means, different)
    distinct = len(set(re.findall(r"[a-zA-Z][0-9]*", "".join(letters))))
    ours = best_time(lambda: grouping_letters(means, different))
    return [
        Row(
            benchmark=f"grouping letters, {ENTRIES} entries ({distinct} letters)",
            ours=ours,
            peer="target budget",
            peer_value=BUDGET,
            target="under 1 s",
            met=ours < BUDGET,
        )
    ]
