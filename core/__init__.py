"""Trialdesk core: reading field books and analysing variety trials. Never imports Qt.

The public names below are loaded on first use, so importing one small module of the core (or
running a batch command) does not pull in the whole package.

Examples
--------
>>> from trialdesk.core import DEMO_SETTINGS, analyze, demo_fieldbook_path, read_fieldbook
>>> result = analyze(read_fieldbook(demo_fieldbook_path()), DEMO_SETTINGS)
>>> [t.trait for t in result.traits]
['grain_yield', 'heading_days', 'plant_height', 'test_weight']
"""

from importlib import import_module

_PUBLIC = {
    "analyze": "analysis",
    "analyze_trait": "analysis",
    "DEMO_SETTINGS": "demo",
    "demo_fieldbook_path": "demo",
    "InputWarning": "errors",
    "TrialInputError": "errors",
    "FieldBook": "fieldbook",
    "TrialFile": "trialfile",
    "TrialLockedError": "trialfile",
    "read_fieldbook": "fieldbook",
    "analysis_to_dict": "json_output",
    "analysis_to_json": "json_output",
    "AnalysisSettings": "results",
    "AnovaRow": "results",
    "Comparison": "results",
    "Diagnostics": "results",
    "EntryMean": "results",
    "FamilyError": "results",
    "TrialAnalysis": "results",
    "TraitResult": "results",
    "analysis_text": "summary_text",
    "TrialReport": "report",
    "build_report": "report",
    "trial_context": "report",
    "write_workbook": "workbook",
    "SeriesAnalysis": "series_results",
    "analyze_series": "series",
    "read_series": "series",
    "series_from_trials": "series",
}

__all__ = sorted(_PUBLIC)


def __getattr__(name: str):
    if name in _PUBLIC:
        return getattr(import_module(f"trialdesk.core.{_PUBLIC[name]}"), name)
    raise AttributeError(f"module 'trialdesk.core' has no attribute {name!r}")


def __dir__() -> list[str]:
    return __all__
