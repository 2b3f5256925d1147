"""The trial file: single-value edits (one durable transaction each), a large import, and
reading its values back.

Each is measured against plain sqlite3 doing the same writes with the same durability settings
(WAL, synchronous=FULL), so the figure is what the trial file adds: checks, the journal, undo.
"""

from __future__ import annotations

import itertools
import sqlite3
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from tests.benchmarks.common import Row, best_time
from trialdesk.core.trialfile import TrialFile

EDITS = 1_000
IMPORT_PLOTS = 100_000
IMPORT_TRAITS = ("grain_yield", "moisture", "plant_height")
IMPORT_ENTRIES = 500
EDIT_RATIO = 3.0  # at most this many times raw sqlite3's time
IMPORT_RATIO = 3.0
IMPORT_BUDGET = 5.0  # seconds: "a few seconds" for 100,000 plots
READ_RATIO = 3.0


def _raw(path: Path) -> sqlite3.Connection:
    raw = sqlite3.connect(path, isolation_level=None)
    raw.execute("PRAGMA journal_mode = WAL")
    raw.execute("PRAGMA synchronous = FULL")
    raw.execute("PRAGMA foreign_keys = ON")
    return raw


def _import_frames() -> dict[str, pd.DataFrame]:
    """An invented large trial: 500 entries in 200 blocks, three traits, about 5% missing."""
    rng = np.random.default_rng(11)
    plots = [str(p) for p in range(1, IMPORT_PLOTS + 1)]
    codes = [f"E{e}" for e in range(1, IMPORT_ENTRIES + 1)]
    values = pd.DataFrame(
        {"grain_yield": rng.normal(6.0, 0.8, IMPORT_PLOTS),
         "moisture": rng.normal(14.0, 1.0, IMPORT_PLOTS),
         "plant_height": rng.normal(95.0, 8.0, IMPORT_PLOTS)}, index=plots)
    values = values.mask(rng.random(values.shape) < 0.05)
    return {
        "entries": pd.DataFrame({"code": codes}),
        "plots": pd.DataFrame({
            "plot": plots,
            "block": [str(p // IMPORT_ENTRIES + 1) for p in range(IMPORT_PLOTS)],
            "row": np.arange(IMPORT_PLOTS) // 100 + 1,
            "column": np.arange(IMPORT_PLOTS) % 100 + 1,
            "entry": [codes[p % IMPORT_ENTRIES] for p in range(IMPORT_PLOTS)]}),
        "traits": pd.DataFrame({"name": list(IMPORT_TRAITS)}),
        "values": values,
    }


def _edits(folder: Path) -> tuple[float, float]:
    plots = [str(p) for p in range(EDITS)]
    trial = TrialFile.create(folder / "edits.trial", name="Edits")
    trial.load_plots(entries=pd.DataFrame({"code": ["E1"]}),
                     plots=pd.DataFrame({"plot": plots, "entry": ["E1"] * EDITS}),
                     traits=pd.DataFrame({"name": ["grain_yield"]}),
                     values=pd.DataFrame(index=plots, columns=["grain_yield"], dtype=float))
    rounds = itertools.count()

    def ours() -> None:
        shift = next(rounds)  # a new value every time: an unchanged value would save nothing
        for i, plot in enumerate(plots):
            trial.set_value(plot, "grain_yield", i + shift + 0.5)

    raw = _raw(folder / "edits-raw.sqlite")
    raw.execute("CREATE TABLE plot_values (plot TEXT, trait TEXT, value REAL, "
                "PRIMARY KEY (plot, trait))")

    def peer() -> None:
        shift = next(rounds)
        for i, plot in enumerate(plots):
            raw.execute("BEGIN IMMEDIATE")
            raw.execute("INSERT OR REPLACE INTO plot_values VALUES (?, ?, ?)",
                        (plot, "grain_yield", i + shift + 0.5))
            raw.execute("COMMIT")

    timed = best_time(ours), best_time(peer)
    trial.close()
    raw.close()
    return timed


def _import(folder: Path) -> tuple[float, float, float, float]:
    """Times of the import and its peer, then of reading the values back and its peer."""
    frames = _import_frames()
    counter = itertools.count()

    def ours() -> None:
        with TrialFile.create(folder / f"import-{next(counter)}.trial", name="Import") as trial:
            trial.load_plots(**frames, source="invented")

    # The same rows, already as tuples, into the same tables: the floor for this import.
    entry_rows = [(code, None, "test", None, i)
                  for i, code in enumerate(frames["entries"]["code"])]
    table = frames["plots"]
    plot_rows = list(zip(table["plot"], table["block"], itertools.repeat(None),
                         table["row"].tolist(), table["column"].tolist(), table["entry"],
                         itertools.count()))
    trait_rows = [(name, i) for i, name in enumerate(IMPORT_TRAITS)]
    value_rows = [(plot, trait, value) for trait in IMPORT_TRAITS
                  for plot, value in frames["values"][trait].dropna().items()]

    def peer() -> None:
        raw = _raw(folder / f"import-raw-{next(counter)}.sqlite")
        raw.execute("CREATE TABLE entries (code TEXT PRIMARY KEY, name TEXT, role TEXT, "
                    "origin TEXT, position INTEGER UNIQUE)")
        raw.execute("CREATE TABLE plots (plot TEXT PRIMARY KEY, block TEXT, incomplete_block "
                    "TEXT, field_row INTEGER, field_column INTEGER, entry TEXT REFERENCES "
                    "entries (code), position INTEGER UNIQUE)")
        raw.execute("CREATE INDEX plots_entry ON plots (entry)")
        raw.execute("CREATE TABLE traits (name TEXT PRIMARY KEY, position INTEGER UNIQUE)")
        raw.execute("CREATE TABLE plot_values (plot TEXT REFERENCES plots (plot), trait TEXT "
                    "REFERENCES traits (name), value REAL, PRIMARY KEY (plot, trait))")
        raw.execute("CREATE INDEX plot_values_trait ON plot_values (trait)")
        raw.execute("BEGIN IMMEDIATE")
        raw.executemany("INSERT INTO entries VALUES (?, ?, ?, ?, ?)", entry_rows)
        raw.executemany("INSERT INTO plots VALUES (?, ?, ?, ?, ?, ?, ?)", plot_rows)
        raw.executemany("INSERT INTO traits VALUES (?, ?)", trait_rows)
        raw.executemany("INSERT INTO plot_values VALUES (?, ?, ?)", value_rows)
        raw.execute("COMMIT")
        raw.close()

    loading = best_time(ours), best_time(peer)
    with TrialFile.open(folder / "import-0.trial", read_only=True) as trial:
        reading = best_time(trial.values)
    raw = sqlite3.connect(folder / "import-0.trial")
    fetching = best_time(lambda: raw.execute(
        "SELECT plot, trait, value FROM plot_values WHERE value IS NOT NULL").fetchall())
    raw.close()
    return (*loading, reading, fetching)


def run() -> list[Row]:
    with tempfile.TemporaryDirectory() as folder:
        edits, raw_edits = _edits(Path(folder))
        loaded, raw_loaded, read, raw_read = _import(Path(folder))
    return [
        Row(benchmark=f"{EDITS:,} single-value edits through TrialFile.set_value "
                      "(one transaction each, journalled)",
            ours=edits,
            peer="raw sqlite3 inserts, one transaction each (WAL, synchronous=FULL)",
            peer_value=raw_edits,
            target=f"within {EDIT_RATIO:g}x of raw sqlite3",
            met=edits <= EDIT_RATIO * raw_edits),
        Row(benchmark=f"load_plots, {IMPORT_PLOTS:,} plots x {len(IMPORT_TRAITS)} traits "
                      "(checks included)",
            ours=loaded,
            peer="raw sqlite3 executemany of the same rows, one transaction (WAL, "
                 "synchronous=FULL)",
            peer_value=raw_loaded,
            target=f"within {IMPORT_RATIO:g}x of raw sqlite3 and under {IMPORT_BUDGET:g} s",
            met=loaded <= IMPORT_RATIO * raw_loaded and loaded < IMPORT_BUDGET),
        Row(benchmark=f"values(), {IMPORT_PLOTS:,} plots x {len(IMPORT_TRAITS)} traits as a "
                      "plot x trait table",
            ours=read,
            peer="raw sqlite3 fetchall of the same (plot, trait, value) rows, no table built",
            peer_value=raw_read,
            target=f"within {READ_RATIO:g}x of raw sqlite3",
            met=read <= READ_RATIO * raw_read),
    ]
