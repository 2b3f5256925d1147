"""The analysis of a large alpha design against statsmodels' REML fit of the same model alone.

The trial: 300 entries in 3 replicates of 30 incomplete blocks of 10 plots (900 plots), laid out
by shifted columns of a 30 x 10 array of the entries (replicate r puts a[(j + r c) mod 30, c] in
block j, so no two entries meet in more than one block), with invented yields. Ours: the whole
``analyze`` of the field book as an alpha design with Tukey-Kramer letters (REML fit, adjusted
means and their covariance, the intra-block analysis of variance, the complete-block analysis for
the efficiency, 44,850 pairs, grouping letters, diagnostics). Peer: statsmodels ``MixedLM`` of
``y ~ C(rep) + C(entry)`` with the incomplete blocks as a variance component, built from the
formula and fitted by REML with its default settings, nothing else. Target: at most 3x the peer's
time. A second row checks that both found the same block variance.
"""

from __future__ import annotations

import tempfile
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import statsmodels.formula.api as smf

from tests.benchmarks.common import Row, best_time
from trialdesk.core.analysis import analyze
from trialdesk.core.fieldbook import read_fieldbook
from trialdesk.core.results import AnalysisSettings

ENTRIES, REPLICATES, BLOCK_SIZE = 300, 3, 10


def _trial() -> pd.DataFrame:
    """Invented yields (t/ha): 6 + entry (sd 0.5) + incomplete block (sd 0.6) + plot (sd 0.4)."""
    rng = np.random.default_rng(300)
    blocks = ENTRIES // BLOCK_SIZE
    array = rng.permutation(ENTRIES).reshape(blocks, BLOCK_SIZE)
    rows = []
    for r in range(REPLICATES):
        for j in rng.permutation(blocks):
            members = rng.permutation([array[(j + r * c) % blocks, c] for c in range(BLOCK_SIZE)])
            rows += [(f"R{r + 1}", f"{j + 1}", f"L{e + 1:03d}") for e in members]
    frame = pd.DataFrame(rows, columns=["rep", "iblock", "entry"])
    frame["plot"] = [str(101 + k) for k in range(len(frame))]
    entry_effect = rng.normal(0.0, 0.5, ENTRIES)
    block_effect = rng.normal(0.0, 0.6, REPLICATES * blocks)
    block_index = (frame["rep"].str[1:].astype(int) - 1) * blocks + frame["iblock"].astype(int) - 1
    frame["grain_yield"] = np.round(6.0 + entry_effect[frame["entry"].str[1:].astype(int) - 1]
                                    + block_effect[block_index]
                                    + rng.normal(0.0, 0.4, len(frame)), 3)
    return frame


def _peer(frame: pd.DataFrame):
    data = frame.assign(one=1, rep_block=frame["rep"] + "/" + frame["iblock"])
    model = smf.mixedlm("grain_yield ~ C(rep) + C(entry)", data, groups="one", re_formula="0",
                        vc_formula={"block": "0 + C(rep_block)"})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return model.fit(reml=True)


def run() -> list[Row]:
    frame = _trial()
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "alpha300.csv"
        frame[["plot", "rep", "iblock", "entry", "grain_yield"]].to_csv(path, index=False)
        book = read_fieldbook(path)
    settings = AnalysisSettings(design="alpha", method="tukey")
    results, fits = [], []
    ours = best_time(lambda: results.append(analyze(book, settings)), repeat=3)
    peer = best_time(lambda: fits.append(_peer(frame)), repeat=3)
    ours_block = next(v.variance for v in results[-1].traits[0].variance_components
                      if v.component == "incomplete block")
    gap = abs(ours_block - float(fits[-1].vcomp[0])) / float(fits[-1].vcomp[0])
    return [
        Row(benchmark=f"alpha design, {ENTRIES} entries x {REPLICATES} reps, blocks of "
                      f"{BLOCK_SIZE}: analyze with Tukey-Kramer letters",
            ours=ours, peer="statsmodels MixedLM formula + REML fit alone", peer_value=peer,
            target="at most 3x the peer's time", met=ours <= 3.0 * peer),
        Row(benchmark="relative gap of the block variance, ours vs statsmodels' default fit",
            ours=gap, peer="allowed gap", peer_value=1e-4,
            target="at most 1e-4 (statsmodels' default gradient tolerance)", met=gap <= 1e-4,
            unit=""),
    ]
