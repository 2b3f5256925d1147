"""The bundled demo trial: an invented spring-wheat yield trial, used by ``trialdesk demo``.

Tallow Creek Field Station, 2026 main season: 23 test entries (codes TC26-xxx) and two checks
(CHK-1, CHK-2) in randomized complete blocks with 4 replicates, traits grain_yield (t/ha),
heading_days (days from sowing), plant_height (cm) and test_weight (kg/hl). Two yield plots and
one height plot are missing, and one yield plot holds a keying slip for the residual check to find.
All names and values are invented.
"""

from __future__ import annotations

from importlib.resources import as_file, files
from pathlib import Path

from trialdesk.core.results import AnalysisSettings

DEMO_SETTINGS = AnalysisSettings(
    design="rcbd",
    method="tukey",
    alpha=0.05,
    checks=("CHK-1", "CHK-2"),
    lower_is_better=("heading_days",),
)


def demo_fieldbook_path() -> Path:
    """Path of the demo field book (a CSV file installed with the package)."""
    resource = files("trialdesk.resources") / "demo_trial.csv"
    with as_file(resource) as path:
        return Path(path)
