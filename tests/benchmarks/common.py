"""Shared pieces of the benchmark command: a best-of timer and the row every benchmark reports."""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass


@dataclass(frozen=True)
class Row:
    """One measured figure beside its named peer, measured in the same run."""

    benchmark: str
    ours: float  # seconds (or the unit named in ``unit``)
    peer: str
    peer_value: float
    target: str  # the target in words, e.g. "at least 100x faster"
    met: bool
    unit: str = "s"

    @property
    def ratio(self) -> float:
        """Peer over ours: above 1 means Trialdesk is faster (or smaller)."""
        return self.peer_value / self.ours if self.ours else float("inf")


def best_time(fn: Callable[[], object], repeat: int = 3) -> float:
    """Smallest wall-clock time of ``repeat`` calls of ``fn``, in seconds."""
    best = float("inf")
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return best
