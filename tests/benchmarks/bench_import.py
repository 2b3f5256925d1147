"""Reading a 100,000-plot field book (long CSV, four traits) against pandas.read_csv of the file.

The field book is invented: 1,000 entries in 100 blocks, with a plot number, and grain yield (two
decimals), moisture (one decimal), plant height and days to heading (whole numbers), as field
books record them. The peer, ``pandas.read_csv`` with its defaults, parses the same file in C and
checks nothing; ``read_fieldbook`` also checks every cell against the field-book rules (numbers,
missing markers, labels, plot numbers seen twice, suspicious values) and keeps every message.

A second file holds the same plots with every value distinct (eight decimals), the worst case for
the reader, which applies the cell rules once per distinct cell text.

Targets: on the file as recorded, within 25x of pandas.read_csv's time (the reader creates and
checks a Python string per cell; pandas converts numbers in C) and under 1 s; with every value
distinct, under 2 s ("a few seconds" for 100,000 plots, with room to spare).
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from tests.benchmarks.common import Row, best_time
from trialdesk.core.fieldbook import read_fieldbook

PLOTS = 100_000
ENTRIES = 1_000
TARGET_RATIO = 25.0
BUDGET = {False: 1.0, True: 2.0}  # seconds, for the file as recorded and with distinct values


def _fieldbook(folder: Path, *, distinct: bool) -> Path:
    rng = np.random.default_rng(100_000)
    plot = np.arange(1, PLOTS + 1)
    entry_effect = rng.normal(0, 0.5, ENTRIES)
    frame = pd.DataFrame({
        "plot": plot,
        "entry": [f"L{i:04d}" for i in (plot - 1) % ENTRIES],
        "block": (plot - 1) // ENTRIES + 1,
        "grain_yield": 6.0 + entry_effect[(plot - 1) % ENTRIES] + rng.normal(0, 0.4, PLOTS),
        "moisture": rng.normal(16.0, 1.5, PLOTS),
        "plant_height": rng.normal(95.0, 6.0, PLOTS),
        "heading_days": rng.normal(62.0, 3.0, PLOTS),
    })
    decimals = {"grain_yield": 2, "moisture": 1, "plant_height": 0, "heading_days": 0}
    for trait, places in decimals.items():
        frame[trait] = frame[trait].round(8 if distinct else places)
    path = folder / ("distinct.csv" if distinct else "fieldbook.csv")
    frame.to_csv(path, index=False)
    return path


def run() -> list[Row]:
    rows = []
    with tempfile.TemporaryDirectory() as folder:
        for distinct in (False, True):
            path = _fieldbook(Path(folder), distinct=distinct)
            book = read_fieldbook(path)  # also warms the file cache and the imports
            assert len(book.plots) == PLOTS and len(book.traits) == 4
            ours = best_time(lambda p=path: read_fieldbook(p), repeat=5)
            what = (f"read_fieldbook, {PLOTS:,} plots x 4 traits, CSV "
                    f"({'every value distinct' if distinct else 'values as recorded'})")
            if not distinct:
                peer = best_time(lambda p=path: pd.read_csv(p), repeat=5)
                rows.append(Row(
                    benchmark=what, ours=ours, peer="pandas.read_csv of the same file",
                    peer_value=peer, target=f"within {TARGET_RATIO:g}x of pandas.read_csv",
                    met=ours <= TARGET_RATIO * peer,
                ))
            rows.append(Row(
                benchmark=what, ours=ours, peer="target budget", peer_value=BUDGET[distinct],
                target=f"under {BUDGET[distinct]:g} s", met=ours < BUDGET[distinct],
            ))
    return rows
