"""An alpha trial from layout to analysis: the trial file carries its incomplete blocks.

The analysis itself is checked against statsmodels MixedLM in tests/test_alpha_lattice.py and
tests/test_spatial.py; here the trial file path through the command line.
"""

from __future__ import annotations

import json

import numpy as np

from trialdesk.core.cli import main
from trialdesk.core.layouts import make_layout, write_layout
from trialdesk.core.trial_fieldbook import fieldbook_from_trial
from trialdesk.core.trialfile import TrialFile


def _harvested(tmp_path):
    layout = make_layout([f"E{i:02d}" for i in range(1, 21)], checks=("E01",), design="alpha",
                         reps=3, block_size=4, rows=6, columns=10, serpentine=True, seed=11)
    path = write_layout(layout, tmp_path / "alpha.trial")
    rng = np.random.default_rng(5)
    with TrialFile.open(path) as trial:
        plots = trial.plots()
        trial.set_values([(p, "grain_yield", float(6 + rng.normal(0, 0.5)))
                          for p in plots["plot"]])
    return path, layout


def test_the_trial_file_gives_the_incomplete_blocks_to_the_analysis(tmp_path):
    path, layout = _harvested(tmp_path)
    with TrialFile.open(path, read_only=True) as trial:
        book = fieldbook_from_trial(trial)
    assert book.roles["incomplete_block"] == "incomplete_block"
    laid = layout.to_frame().set_index("plot")
    got = book.plots.set_index("plot")
    assert all(str(laid.at[p, "incomplete_block"]) == got.at[p, "incomplete_block"]
               for p in got.index)


def test_an_alpha_trial_file_is_analysed_from_the_command_line(tmp_path, capsys):
    path, _ = _harvested(tmp_path)
    assert main(["analyze", str(path), "--spatial", "papadakis", "--json", "-"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["design"] == "alpha" and doc["spatial"] == "papadakis"
    trait = doc["traits"][0]
    assert trait["efficiency_vs_rcbd"] > 0
    assert {o["method"] for o in trait["spatial_options"]} >= {"none", "papadakis"}
    assert main(["analyze", str(path), "--entries-random", "--json", "-"]) == 0
    random = json.loads(capsys.readouterr().out)["traits"][0]
    assert 0 <= random["heritability"] <= 1
