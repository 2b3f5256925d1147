"""The JSON form of a trial analysis: a documented contract, ``schema_version`` 1.

The layout is described in the README ("JSON output"). Fields are only ever added within a schema
version; a change to an existing field's meaning raises the version. Non-finite numbers (a test that
could not be computed) are written as ``null``.

A trial's trait also carries, for the REML-based analyses (design ``"alpha"``, a field-trend
adjustment, random entries), ``variance_components``, ``efficiency_vs_rcbd``, ``heritability``,
``spatial_options`` and ``field_trend`` (one record per plot with a value); they are empty lists
or null for the plain RCBD and CRD analyses.

``"kind"`` tells a single trial (``"trial"``) from a series over environments (``"series"``). A
series document has the same top-level keys, plus ``"sources"`` (each file and its checksum) and
``"environments"``; each trait adds the environment table, Bartlett's test, the combined ANOVA,
the entry tests, stability, variance components and heritability, ranks per environment and the
entry x environment means (see :func:`series_trait_to_dict`).
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import asdict
from pathlib import Path

from trialdesk.core.cautions import CAUTIONS
from trialdesk.core.results import TraitResult, TrialAnalysis
from trialdesk.core.series_results import SeriesAnalysis, SeriesTraitResult

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
        "spatial": result.spatial,
        "entries_random": result.entries_random,
        "variance_components": [asdict(v) for v in result.variance_components],
        "efficiency_vs_rcbd": result.efficiency_vs_rcbd,
        "heritability": result.heritability,
        "spatial_options": [asdict(o) for o in result.spatial_options],
        "field_trend": [asdict(p) for p in result.field_trend],
    })


def analysis_to_dict(analysis: TrialAnalysis) -> dict:
    """The whole analysis as plain JSON-ready data."""
    s = analysis.settings
    return _clean({
        "schema_version": SCHEMA_VERSION,
        "kind": "trial",
        "software_version": analysis.software_version,
        "source": analysis.source,
        "source_sha256": analysis.sha256,
        "design": s.design,
        "method": s.method,
        "alpha": s.alpha,
        "checks": list(s.checks),
        "check_direction": s.check_direction,
        "spatial": s.spatial,
        "entries_random": s.entries_random,
        "traits": [trait_to_dict(t) for t in analysis.traits],
        "warnings": list(analysis.warnings),
        "notes": list(analysis.notes),
        "cautions": CAUTIONS,
    })


def analysis_to_json(analysis: TrialAnalysis, *, indent: int | None = 2) -> str:
    """The analysis as a JSON text."""
    return json.dumps(analysis_to_dict(analysis), indent=indent, ensure_ascii=False,
                      allow_nan=False)


def series_checksum(sha256: tuple[str, ...] | list[str]) -> str:
    """One checksum for a series: the file's own for one file; for several, the SHA-256 of their
    checksums, one per line, in order.

    >>> series_checksum(["ab"])
    'ab'
    >>> series_checksum(["ab", "cd"]) == hashlib.sha256(b"ab\\ncd\\n").hexdigest()
    True
    """
    if len(sha256) == 1:
        return sha256[0]
    return hashlib.sha256("".join(f"{s}\n" for s in sha256).encode("ascii")).hexdigest()


def series_trait_to_dict(result: SeriesTraitResult) -> dict:
    """One trait's entry in a series document's ``traits`` list.

    ``entries``, ``comparisons`` and ``family`` read as for a single trial; ``ranks`` maps each
    entry to its rank per environment (in the order of ``environment_table``, null where not
    grown); ``stability`` has one row per entry grown in every environment; ``heritability`` is
    the entry-mean heritability with its formula and how the components were estimated.
    """
    comps = result.components
    return _clean({
        "trait": result.trait,
        "higher_is_better": result.higher_is_better,
        "decimals": result.decimals,
        "means_only": result.means_only,
        "n_environments": len(result.environment_table),
        "grand_mean": result.grand_mean,
        "cv_percent": result.cv_percent,
        "error_ms": result.error_ms,
        "error_df": result.error_df,
        "replicates": result.replicates,
        "sed": result.sed,
        "lsd": result.lsd,
        "environment_table": [asdict(r) for r in result.environment_table],
        "bartlett": None if result.bartlett is None else asdict(result.bartlett),
        "weighted": result.weighted,
        "combined_anova": [asdict(r) for r in result.anova],
        "entry_test_random": asdict(result.entry_test_random),
        "entry_test_fixed": (None if result.entry_test_fixed is None
                             else asdict(result.entry_test_fixed)),
        "entry_test_weighted": (None if result.entry_test_weighted is None
                                else asdict(result.entry_test_weighted)),
        "entries": [asdict(e) for e in result.entries],
        "comparisons": [asdict(c) for c in result.comparisons],
        "family": asdict(result.family),
        "stability": [s.to_dict() for s in result.stability],
        "variance_components": None if comps is None else comps.to_dict(),
        "heritability": None if comps is None else {
            "value": comps.heritability, "formula": comps.heritability_formula,
            "method": comps.method},
        "ranks": {entry: list(ranks) for entry, ranks in result.ranks},
        "cell_means": [asdict(c) for c in result.cell_means],
        "warnings": list(result.warnings),
        "notes": list(result.notes),
    })


def series_to_dict(analysis: SeriesAnalysis) -> dict:
    """A series analysis as plain JSON-ready data (``"kind": "series"``)."""
    s = analysis.settings
    return _clean({
        "schema_version": SCHEMA_VERSION,
        "kind": "series",
        "software_version": analysis.software_version,
        "source": ", ".join(analysis.sources),
        "source_sha256": series_checksum(analysis.sha256),
        "sources": [{"source": name, "sha256": sha}
                    for name, sha in zip(analysis.sources, analysis.sha256, strict=True)],
        "design": s.design,
        "method": s.method,
        "alpha": s.alpha,
        "checks": list(s.checks),
        "check_direction": s.check_direction,
        "environments": [{**asdict(e), "source": Path(e.source).name}
                         for e in analysis.environments],
        "traits": [series_trait_to_dict(t) for t in analysis.traits],
        "warnings": list(analysis.warnings),
        "notes": list(analysis.notes),
        "cautions": CAUTIONS,
    })


def series_to_json(analysis: SeriesAnalysis, *, indent: int | None = 2) -> str:
    """A series analysis as a JSON text."""
    return json.dumps(series_to_dict(analysis), indent=indent, ensure_ascii=False,
                      allow_nan=False)
