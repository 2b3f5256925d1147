"""Field book into trial file: a new trial, or a re-import that shows what would change first.

The source file is only ever read. A new trial is loaded in one transaction, so an import either
happens whole or not at all. A re-import into an existing trial first builds a plan (values that
would change, traits that would be added) and changes nothing until the plan is applied; the
changed values then go in as one undoable edit.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from trialdesk.core.decimals import recorded_decimals
from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import FieldBook
from trialdesk.core.trialfile import TrialFile


@dataclass(frozen=True, slots=True, kw_only=True)
class YieldRecipe:
    """A grain-yield trait derived from plot weight (see trialdesk.core.yield_conversion).

    ``weight`` and ``moisture`` name trait columns of the field book; the harvested area and
    standard moisture come from the trial facts.
    """

    name: str = "grain_yield"
    weight: str
    weight_unit: str = "kg"
    moisture: str | None = None
    unit: str = "t/ha"

    def as_derivation(self) -> dict:
        """The recipe as stored in the trial file's traits table."""
        return {"kind": "grain_yield", "weight": self.weight, "weight_unit": self.weight_unit,
                "moisture": self.moisture, "unit": self.unit}


@dataclass(frozen=True, slots=True, kw_only=True)
class ImportReport:
    """What an import read: counts, missing values per trait and the warnings."""

    source: str
    trial: str
    n_plots: int
    n_entries: int
    n_blocks: int
    traits: tuple[str, ...]
    missing: dict[str, int]
    checks: tuple[str, ...]
    warnings: tuple[str, ...]

    def text(self) -> str:
        """The report as the command line prints it."""
        lines = [
            f"Read {self.source}: {self.n_plots} plots, {self.n_entries} entries, "
            f"{self.n_blocks} blocks, {len(self.traits)} traits.",
        ]
        for trait in self.traits:
            lines.append(f"  {trait}: {self.missing.get(trait, 0)} missing")
        if self.checks:
            lines.append(f"  checks: {', '.join(self.checks)}")
        lines += [f"  warning: {w}" for w in self.warnings]
        lines.append(f"Wrote {self.trial}.")
        return "\n".join(lines)


def _entries_frame(book: FieldBook, checks: Sequence[str]) -> pd.DataFrame:
    codes = list(dict.fromkeys(book.plots["entry"].tolist()))
    missing = [c for c in checks if c not in codes]
    if missing:
        raise TrialInputError(f"check {', '.join(repr(c) for c in missing)} is not an entry of "
                              "this field book", file=book.source)
    return pd.DataFrame({"code": codes, "name": [None] * len(codes),
                         "role": ["check" if c in checks else "test" for c in codes],
                         "origin": [None] * len(codes)})


def _plots_frame(book: FieldBook) -> pd.DataFrame:
    plots = book.plots
    return pd.DataFrame({
        "plot": plots["plot"].astype(str).to_numpy(),
        "block": [None if pd.isna(b) else str(b) for b in plots["block"]],
        "incomplete_block": ([None if pd.isna(b) else str(b) for b in plots["incomplete_block"]]
                             if "incomplete_block" in plots else [None] * len(plots)),
        "row": plots["row"].to_numpy(dtype=object),
        "column": plots["column"].to_numpy(dtype=object),
        "entry": plots["entry"].astype(str).to_numpy(),
    })


def _traits_frame(book: FieldBook, lower_is_better: Sequence[str],
                  recipe: YieldRecipe | None, trait_fields: dict) -> pd.DataFrame:
    rows = [{"name": t, "unit": None, "decimals": recorded_decimals(book.values[t]), "low": None,
             "high": None, "higher_is_better": t not in lower_is_better, "derivation": None,
             **trait_fields.get(t, {})}
            for t in book.traits]
    if recipe is not None:
        for wanted in (recipe.weight, recipe.moisture):
            if wanted is not None and wanted not in book.traits:
                raise TrialInputError(f"there is no column '{wanted}' to derive yield from; the "
                                      f"traits are: {', '.join(book.traits)}", file=book.source)
        if recipe.name in book.traits:
            raise TrialInputError(f"the field book already has a column '{recipe.name}'; give the "
                                  "derived yield another name", file=book.source)
        rows.append({"name": recipe.name, "unit": recipe.unit, "decimals": 2, "low": None,
                     "high": None, "higher_is_better": True,
                     "derivation": recipe.as_derivation()})
    return pd.DataFrame(rows)


def _with_crop_defaults(facts: dict) -> dict:
    from trialdesk.core.yield_conversion import CROP_DEFAULTS

    crop = CROP_DEFAULTS.get(str(facts.get("crop") or "").strip().lower())
    if crop is None:
        return facts
    filled = dict(facts)
    if filled.get("standard_moisture_pct") is None:
        filled["standard_moisture_pct"] = crop.standard_moisture_pct
    if filled.get("test_weight") is None and crop.bushel_weight_lb is not None:
        filled["test_weight"] = crop.bushel_weight_lb
    return filled


def _value_problems(book: FieldBook, traits: pd.DataFrame, recipe: YieldRecipe | None,
                    design: str) -> list[str]:
    """The value checks of the grid, run once on the imported plots (weights, moisture, ranges).

    Duplicate plots and entries twice in a block were already refused by the reader, so only the
    value problems are reported here."""
    from trialdesk.core.value_checks import check_plots

    kinds = {}
    if recipe is not None:
        kinds[recipe.weight] = "weight"
        if recipe.moisture:
            kinds[recipe.moisture] = "moisture"
    stored = traits[traits["derivation"].isna()]
    limits = pd.DataFrame({"name": stored["name"], "low": stored["low"], "high": stored["high"],
                           "kind": [kinds.get(t) for t in stored["name"]]})
    found = check_plots(book.plots, book.values[list(stored["name"])], limits,
                        design=design if design in ("rcbd", "crd") else "rcbd")
    return [f"{p.severity}: plot {p.plot}, {p.trait}: {p.message}" for p in found if p.trait]


def import_fieldbook(
    book: FieldBook,
    output: str | Path,
    *,
    facts: dict | None = None,
    checks: Sequence[str] = (),
    lower_is_better: Sequence[str] = (),
    recipe: YieldRecipe | None = None,
    trait_fields: dict[str, dict] | None = None,
) -> ImportReport:
    """Create the trial file ``output`` from a field book already read.

    ``facts`` are trial facts (station, season, crop, harvested_area_m2, standard_moisture_pct,
    ...); the trial's name defaults to the field book's file name. ``trait_fields`` gives traits
    their unit, range or decimals (``{"plant_height": {"unit": "cm", "low": 30}}``). When yield is
    derived and no standard moisture or bushel weight is given, the crop's usual values are
    stored with the trial, so reports can say which were used. The output must not exist.
    """
    output = Path(output)
    if output.exists():
        raise TrialInputError("the trial file exists already; re-import into it to update it, "
                              "or choose a new name", file=str(output))
    facts = dict(facts or {})
    name = facts.pop("name", None) or Path(book.source).stem
    entries = _entries_frame(book, checks)
    plots = _plots_frame(book)
    traits = _traits_frame(book, lower_is_better, recipe, trait_fields or {})
    if recipe is not None:
        facts = _with_crop_defaults(facts)
    problems = _value_problems(book, traits, recipe, str(facts.get("design") or "rcbd"))
    values = book.values.copy()
    values.index = plots["plot"].to_numpy()
    if recipe is not None:
        values[recipe.name] = np.nan  # derived on reading, from the weights and the facts
    trial = TrialFile.create(output, name=name, facts=facts)
    try:
        with trial:
            trial.load_plots(entries=entries, plots=plots, traits=traits, values=values,
                             source=Path(book.source).name)
            if checks:  # keep the checks in the order the user named them
                trial.save_settings({"checks": list(checks)})
    except BaseException:
        output.unlink(missing_ok=True)
        for suffix in ("-wal", "-shm", ".lock"):
            Path(f"{output}{suffix}").unlink(missing_ok=True)
        raise
    return ImportReport(
        source=Path(book.source).name,
        trial=str(output),
        n_plots=len(plots),
        n_entries=len(entries),
        n_blocks=plots["block"].nunique(dropna=True),
        traits=tuple(traits["name"]),
        missing={t: int(book.values[t].isna().sum()) for t in book.traits},
        checks=tuple(checks),
        warnings=(*(str(w) for w in book.warnings), *problems),
    )


@dataclass(frozen=True, slots=True, kw_only=True)
class ReimportPlan:
    """What re-importing a field book into an existing trial would change.

    ``changes`` lists (plot, trait, old, new) for values that differ; ``new_traits`` the traits the
    field book adds; ``unchanged`` counts the values that are the same; ``absent_plots`` the
    trial's plots the field book does not have (they are left as they are).
    """

    changes: tuple[tuple[str, str, float | None, float | None], ...]
    new_traits: tuple[str, ...]
    unchanged: int
    absent_plots: tuple[str, ...] = field(default=())

    @property
    def is_empty(self) -> bool:
        """True when applying the plan would change nothing."""
        return not self.changes and not self.new_traits

    def text(self, limit: int = 30) -> str:
        """The plan as the command line prints it."""
        if self.is_empty:
            return f"Nothing would change: all {self.unchanged} values are the same."
        lines = [f"{len(self.changes)} values would change ({self.unchanged} unchanged)"
                 + (f"; new traits: {', '.join(self.new_traits)}" if self.new_traits else "")
                 + ":"]
        show = lambda v: "missing" if v is None else f"{v:g}"  # noqa: E731
        for plot, trait, old, new in self.changes[:limit]:
            lines.append(f"  plot {plot}, {trait}: {show(old)} -> {show(new)}")
        if len(self.changes) > limit:
            lines.append(f"  ... and {len(self.changes) - limit} more")
        if self.absent_plots:
            lines.append(f"  {len(self.absent_plots)} plots of the trial are not in the field "
                         "book and stay as they are")
        return "\n".join(lines)


def _same(a: float | None, b: float | None) -> bool:
    if a is None or b is None:
        return a is None and b is None
    return a == b


def _value(x) -> float | None:
    return None if pd.isna(x) else float(x)


def plan_reimport(trial: TrialFile, book: FieldBook) -> ReimportPlan:
    """Compare a field book with the trial, changing nothing."""
    plots = trial.plots().set_index("plot")
    incoming = _plots_frame(book).set_index("plot")
    unknown = [p for p in incoming.index if p not in plots.index]
    if unknown:
        raise TrialInputError(
            f"the field book has plots the trial does not have ({', '.join(unknown[:10])}"
            f"{' ...' if len(unknown) > 10 else ''}); plots are laid out when a trial is made, so "
            "import this field book as a new trial", file=book.source)
    moved = [p for p in incoming.index if incoming.at[p, "entry"] != plots.at[p, "entry"]]
    if moved:
        p = moved[0]
        raise TrialInputError(
            f"plot {p} holds entry '{incoming.at[p, 'entry']}' in the field book but "
            f"'{plots.at[p, 'entry']}' in the trial ({len(moved)} plots differ); the layout "
            "cannot change by re-import", file=book.source, plot=p)
    current = trial.values()
    traits = list(trial.traits()["name"])
    new_traits = tuple(t for t in book.traits if t not in traits)
    changes, unchanged = [], 0
    for trait in book.traits:
        column = book.values[trait].to_numpy()
        for plot, new in zip(incoming.index, column, strict=True):
            new = _value(new)
            old = None if trait in new_traits else _value(current.at[plot, trait])
            if _same(old, new):
                unchanged += 1
            else:
                changes.append((plot, trait, old, new))
    absent = tuple(p for p in plots.index if p not in incoming.index)
    return ReimportPlan(changes=tuple(changes), new_traits=new_traits, unchanged=unchanged,
                        absent_plots=absent)


def apply_reimport(trial: TrialFile, book: FieldBook, plan: ReimportPlan) -> None:
    """Apply a plan made by :func:`plan_reimport`: new traits first, then the values as one edit."""
    for trait in plan.new_traits:
        trial.upsert_trait(trait, decimals=recorded_decimals(book.values[trait]),
                           higher_is_better=True)
    if plan.changes:
        trial.set_values((plot, trait, new) for plot, trait, _, new in plan.changes)
