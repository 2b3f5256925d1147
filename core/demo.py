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


#: The demo trial's facts (invented), as the demo trial file holds them.
DEMO_FACTS = {"name": "Tallow Creek AYT 2026", "station": "Tallow Creek Field Station",
              "season": "2026 main", "crop": "wheat", "design": "rcbd",
              "plot_length_m": 5.0, "plot_width_m": 1.5, "harvested_area_m2": 6.0,
              "standard_moisture_pct": 13.5}

#: Units and plausible ranges of the demo traits.
DEMO_TRAITS = {
    "grain_yield": {"unit": "t/ha", "low": 1.0, "high": 12.0},
    "heading_days": {"unit": "days", "low": 40, "high": 90},
    "plant_height": {"unit": "cm", "low": 40, "high": 150},
    "test_weight": {"unit": "kg/hl", "low": 60, "high": 88},
}


def demo_fieldbook_path() -> Path:
    """Path of the demo field book (a CSV file installed with the package)."""
    resource = files("trialdesk.resources") / "demo_trial.csv"
    with as_file(resource) as path:
        return Path(path)
