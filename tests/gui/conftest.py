"""Fixtures for the desktop tests: an open demo trial, a large invented trial, screenshots."""

from __future__ import annotations

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import shutil  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import pytest  # noqa: E402
from PySide6.QtWidgets import QLineEdit, QWidget  # noqa: E402

from trialdesk.core.importer import YieldRecipe  # noqa: E402
from trialdesk.core.trialfile import TrialFile  # noqa: E402
from trialdesk.desktop.session import TrialSession, make_demo_trial  # noqa: E402

SHOTS = Path(__file__).parents[1] / "output" / "screenshots"



@pytest.fixture(scope="session")
def demo_template(tmp_path_factory) -> Path:
    """The demo trial, made once; each test edits its own copy."""
    path = tmp_path_factory.mktemp("template") / "demo.trial"
    make_demo_trial(path)
    return path


@pytest.fixture
def demo_path(demo_template, tmp_path) -> Path:
    path = tmp_path / "demo.trial"
    shutil.copy(demo_template, path)
    return path


@pytest.fixture
def session(demo_path, qapp):
    """A TrialSession with the demo trial open, closed at teardown."""
    trial = TrialSession()
    trial.open(demo_path)
    yield trial
    trial.close()


@pytest.fixture
def make_trial(tmp_path):
    """make_trial(n_entries, n_blocks): an invented trial file, grain yield from plot weight."""
    return lambda n_entries, n_blocks: _make_trial(
        tmp_path / f"invented-{n_entries}x{n_blocks}.trial", n_entries, n_blocks)


@pytest.fixture
def large_trial(make_trial) -> Path:
    """An invented trial of 500 entries in 20 blocks: 10,000 plots."""
    return make_trial(500, 20)


def _make_trial(path: Path, n_entries: int, n_blocks: int) -> Path:
    """Entries L0001... (the first two checks) once in each block, values drawn at random."""
    rng = np.random.default_rng(20260402)
    codes = [f"L{k:04d}" for k in range(1, n_entries + 1)]
    entries = pd.DataFrame({"code": codes,
                            "role": ["check" if k < 2 else "test" for k in range(n_entries)]})
    plots = pd.DataFrame({
        "plot": [str(1000 * b + k + 1) for b in range(1, n_blocks + 1) for k in range(n_entries)],
        "block": [str(b) for b in range(1, n_blocks + 1) for _ in range(n_entries)],
        "entry": [code for _ in range(n_blocks) for code in rng.permutation(codes)],
    })
    recipe = YieldRecipe(weight="plot_weight", moisture="moisture")
    traits = pd.DataFrame([
        {"name": "plant_height", "unit": "cm", "decimals": 0, "low": 40.0, "high": 150.0},
        {"name": "plot_weight", "unit": "kg", "decimals": 2, "low": 0.5, "high": 10.0},
        {"name": "moisture", "unit": "%", "decimals": 1, "low": 8.0, "high": 30.0},
        {"name": "grain_yield", "unit": "t/ha", "decimals": 2,
         "derivation": recipe.as_derivation()},
    ])
    n = len(plots)
    values = pd.DataFrame({"plot_weight": rng.normal(3.5, 0.4, n).round(2),
                           "moisture": rng.normal(14.0, 1.0, n).round(1),
                           "plant_height": rng.normal(95.0, 8.0, n).round(0)},
                          index=pd.Index(plots["plot"], name="plot"))
    with TrialFile.create(path, name="Invented trial",
                          facts={"design": "rcbd", "crop": "wheat", "harvested_area_m2": 6.0,
                                 "standard_moisture_pct": 13.5}) as trial:
        trial.load_plots(entries=entries, plots=plots, traits=traits, values=values)
    return path


@pytest.fixture
def shoot():
    """shoot(widget, name): save a picture of a widget under tests/output/screenshots/."""
    def save(widget: QWidget, name: str) -> Path:
        SHOTS.mkdir(parents=True, exist_ok=True)
        target = SHOTS / f"{name}.png"
        assert widget.grab().save(str(target))
        return target
    return save


@pytest.fixture
def editor_of():
    """editor_of(view): the line edit open on one of the view's cells."""
    def find(view) -> QLineEdit:
        editors = [e for e in view.viewport().findChildren(QLineEdit) if e.isVisible()]
        assert len(editors) == 1, editors
        return editors[0]
    return find

