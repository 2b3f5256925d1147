"""A trial file seen as a field book: the plot data as analysed, derived traits computed.

The analysis, the exports and the reports all read a trial through :func:`fieldbook_from_trial`,
so a derived trait (grain yield from plot weight and moisture) is computed in one place, from the
trial's own harvested area and standard moisture.
"""

from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd

from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import FieldBook
from trialdesk.core.trialfile import TrialFile


def _conversion(recipe: dict, facts: dict, trait: str) -> dict:
    """The arguments of the yield conversion for a recipe: from the facts, or the crop's usual
    values (common practice) where the facts leave them out."""
    from trialdesk.core.yield_conversion import CROP_DEFAULTS

    if recipe.get("kind") != "grain_yield":
        raise TrialInputError(f"trait '{trait}' has a derivation this version does not know "
                              f"({recipe.get('kind')!r})")
    area = facts.get("harvested_area_m2")
    if not area:
        raise TrialInputError(f"trait '{trait}' is computed from plot weight and needs the "
                              "harvested area of a plot: set it in the trial facts")
    crop = CROP_DEFAULTS.get(str(facts.get("crop") or "").lower())
    standard = facts.get("standard_moisture_pct")
    if standard is None and crop is not None:
        standard = crop.standard_moisture_pct
    bushel = facts.get("test_weight") or (crop.bushel_weight_lb if crop else None)
    moisture = recipe.get("moisture")
    unit = recipe.get("unit", "t/ha")
    return {"harvested_area_m2": float(area), "weight_unit": recipe.get("weight_unit", "kg"),
            "unit": unit, "standard_moisture_pct": None if moisture is None else standard,
            "bushel_weight_lb": bushel if unit == "bu/ac" else None}


def _derive(values: pd.DataFrame, recipe: dict, facts: dict, trait: str) -> np.ndarray:
    from trialdesk.core.yield_conversion import grain_yield

    args = _conversion(recipe, facts, trait)
    moisture = recipe.get("moisture")
    return grain_yield(
        values[recipe["weight"]].to_numpy(dtype=float),
        args["harvested_area_m2"],
        weight_unit=args["weight_unit"],
        unit=args["unit"],
        moisture=None if moisture is None else values[moisture].to_numpy(dtype=float),
        standard_moisture_pct=args["standard_moisture_pct"],
        bushel_weight_lb=args["bushel_weight_lb"],
    )


def derivation_notes(trial: TrialFile) -> list[str]:
    """One sentence per derived trait saying how it was computed, for reports."""
    facts = trial.facts()
    notes = []
    for row in trial.traits().itertuples(index=False):
        if not row.derivation:
            continue
        args = _conversion(row.derivation, facts, row.name)
        text = (f"{row.name} ({args['unit']}) is computed from plot weight "
                f"'{row.derivation['weight']}' ({args['weight_unit']}) over a harvested area of "
                f"{args['harvested_area_m2']:g} m2")
        if args["standard_moisture_pct"] is not None:
            text += (f", adjusted to {args['standard_moisture_pct']:g}% moisture from "
                     f"'{row.derivation['moisture']}' by Y x (100 - M) / (100 - "
                     f"{args['standard_moisture_pct']:g})")
        if args["bushel_weight_lb"] is not None:
            text += f", at {args['bushel_weight_lb']:g} lb per bushel"
        notes.append(text + ".")
    return notes


def trial_values(trial: TrialFile) -> pd.DataFrame:
    """Plot values of every trait, derived traits computed; index = plot, in field order."""
    return with_derived(trial.values(), trial.traits(), trial.facts())


def with_derived(values: pd.DataFrame, traits: pd.DataFrame, facts: dict) -> pd.DataFrame:
    """``values`` with the derived traits' columns computed from the stored ones."""
    values = values.copy()
    for row in traits.itertuples(index=False):
        if row.derivation:
            values[row.name] = _derive(values, row.derivation, facts, row.name)
    return values


def data_checksum(plots: pd.DataFrame, values: pd.DataFrame) -> str:
    """SHA-256 of the plot data as analysed (labels and full-precision values, as CSV text)."""
    table = pd.concat([plots.reset_index(drop=True), values.reset_index(drop=True)], axis=1)
    text = table.to_csv(index=False, float_format="%.17g", lineterminator="\n")
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def fieldbook_from_trial(trial: TrialFile) -> FieldBook:
    """The trial's plots and values as a :class:`FieldBook`, ready for analysis.

    ``source`` is the trial file's path; ``sha256`` is the checksum of the plot data as analysed
    (a trial file changes with every edit, so its bytes would say little); ``source_row`` is
    unknown (NA) since the data did not come from a spreadsheet.
    """
    plots = trial.plots()
    values = trial_values(trial).reindex(plots["plot"])
    frame = pd.DataFrame({
        "entry": plots["entry"].astype(str).to_numpy(),
        "block": [None if pd.isna(b) else str(b) for b in plots["block"]],
        "plot": plots["plot"].astype(str).to_numpy(),
        "row": pd.array(plots["row"], dtype="Int64"),
        "column": pd.array(plots["column"], dtype="Int64"),
        "source_row": pd.array([pd.NA] * len(plots), dtype="Int64"),
    })
    roles = {"entry": "entry", "block": "block", "plot": "plot", "row": "row", "column": "column"}
    if plots["incomplete_block"].notna().any():  # an alpha design's blocks within replicates
        frame["incomplete_block"] = [None if pd.isna(b) else str(b)
                                     for b in plots["incomplete_block"]]
        roles["incomplete_block"] = "incomplete_block"
    values = values.reset_index(drop=True).astype(float)
    return FieldBook(
        plots=frame,
        values=values,
        traits=tuple(values.columns),
        roles=roles,
        source=str(trial.path),
        sha256=data_checksum(frame, values),
        sheet=None,
        warnings=(),
    )


def trial_settings(trial: TrialFile) -> dict:
    """The analysis settings of a trial: those saved in it, filled in from the trial itself.

    The design comes from the trial facts and the checks from the entries marked as checks,
    unless saved settings say otherwise. Which traits rank lowest first always comes from the
    traits table (its direction column is the one place that fact is edited).
    """
    entries = trial.entries()
    traits = trial.traits()
    derived = {
        "design": trial.facts().get("design") or "rcbd",
        "checks": [c for c, role in zip(entries["code"], entries["role"], strict=True)
                   if role == "check"],
        "lower_is_better": [t for t, hib in zip(traits["name"], traits["higher_is_better"],
                                                strict=True) if not hib],
    }
    saved = {k: v for k, v in (trial.settings() or {}).items() if k != "lower_is_better"}
    return {**derived, **saved}
