"""The open trial as the desktop program sees it: one object every view reads and edits through.

A :class:`TrialSession` owns the open :class:`~trialdesk.core.trialfile.TrialFile`, keeps a cache
of its tables for the views, writes every edit straight into the file (there is nothing to save),
and tells the views what changed through Qt signals. It holds no statistics of its own: the
analysis and the input checks come from trialdesk.core.
"""

from __future__ import annotations

import shutil
from collections.abc import Iterable
from pathlib import Path

import pandas as pd
from PySide6.QtCore import QObject, QStandardPaths, Signal

from trialdesk.core.errors import TrialInputError
from trialdesk.core.results import AnalysisSettings, TrialAnalysis
from trialdesk.core.trial_fieldbook import (
    fieldbook_from_trial,
    trial_settings,
    trial_values,
    with_derived,
)
from trialdesk.core.trialfile import TrialFile
from trialdesk.core.value_checks import Problem, check_plots, check_value

# Names a new trait cannot take: the plot fields shown beside the traits in the grid and in
# exported field books.
_PLOT_FIELDS = frozenset({"plot", "block", "entry", "incomplete_block", "row", "column", "name",
                          "role"})


def trait_kinds(traits: pd.DataFrame) -> dict[str, str]:
    """Which traits hold plot weights or moisture readings, read off the derived traits' recipes."""
    kinds: dict[str, str] = {}
    for recipe in traits["derivation"]:
        if isinstance(recipe, dict):
            if recipe.get("weight"):
                kinds[recipe["weight"]] = "weight"
            if recipe.get("moisture"):
                kinds[recipe["moisture"]] = "moisture"
    return kinds


def demo_trial_path() -> Path:
    """Where the demo trial lives for this user (made from the bundled field book on first use)."""
    folder = Path(QStandardPaths.writableLocation(QStandardPaths.StandardLocation.AppDataLocation))
    return folder / "demo" / "Tallow Creek AYT 2026.trial"


class TrialSession(QObject):
    """The open trial, its cached tables, the last results, and signals for the views.

    Signals
    -------
    opened : a trial was opened or closed; every view reloads.
    values_changed(list) : [(plot, trait), ...] whose values changed (by an edit, undo or redo).
    structure_changed : entries, traits, facts or plots changed; views rebuild.
    undo_changed(bool, bool) : whether undo and redo are possible now.
    settings_changed : the saved analysis settings changed.
    results_changed : new results, or the results went out of date (see ``results_stale``).
    problems_changed : the list of input problems changed.
    """

    opened = Signal()
    values_changed = Signal(list)
    structure_changed = Signal()
    undo_changed = Signal(bool, bool)
    settings_changed = Signal()
    results_changed = Signal()
    problems_changed = Signal()

    def __init__(self, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self.trial: TrialFile | None = None
        self.plots = pd.DataFrame()
        self.values = pd.DataFrame()
        self.traits = pd.DataFrame()
        self.entries = pd.DataFrame()
        self.facts: dict = {}
        self.results: TrialAnalysis | None = None
        self.results_stale = False
        self.problems: list[Problem] = []
        self.outlier_problems: list[Problem] = []  # the part of problems from the last analysis
        self._book = None  # the field book of the current data, built when first asked for
        self.results_book = None  # the field book the current results came from

    # --- opening and closing ------------------------------------------------------------------

    @property
    def path(self) -> Path | None:
        """The open trial file, or None."""
        return None if self.trial is None else self.trial.path

    @property
    def name(self) -> str:
        """The trial's name for the title bar."""
        if self.trial is None:
            return ""
        return str(self.facts.get("name") or self.trial.path.stem)

    def open(self, path: str | Path) -> None:
        """Open a trial file for editing (raises TrialInputError, e.g. when another holds it)."""
        trial = TrialFile.open(path)
        self.close()
        self.trial = trial
        self._reload()
        self.opened.emit()

    def open_demo(self) -> Path:
        """Open the demo trial, making it from the bundled field book the first time."""
        path = demo_trial_path()
        if not path.exists():
            make_demo_trial(path)
        self.open(path)
        return path

    def close(self) -> None:
        """Close the open trial (every edit is already in the file)."""
        if self.trial is not None:
            self.trial.close()
            self.trial = None
            self._book = self.results_book = None
            self.results = None
            self.results_stale = False
            self.opened.emit()

    def _reload(self) -> None:
        trial = self._require()
        self._book = None
        self.plots = trial.plots()
        self.traits = trial.traits()
        self.entries = trial.entries()
        self.facts = trial.facts()
        self.values = trial_values(trial)
        self._recheck()
        self.undo_changed.emit(trial.can_undo(), trial.can_redo())

    def _require(self) -> TrialFile:
        if self.trial is None:
            raise TrialInputError("no trial is open")
        return self.trial

    # --- editing --------------------------------------------------------------------------------

    def set_value(self, plot: str, trait: str, value: float | None) -> None:
        """Write one plot value at once (one undoable edit)."""
        self.set_values([(plot, trait, value)])

    def set_values(self, changes: Iterable[tuple[str, str, float | None]]) -> None:
        """Write several values as one undoable edit (a paste).

        A value the checks call an error (a negative weight, a moisture of 100 % or more) is
        refused with a TrialInputError naming the plot and trait, and nothing is written.
        """
        changes = list(changes)
        trial = self._require()
        for plot, trait, value in changes:
            errors = [p for p in self.check_typed(plot, trait, value) if p.severity == "error"]
            if errors:
                raise TrialInputError(errors[0].message, plot=plot, column=trait)
        trial.set_values(changes)
        for plot, trait, value in changes:
            self.values.at[plot, trait] = float("nan") if value is None else value
        self._values_refreshed(changes)

    def undo(self) -> bool:
        """Undo the last edit; True if there was one."""
        return self._step(self._require().undo)

    def redo(self) -> bool:
        """Redo the last undone edit; True if there was one."""
        return self._step(self._require().redo)

    def _step(self, action) -> bool:
        before = self.values.copy()
        done = action()
        if done:
            self.plots, self.entries = self.trial.plots(), self.trial.entries()
            self.traits, self.facts = self.trial.traits(), self.trial.facts()
            after = trial_values(self.trial)
            self.values = after
            changed = [(p, t) for t in after.columns for p in after.index
                       if t not in before.columns
                       or not _same(before.at[p, t], after.at[p, t])]
            self._mark_stale()
            self._recheck()
            self.values_changed.emit(changed)
            self.structure_changed.emit()
            self.settings_changed.emit()  # the step may have been a change of settings
        self.undo_changed.emit(self.trial.can_undo(), self.trial.can_redo())
        return done

    def _values_refreshed(self, changes: list[tuple[str, str, float | None]]) -> None:
        """After an edit: derived traits recomputed from the cache (no re-read of the file), and
        only the edited cells checked again, so an edit stays quick in a large trial."""
        trial = self._require()
        self.values = with_derived(self.values, self.traits, self.facts)
        derived = [t for t, d in zip(self.traits["name"], self.traits["derivation"], strict=True)
                   if isinstance(d, dict)]
        cells = [(p, t) for p, t, _ in changes]
        touched = set(cells)
        self._mark_stale()
        outliers = set(map(id, self.outlier_problems)) if self.results_stale else set()
        kept = [p for p in self.problems
                if (p.plot, p.trait) not in touched and id(p) not in outliers]
        fresh = [problem for plot, trait, value in changes
                 for problem in self.check_typed(plot, trait, value)]
        self.problems = kept + fresh
        self.problems_changed.emit()
        plots = {p for p, _ in cells}
        self.values_changed.emit(cells + [(p, t) for p in plots for t in derived])
        self.undo_changed.emit(trial.can_undo(), trial.can_redo())

    def set_facts(self, **facts) -> None:
        """Change trial facts (station, season, harvested area, ...)."""
        trial = self._require()
        trial.set_facts(**facts)
        self.facts = trial.facts()
        self.values = trial_values(trial)  # the harvested area changes derived yields
        self._mark_stale()
        self._recheck()  # the design decides whether an entry may repeat in a block
        self.structure_changed.emit()
        self.undo_changed.emit(trial.can_undo(), trial.can_redo())

    def update_entry(self, code: str, **fields) -> None:
        """Change an entry's name, role ("test"/"check") or origin."""
        trial = self._require()
        trial.upsert_entry(code, **fields)
        self.entries = trial.entries()
        self._mark_stale()
        self.structure_changed.emit()
        self.undo_changed.emit(trial.can_undo(), trial.can_redo())

    def add_entry(self, code: str, *, name: str = "", role: str = "test") -> None:
        """Add a new entry (refused when the code is empty or already listed)."""
        self._require()
        code = code.strip()
        if not code:
            raise TrialInputError("type the new entry's code first")
        known = {str(c).casefold(): str(c) for c in self.entries["code"]}
        if code.casefold() in known:
            raise TrialInputError(f"the trial already lists entry {known[code.casefold()]}")
        self.update_entry(code, name=name or None, role=role)

    def add_trait(self, name: str, *, unit: str | None = None,
                  higher_is_better: bool = True) -> None:
        """Add a new trait, with every plot's value missing until typed in."""
        trial = self._require()
        name = name.strip()
        if not name:
            raise TrialInputError("type the new trait's name first")
        taken = {str(t).casefold(): str(t) for t in self.traits["name"]}
        taken.update({field: field for field in _PLOT_FIELDS})
        if name.casefold() in taken:
            what = "a plot field" if name.casefold() in _PLOT_FIELDS else "a trait"
            raise TrialInputError(f"'{taken[name.casefold()]}' is already {what} of this trial")
        trial.upsert_trait(name, unit=unit or None, higher_is_better=higher_is_better)
        self.traits = trial.traits()
        self.values = trial_values(trial)
        self._mark_stale()
        self._recheck()
        self.structure_changed.emit()
        self.undo_changed.emit(trial.can_undo(), trial.can_redo())

    def update_trait(self, name: str, **fields) -> None:
        """Change a trait's unit, decimals, range or direction."""
        trial = self._require()
        trial.upsert_trait(name, **fields)
        self.traits = trial.traits()
        self._mark_stale()
        self._recheck()
        self.structure_changed.emit()
        self.undo_changed.emit(trial.can_undo(), trial.can_redo())

    # --- analysis -------------------------------------------------------------------------------

    def settings(self) -> AnalysisSettings:
        """The trial's analysis settings (saved ones, filled in from the trial)."""
        return AnalysisSettings.from_dict(trial_settings(self._require()))

    def save_settings(self, settings: AnalysisSettings) -> None:
        """Keep the analysis settings in the trial file."""
        trial = self._require()
        trial.save_settings(settings.to_dict())
        self.settings_changed.emit()
        self.undo_changed.emit(trial.can_undo(), trial.can_redo())  # settings are undoable

    def fieldbook(self):
        """The plot data as a field book for trialdesk.core.analysis (kept until the next edit;
        the analysis only reads it, so the worker thread and the views share one)."""
        if self._book is None:
            self._book = fieldbook_from_trial(self._require())
        return self._book

    def set_results(self, results: TrialAnalysis | None) -> None:
        """New results from an analysis run.

        They are current until the data change, and out of date at once when the data they
        were computed from (their checksum) are not the data now in the trial: an edit made
        while the analysis ran.
        """
        self.results = results
        self.results_stale = (results is not None and self.trial is not None
                              and results.sha256 != self.fieldbook().sha256)
        self.results_book = (self.fieldbook() if results is not None and not self.results_stale
                             else None)
        # Only the outlier part of the problem list depends on results: the input checks stand.
        dropped = set(map(id, self.outlier_problems))
        self.outlier_problems = self._outlier_problems()
        self.problems = [p for p in self.problems if id(p) not in dropped] + self.outlier_problems
        self.problems_changed.emit()
        self.results_changed.emit()

    def _mark_stale(self) -> None:
        self._book = None  # every edit goes through here: the data are no longer the book's
        if self.results is not None and not self.results_stale:
            self.results_stale = True
            self.results_changed.emit()

    # --- input checks ---------------------------------------------------------------------------

    def cell_problems(self, plot: str, trait: str) -> list[Problem]:
        """Problems of one cell (for its mark and tooltip)."""
        return [p for p in self.problems if p.plot == plot and p.trait == trait]

    def _recheck(self) -> None:
        if self.trial is None:
            self.problems = []
        else:
            kinds = trait_kinds(self.traits)
            traits = self.traits.assign(kind=[kinds.get(t) for t in self.traits["name"]])
            stored = [t for t, d in zip(traits["name"], traits["derivation"], strict=True)
                      if not isinstance(d, dict)]
            values = self.values[stored].reset_index(drop=True)
            self.problems = check_plots(self.plots.reset_index(drop=True), values,
                                        traits[traits["name"].isin(stored)],
                                        design=str(self.facts.get("design") or "rcbd"))
            self.outlier_problems = self._outlier_problems()
            self.problems += self.outlier_problems
        self.problems_changed.emit()

    def _outlier_problems(self) -> list[Problem]:
        if self.results is None or self.results_stale:
            return []
        out = []
        for result in self.results.traits:
            for flag in result.diagnostics.flagged:
                out.append(Problem(
                    severity="warning", plot=flag.plot, trait=result.trait, row=None,
                    message=f"studentized residual {flag.studentized_residual:.2f} in the last "
                            f"analysis (fitted {flag.fitted:.4g}): check it in the field book"))
        return out

    def check_typed(self, plot: str, trait: str, value: float | None) -> list[Problem]:
        """What the checks would say of a value before it is written (for the editor)."""
        row = self.traits.set_index("name").loc[trait]
        kind = trait_kinds(self.traits).get(trait)
        return check_value(value, trait=trait, low=_num(row["low"]), high=_num(row["high"]),
                           kind=kind, plot=plot)


def _same(a, b) -> bool:
    return (pd.isna(a) and pd.isna(b)) or a == b


def _num(value) -> float | None:
    return None if value is None or pd.isna(value) else float(value)


def make_demo_trial(path: Path) -> None:
    """Import the bundled demo field book into a trial file at ``path``."""
    from trialdesk.core.demo import DEMO_FACTS, DEMO_SETTINGS, DEMO_TRAITS, demo_fieldbook_path
    from trialdesk.core.fieldbook import read_fieldbook
    from trialdesk.core.importer import import_fieldbook

    path.parent.mkdir(parents=True, exist_ok=True)
    temp = path.with_name(f".new-{path.name}")
    for leftover in (temp, Path(f"{temp}.lock")):
        leftover.unlink(missing_ok=True)
    import_fieldbook(read_fieldbook(demo_fieldbook_path()), temp,
                     facts=DEMO_FACTS, checks=DEMO_SETTINGS.checks,
                     lower_is_better=DEMO_SETTINGS.lower_is_better, trait_fields=DEMO_TRAITS)
    shutil.move(temp, path)
