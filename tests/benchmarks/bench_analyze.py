"""A whole ``trialdesk analyze`` run against a bare Python start that imports the statistics stack.

The trial: 56 entries in 4 complete blocks, one trait, Tukey letters (invented data). The peer is
``python -c "import pandas, scipy.stats, statsmodels"``: a batch analysis should cost little more
than starting Python with the libraries such a script would import. Target: at most 1.5 x the peer.
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from tests.benchmarks.common import Row, best_time


def _fieldbook(folder: Path) -> Path:
    rng = np.random.default_rng(56)
    t, b = 56, 4
    frame = pd.DataFrame([(f"L{i:03d}", j + 1) for j in range(b) for i in range(t)],
                         columns=["entry", "rep"])
    frame["grain_yield"] = np.round(5 + rng.normal(0, 0.5, t)[frame.index % t]
                                    + rng.normal(0, 0.35, len(frame)), 2)
    path = folder / "ayt56.csv"
    frame.to_csv(path, index=False)
    return path


def run() -> list[Row]:
    exe = Path(sys.executable).with_name("trialdesk")
    command = [str(exe)] if exe.exists() else [sys.executable, "-m", "trialdesk.desktop.launcher"]
    with tempfile.TemporaryDirectory() as folder:
        path = _fieldbook(Path(folder))
        ours_cmd = [*command, "analyze", str(path), "--method", "tukey", "--json",
                    str(Path(folder) / "out.json")]
        subprocess.run(ours_cmd, check=True, capture_output=True)  # warm the file cache
        ours = best_time(lambda: subprocess.run(ours_cmd, check=True, capture_output=True), 5)
    peer_cmd = [sys.executable, "-c", "import pandas, scipy.stats, statsmodels"]
    peer = best_time(lambda: subprocess.run(peer_cmd, check=True), 5)
    return [Row(benchmark="trialdesk analyze, 56 entries x 4 reps, Tukey", ours=ours,
                peer="python -c 'import pandas, scipy.stats, statsmodels'", peer_value=peer,
                target="at most 1.5x the peer's time", met=ours <= 1.5 * peer)]
