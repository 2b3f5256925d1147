"""The JSON form of a trial analysis: a documented contract, ``schema_version`` 1.

The layout is described in the README ("JSON output"). Fields are only ever added within a schema
version; a change to an existing field's meaning raises the version. Non-finite numbers (a test that
could not be computed) are written as ``null``.
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict

from trialdesk.core.cautions import CAUTIONS
from trialdesk.core.results import TraitResult, TrialAnalysis

SCHEMA_VERSION = 1


def _clean(value):
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    return value


def trait_to_dict(result: TraitResult) -> dict:
    """One trait's entry in the ``traits`` list."""
    return _clean({
        "trait": result.trait,
        "higher_is_better": result.higher_is_better,
        "decimals": result.decimals,
        "n_plots": result.n_plots,
        "n_missing": result.n_missing,
        "grand_mean": result.grand_mean,
        "cv_percent": result.cv_percent,
        "residual_ms": result.residual_ms,
        "residual_df": result.residual_df,
        "sem": result.sem,
        "sed": result.sed,
        "lsd": result.lsd,
        "anova": [asdict(r) for r in result.anova],
        "entries": [asdict(e) for e in result.entries],
        "comparisons": [asdict(c) for c in result.comparisons],
        "family": asdict(result.family),
        "diagnostics": {
            "flag_limit": result.diagnostics.flag_limit,
            "flagged_plots": [asdict(f) for f in result.diagnostics.flagged],
            "tests": [asdict(t) for t in result.diagnostics.tests],
        },
        "warnings": list(result.warnings),
    })


def analysis_to_dict(analysis: TrialAnalysis) -> dict:
    """The whole analysis as plain JSON-ready data."""
    s = analysis.settings
    return _clean({
        "schema_version": SCHEMA_VERSION,
        "software_version": analysis.software_version,
        "source": analysis.source,
        "source_sha256": analysis.sha256,
        "design": s.design,
        "method": s.method,
        "alpha": s.alpha,
        "checks": list(s.checks),
        "check_direction": s.check_direction,
        "traits": [trait_to_dict(t) for t in analysis.traits],
        "warnings": list(analysis.warnings),
        "notes": list(analysis.notes),
        "cautions": CAUTIONS,
    })


def analysis_to_json(analysis: TrialAnalysis, *, indent: int | None = 2) -> str:
    """The analysis as a JSON text."""
    return json.dumps(analysis_to_dict(analysis), indent=indent, ensure_ascii=False,
                      allow_nan=False)
