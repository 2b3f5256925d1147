"""A power cut in the middle of data entry: a writer process is killed (SIGKILL) at random
moments, again and again. Every edit it acknowledged must be in the file, the file must pass
SQLite's integrity check, and it must open again for editing.

Each cell is written at most once, with a value that names it (cell k gets k + 0.5), so the file
can be compared with the acknowledgements exactly: a cell holds its value if the writer
acknowledged it, may hold it if the writer was killed between saving it and saying so, and is
empty otherwise.
"""

from __future__ import annotations

import signal
import sqlite3
import subprocess
import sys
import textwrap
import time

import numpy as np
import pandas as pd

from trialdesk.core.trialfile import TrialFile

SEED = 20260402  # fixed, so a failing sequence of kill moments can be replayed
ROUNDS = 25
PLOTS = 3000
TRAITS = 8
EARLY_EVERY = 5  # every fifth round is killed at a moment that may fall while it is opening

WRITER = textwrap.dedent("""
    import sys
    from trialdesk.core.trialfile import TrialFile
    path, start, plots, traits = sys.argv[1], *map(int, sys.argv[2:5])
    with TrialFile.open(path) as trial:
        print("ready", flush=True)
        for k in range(start, plots * traits):
            trial.set_value(f"p{k // traits}", f"t{k % traits}", k + 0.5)
            print(k, flush=True)  # the acknowledgement: set_value has returned
    print("done", flush=True)
""")


def _new_trial(path) -> None:
    plots = [f"p{i}" for i in range(PLOTS)]
    traits = [f"t{j}" for j in range(TRAITS)]
    with TrialFile.create(path, name="Power cuts") as trial:
        trial.load_plots(
            entries=pd.DataFrame({"code": ["E1"]}),
            plots=pd.DataFrame({"plot": plots, "entry": ["E1"] * PLOTS}),
            traits=pd.DataFrame({"name": traits}),
            values=pd.DataFrame(index=plots, columns=traits, dtype=float))


def _run_and_kill(path, start: int, rng: np.random.Generator, early: bool) -> list[int]:
    """Start a writer at cell ``start``, kill it at a random moment, return what it acknowledged."""
    writer = subprocess.Popen([sys.executable, "-c", WRITER, str(path), str(start), str(PLOTS),
                               str(TRAITS)], stdout=subprocess.PIPE, text=True)
    try:
        if early:
            time.sleep(rng.uniform(0.0, 1.0))
        else:
            assert writer.stdout.readline() == "ready\n"
            time.sleep(rng.uniform(0.01, 0.3))
    finally:
        writer.send_signal(signal.SIGKILL)
        output = writer.stdout.read()  # through the same buffer as readline: nothing skipped
        writer.stdout.close()
        writer.wait(timeout=30)
    lines = output.splitlines(keepends=True)
    return [int(line) for line in lines if line.endswith("\n") and line.strip().isdigit()]


def _saved_cells(path) -> dict[int, float]:
    """Cell number -> value, for every value in the file."""
    with TrialFile.open(path, read_only=True) as trial:
        values = trial.values()
    grid = values.to_numpy()
    rows, columns = np.nonzero(~np.isnan(grid))
    plot_numbers = values.index.str[1:].astype(int).to_numpy()
    trait_numbers = values.columns.str[1:].astype(int).to_numpy()
    cells = plot_numbers[rows] * TRAITS + trait_numbers[columns]
    return dict(zip(cells.tolist(), grid[rows, columns].tolist(), strict=True))


def _check(path, acknowledged: set[int], maybe: set[int], context: str) -> int:
    with sqlite3.connect(f"{path.as_uri()}?mode=ro", uri=True) as raw:
        assert raw.execute("PRAGMA integrity_check").fetchall() == [("ok",)], context
        journalled = raw.execute("SELECT count(*) FROM journal WHERE kind = 'value'").fetchone()
    raw.close()
    saved = _saved_cells(path)
    missing = sorted(acknowledged - saved.keys())
    assert not missing, f"{context}: acknowledged edits lost: {missing[:10]}"
    phantom = sorted(saved.keys() - acknowledged - maybe)
    assert not phantom, f"{context}: cells that were never written: {phantom[:10]}"
    wrong = sorted(k for k, value in saved.items() if value != k + 0.5)
    assert not wrong, f"{context}: wrong values in cells {wrong[:10]}"
    assert journalled[0] == len(saved), f"{context}: the journal and the values disagree"
    return len(saved)


def test_killed_writers_never_lose_an_acknowledged_edit(tmp_path):
    path = tmp_path / "power-cuts.trial"
    _new_trial(path)
    rng = np.random.default_rng(SEED)
    acknowledged: set[int] = set()
    maybe: set[int] = set()  # saved, perhaps, by a writer killed before it could say so
    start = 0
    for round_number in range(ROUNDS):
        early = round_number % EARLY_EVERY == EARLY_EVERY - 1
        acked = _run_and_kill(path, start, rng, early)
        assert acked == list(range(start, start + len(acked)))
        acknowledged.update(acked)
        in_flight = start + len(acked)
        maybe.add(in_flight)
        start = in_flight + 1
        _check(path, acknowledged, maybe, f"seed {SEED}, round {round_number}")
    assert len(acknowledged) > ROUNDS  # the kills really did land between edits
    with TrialFile.open(path) as trial:  # it opens for editing after all that, and takes edits
        trial.set_value(f"p{start // TRAITS}", f"t{start % TRAITS}", start + 0.5)
        assert trial.can_undo()
    _check(path, acknowledged | {start}, maybe, "after reopening")
