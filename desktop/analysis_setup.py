"""The analysis set-up: design, traits, method, level and checks, with a live read-out.

Every choice is written to the trial at once through ``session.save_settings`` (there is nothing
to save). The read-out beside the choices says what they mean for this trial: how many
comparisons the method makes, how likely that many unadjusted tests are to show a false
difference, the level each comparison is then tested at, and the smallest difference between two
entries the trial can declare. Its numbers come from trialdesk.core.planning.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import pandas as pd
from PySide6.QtCore import (
    QAbstractListModel,
    QModelIndex,
    QObject,
    QPersistentModelIndex,
    Qt,
    Signal,
)
from PySide6.QtWidgets import (
    QCheckBox,
    QComboBox,
    QDoubleSpinBox,
    QFormLayout,
    QGridLayout,
    QGroupBox,
    QHBoxLayout,
    QLabel,
    QListView,
    QPushButton,
    QToolButton,
    QVBoxLayout,
    QWidget,
)

from trialdesk.core import planning
from trialdesk.core.errors import TrialInputError
from trialdesk.core.padjust import familywise_error
from trialdesk.core.results import AnalysisSettings
from trialdesk.core.separation import METHOD_NAMES, METHODS
from trialdesk.desktop.analysis_runner import QUICK_PLOTS, Background
from trialdesk.desktop.palette import ERROR_FG
from trialdesk.desktop.session import TrialSession

AnyIndex = QModelIndex | QPersistentModelIndex

DESIGNS = {"rcbd": "Randomized complete blocks (RCBD)", "crd": "Completely randomized (CRD)",
           "alpha": "Alpha lattice (incomplete blocks in each replicate)"}
#: Field-trend adjustments, as the set-up words them.
TRENDS = {"none": "None: blocks only",
          "rowcol": "Field rows and columns (random effects)",
          "papadakis": "Neighbouring plots (Papadakis covariate)"}
DIRECTIONS = {"both": "Both ways: above or below the checks",
              "above": "One way: is the entry above the checks?",
              "below": "One way: is the entry below the checks?"}
ALPHAS = (0.10, 0.05, 0.01)


class CheckList(QAbstractListModel):
    """A list of items the breeder ticks (traits to analyse, check varieties).

    Each item is ``(key, text)``; ``ticked`` holds the keys ticked. ``keep_one`` refuses to untick
    the last ticked item. ``changed`` is emitted after the breeder ticks or unticks one.
    """

    changed = Signal()

    def __init__(self, keep_one: bool = False, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self.items: list[tuple[str, str]] = []
        self.ticked: set[str] = set()
        self.keep_one = keep_one

    def set_items(self, items: list[tuple[str, str]], ticked: set[str]) -> None:
        self.beginResetModel()
        self.items = list(items)
        self.ticked = set(ticked) & {k for k, _ in items}
        self.endResetModel()

    def keys(self) -> list[str]:
        """Ticked keys, in list order."""
        return [k for k, _ in self.items if k in self.ticked]

    def rowCount(self, parent: AnyIndex = QModelIndex()) -> int:  # noqa: B008, N802
        return 0 if parent.isValid() else len(self.items)

    def data(self, index: AnyIndex, role: int = Qt.ItemDataRole.DisplayRole) -> Any:
        if not index.isValid():
            return None
        key, text = self.items[index.row()]
        if role == Qt.ItemDataRole.DisplayRole:
            return text
        if role == Qt.ItemDataRole.CheckStateRole:
            return Qt.CheckState.Checked if key in self.ticked else Qt.CheckState.Unchecked
        if role == Qt.ItemDataRole.UserRole:
            return key
        return None

    def flags(self, index: AnyIndex) -> Qt.ItemFlag:
        return (Qt.ItemFlag.ItemIsEnabled | Qt.ItemFlag.ItemIsSelectable
                | Qt.ItemFlag.ItemIsUserCheckable)

    def setData(self, index: AnyIndex, value: Any,  # noqa: N802
                role: int = Qt.ItemDataRole.EditRole) -> bool:
        if role != Qt.ItemDataRole.CheckStateRole or not index.isValid():
            return False
        key = self.items[index.row()][0]
        on = Qt.CheckState(value) == Qt.CheckState.Checked
        if not on and self.keep_one and self.ticked == {key}:
            return False
        if on:
            self.ticked.add(key)
        else:
            self.ticked.discard(key)
        self.dataChanged.emit(index, index, [Qt.ItemDataRole.CheckStateRole])
        self.changed.emit()
        return True

    def tick(self, key: str, on: bool = True) -> bool:
        """Tick or untick ``key`` as the breeder would (for keyboard use and tests)."""
        row = [k for k, _ in self.items].index(key)
        state = Qt.CheckState.Checked if on else Qt.CheckState.Unchecked
        return self.setData(self.index(row), state.value, Qt.ItemDataRole.CheckStateRole)


@dataclass(frozen=True, slots=True)
class Readout:
    """The numbers of the read-out (or ``problem``, why they cannot be worked out)."""

    n_entries: int
    n_checks: int
    m: int
    familywise: float
    levels: tuple[float, float] | None = None
    difference: float | tuple[float, float] | None = None
    precision: planning.Precision | None = None
    trait: str | None = None
    problem: str | None = None


def compute_readout(settings: AnalysisSettings, n_entries: int, trait: str | None,
                    precision: planning.Precision | str | None) -> Readout:
    """The read-out's numbers for ``settings`` (pure; may run in a worker thread).

    ``precision`` is that of ``trait`` (None when no trait is ticked), or the message saying why
    the trait could not be fitted.
    """
    n_checks = len(settings.checks)
    m = planning.comparisons(n_entries, settings.method, n_checks)
    familywise = familywise_error(settings.alpha, m)
    base = {"n_entries": n_entries, "n_checks": n_checks, "m": m, "familywise": familywise,
            "trait": trait}
    if not isinstance(precision, planning.Precision):
        return Readout(**base, problem=None if precision is None else f"{trait}: {precision}")
    args = {"n_checks": n_checks, "check_direction": settings.check_direction}
    try:
        levels = planning.per_comparison_levels(settings.method, settings.alpha, n_entries,
                                                precision.residual_df, **args)
        difference = planning.detectable_difference_percent(
            precision.cv_percent, precision.replicates, precision.residual_df,
            method=settings.method, alpha=settings.alpha, n_entries=n_entries, **args)
    except TrialInputError as error:
        return Readout(**base, precision=precision, problem=error.message)
    return Readout(**base, precision=precision, levels=levels, difference=difference)


def _is_slow(settings: AnalysisSettings) -> bool:
    """Dunnett with several checks simulates its critical value: a second or two, once."""
    return settings.method == "dunnett" and len(settings.checks) > 1


def _level(value: float) -> str:
    """A per-comparison level to two significant figures, in decimals down to 1e-6."""
    if value < 1e-6:
        return f"{value:.1e}"
    return f"{value:.{max(1 - math.floor(math.log10(value)), 0)}f}".rstrip("0")


class AnalysisSetup(QWidget):
    """Set-up of the analysis of the session's trial.

    Signals
    -------
    run_requested(AnalysisSettings) : the breeder pressed "Run analysis".
    readout_updated() : the read-out shows numbers for the current choices.
    """

    run_requested = Signal(object)
    readout_updated = Signal()

    def __init__(self, session: TrialSession, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.session = session
        self._loading = False
        # CV% and df per (trait, design) for the data as they stand (cleared on every edit).
        self._precision: dict[tuple[str | None, str], planning.Precision | str] = {}
        self._data_version = 0
        self._refresh_when_shown = False
        self.background = Background(self)
        self.readout: Readout | None = None
        self._build()
        session.opened.connect(self._reload)
        session.structure_changed.connect(self._reload)
        session.settings_changed.connect(self._settings_changed)
        session.values_changed.connect(self._values_changed)
        session.results_changed.connect(self._results_changed)
        self._reload()

    # --- building -----------------------------------------------------------------------------

    def _build(self) -> None:
        self.design_box = QComboBox()
        for key, text in DESIGNS.items():
            self.design_box.addItem(text, key)
        self.method_box = QComboBox()
        for key in METHODS:
            self.method_box.addItem(METHOD_NAMES[key], key)
        self.method_words = QLabel()
        self.method_words.setWordWrap(True)
        self.alpha_box = QDoubleSpinBox()
        self.alpha_box.setDecimals(3)
        self.alpha_box.setRange(0.001, 0.2)
        self.alpha_box.setSingleStep(0.01)
        self.alpha_box.setKeyboardTracking(False)
        alpha_row = QHBoxLayout()
        alpha_row.addWidget(self.alpha_box)
        self.alpha_buttons = []
        for value in ALPHAS:
            button = QToolButton()
            button.setText(f"{value:.2f}")
            button.clicked.connect(lambda _=False, v=value: self.alpha_box.setValue(v))
            alpha_row.addWidget(button)
            self.alpha_buttons.append(button)
        alpha_row.addStretch(1)
        self.direction_box = QComboBox()
        for key, text in DIRECTIONS.items():
            self.direction_box.addItem(text, key)
        self.direction_note = QLabel("Only Dunnett's comparisons with the checks can be "
                                     "one-sided.")
        self.direction_note.setWordWrap(True)
        self.trend_box = QComboBox()
        for key, text in TRENDS.items():
            self.trend_box.addItem(text, key)
        self.trend_box.setToolTip("Adjust the entry means for field trend, using each plot's row "
                                  "and column; the results compare it with the plain analysis")
        self.random_box = QCheckBox("Rank entries as random effects (BLUPs, for early "
                                    "generations; no mean separation)")

        form = QFormLayout()
        form.addRow("Design:", self.design_box)
        form.addRow("Method:", self.method_box)
        form.addRow("", self.method_words)
        form.addRow("Alpha:", alpha_row)
        form.addRow("Check comparisons:", self.direction_box)
        form.addRow("", self.direction_note)
        form.addRow("Field trend:", self.trend_box)
        form.addRow("", self.random_box)
        choices = QGroupBox("How to analyse")
        choices.setLayout(form)

        self.trait_model = CheckList(keep_one=True, parent=self)
        self.trait_list = QListView()
        self.trait_list.setModel(self.trait_model)
        traits = QGroupBox("Traits to analyse")
        QVBoxLayout(traits).addWidget(self.trait_list)
        self.check_model = CheckList(parent=self)
        self.check_list = QListView()
        self.check_list.setModel(self.check_model)
        checks = QGroupBox("Check varieties")
        QVBoxLayout(checks).addWidget(self.check_list)

        self.readout_labels = {key: QLabel() for key in
                               ("entries", "comparisons", "familywise", "level", "difference",
                                "basis")}
        readout_form = QFormLayout()
        for key, title in (("entries", "Entries:"), ("comparisons", "Comparisons:"),
                           ("familywise", "Unadjusted risk:"), ("level", "Each comparison at:"),
                           ("difference", "Smallest difference:"), ("basis", "Based on:")):
            label = self.readout_labels[key]
            label.setWordWrap(True)
            if key == "difference":
                font = label.font()
                font.setBold(True)
                label.setFont(font)
            label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
            readout_form.addRow(title, label)
        readout = QGroupBox("What these choices mean for this trial")
        readout.setLayout(readout_form)

        self.problem = QLabel()
        self.problem.setWordWrap(True)
        self.problem.setStyleSheet(f"color: {ERROR_FG.name()};")
        self.run_button = QPushButton("Run analysis")
        self.run_button.setDefault(True)
        self.run_button.setMinimumHeight(32)
        self.run_button.clicked.connect(self._run)
        run_row = QHBoxLayout()
        run_row.addWidget(self.problem, 1)
        run_row.addWidget(self.run_button)

        grid = QGridLayout(self)
        grid.addWidget(choices, 0, 0)
        grid.addWidget(traits, 0, 1)
        grid.addWidget(checks, 0, 2, 3, 1)
        grid.addWidget(readout, 1, 0, 1, 2)
        grid.addLayout(run_row, 3, 0, 1, 3)
        grid.setColumnStretch(0, 3)
        grid.setColumnStretch(1, 2)
        grid.setColumnStretch(2, 2)
        grid.setRowStretch(2, 1)  # spare height below the read-out, beside the checks

        self.design_box.currentIndexChanged.connect(self._changed)
        self.method_box.currentIndexChanged.connect(self._changed)
        self.alpha_box.valueChanged.connect(self._changed)
        self.direction_box.currentIndexChanged.connect(self._changed)
        self.trend_box.currentIndexChanged.connect(self._changed)
        self.random_box.toggled.connect(self._changed)
        self.trait_model.changed.connect(self._changed)
        self.check_model.changed.connect(self._changed)

    # --- reading and writing the settings ---------------------------------------------------

    def current_settings(self) -> AnalysisSettings:
        """The settings as chosen on screen.

        All traits ticked is saved as "all traits" (an empty list), so traits added later are
        analysed too. Which traits rank lowest first comes from the trial's traits table.
        """
        traits = self.trait_model.keys()
        all_traits = [k for k, _ in self.trait_model.items]
        table = self.session.traits
        lower = tuple(t for t, higher in zip(table["name"], table["higher_is_better"],
                                             strict=True) if not higher)
        return AnalysisSettings(
            design=self.design_box.currentData(),
            method=self.method_box.currentData(),
            alpha=round(self.alpha_box.value(), 3),
            checks=tuple(self.check_model.keys()),
            check_direction=self.direction_box.currentData(),
            traits=() if traits == all_traits else tuple(traits),
            lower_is_better=lower,
            spatial=self.trend_box.currentData(),
            entries_random=self.random_box.isChecked(),
        )

    def _reload(self) -> None:
        """Fill the widgets from the session's trial and its saved settings."""
        self._precision = {}
        open_ = self.session.trial is not None
        self.setEnabled(open_)
        if not open_:
            return
        settings = self.session.settings()
        self._loading = True
        try:
            self._show_settings(settings)
        finally:
            self._loading = False
        self._refresh_readout()

    def _show_settings(self, settings: AnalysisSettings) -> None:
        session = self.session
        self.design_box.setCurrentIndex(self.design_box.findData(settings.design))
        self.method_box.setCurrentIndex(self.method_box.findData(settings.method))
        self.alpha_box.setValue(settings.alpha)
        self.direction_box.setCurrentIndex(self.direction_box.findData(settings.check_direction))
        self.trend_box.setCurrentIndex(max(self.trend_box.findData(settings.spatial), 0))
        self.random_box.setChecked(settings.entries_random)
        table = session.traits
        items = []
        for row in table.itertuples(index=False):
            unit = "" if pd.isna(row.unit) else f" ({row.unit})"
            direction = "higher is better" if row.higher_is_better else "lower is better"
            items.append((row.name, f"{row.name}{unit}, {direction}"))
        wanted = set(settings.traits) if settings.traits else {k for k, _ in items}
        self.trait_model.set_items(items, wanted)
        entries = []
        for row in session.entries.itertuples(index=False):
            name = "" if pd.isna(row.name) else f"  {row.name}"
            role = "  (check)" if row.role == "check" else ""
            entries.append((row.code, f"{row.code}{name}{role}"))
        self.check_model.set_items(entries, set(settings.checks))
        self._show_method()

    def _show_method(self) -> None:
        method = self.method_box.currentData()
        self.method_words.setText(planning.method_sentence(method))
        dunnett = method == "dunnett"
        self.direction_box.setEnabled(dunnett)
        self.direction_note.setVisible(not dunnett)

    def _changed(self) -> None:
        if self._loading:
            return
        self._show_method()
        self.session.save_settings(self.current_settings())
        self._refresh_readout()

    def _settings_changed(self) -> None:
        """Saved elsewhere (or by us): show them if they differ from the screen."""
        if self.session.trial is None:
            return
        saved = self.session.settings()
        if saved.to_dict() != self.current_settings().to_dict() and not self._loading:
            self._loading = True
            try:
                self._show_settings(saved)
            finally:
                self._loading = False
            self._refresh_readout()

    def _values_changed(self, cells: list) -> None:
        self._precision = {}
        self._data_version += 1
        if self.isVisible():
            self._refresh_readout()
        else:  # no fit for every edit made elsewhere while the set-up is not on show
            self._refresh_when_shown = True

    def _results_changed(self) -> None:
        if self.isVisible():
            self._refresh_readout()
        else:  # worked out when the set-up is next on show, not while the results arrive
            self._refresh_when_shown = True

    def showEvent(self, event) -> None:  # noqa: N802
        super().showEvent(event)
        if self._refresh_when_shown:
            self._refresh_readout()

    # --- the read-out -------------------------------------------------------------------------

    def _refresh_readout(self) -> None:
        """Work the read-out out for the choices on screen: here when it is quick, in the
        background for a simulated Dunnett critical value or the fit of a large trial."""
        self._refresh_when_shown = False
        if self.session.trial is None:
            return
        settings = self.current_settings()
        traits = self.trait_model.keys()
        trait = traits[0] if traits else None
        key = (trait, settings.design)
        known = self._precision.get(key)
        book = self.session.fieldbook() if trait is not None and known is None else None
        n_entries = int(self.session.plots["entry"].nunique())
        version = self._data_version
        self._show_problem(settings)

        def work() -> tuple[planning.Precision | str | None, Readout]:
            precision = known
            if book is not None:
                try:
                    precision = planning.trait_precision(book, trait, settings.design)
                except TrialInputError as error:
                    precision = error.message
            return precision, compute_readout(settings, n_entries, trait, precision)

        def arrived(outcome: tuple[planning.Precision | str | None, Readout]) -> None:
            precision, readout = outcome
            if version == self._data_version and trait is not None:
                self._precision[key] = precision
            self.readout = readout
            self._show_readout(readout, self.current_settings())
            self.readout_updated.emit()

        if not _is_slow(settings) and (book is None or len(book.plots) <= QUICK_PLOTS):
            self.background.forget("readout")
            arrived(work())
        else:
            for label in ("level", "difference"):
                self.readout_labels[label].setText("working it out…")
            self.background.submit("readout", work, arrived)

    def _show_readout(self, r: Readout, settings: AnalysisSettings) -> None:
        labels = self.readout_labels
        checks = f", {r.n_checks} of them checks" if r.n_checks else ""
        labels["entries"].setText(f"{r.n_entries}{checks}")
        if settings.method == "dunnett":
            labels["comparisons"].setText(
                f"{r.m} comparisons of {r.n_entries - r.n_checks} test entries with "
                f"{r.n_checks} check{'s' if r.n_checks != 1 else ''}" if r.m
                else "none: Dunnett's method needs at least one check")
        else:
            labels["comparisons"].setText(f"{r.m} pairs among {r.n_entries} entries")
        chance = ("more than 0.999" if r.familywise > 0.999 else f"{r.familywise:.3f}")
        labels["familywise"].setText(
            f"{r.m} tests at {settings.alpha:g} each, unadjusted, would show at least one false "
            f"difference with probability {chance} (1 − (1 − alpha)^m, common practice)."
            if r.m else "—")
        if r.problem is not None or r.precision is None:
            why = r.problem or "tick a trait to see what the trial can detect"
            labels["level"].setText("—")
            labels["difference"].setText("—")
            labels["basis"].setText(why)
            return
        name = METHOD_NAMES[settings.method]
        low, high = r.levels
        if low == high:
            labels["level"].setText(f"{name} tests each comparison at {_level(low)}.")
        else:
            labels["level"].setText(f"{name} tests each comparison at a level between "
                                    f"{_level(low)} and {_level(high)}, by step.")
        unit = self._unit(r.trait)
        mean = r.precision.grand_mean

        def amount(percent: float) -> str:
            return f"{percent:.1f}% of the mean ({percent * mean / 100:.3g}{unit})"

        if isinstance(r.difference, tuple):
            strict, loose = r.difference
            first, last = (("the widest range", "adjacent means")
                           if settings.method in ("snk", "duncan")
                           else ("the first step", "the last step"))
            labels["difference"].setText(
                f"between {amount(loose)} for {last} and {amount(strict)} for {first}.")
        else:
            labels["difference"].setText(f"{amount(r.difference)}.")
        p = r.precision
        labels["basis"].setText(
            f"{r.trait}: CV {p.cv_percent:.1f}%, {p.residual_df} residual df, "
            f"{p.replicates:g} replicates, as the data stand now.")

    def _unit(self, trait: str | None) -> str:
        table = self.session.traits
        if trait is None or table.empty:
            return ""
        unit = table.set_index("name").at[trait, "unit"]
        return "" if pd.isna(unit) else f" {unit}"

    def _show_problem(self, settings: AnalysisSettings) -> None:
        problem = ""
        if settings.method == "dunnett" and not settings.checks:
            problem = "Dunnett's method compares entries with checks: tick at least one check."
        self.problem.setText(problem)
        self.run_button.setEnabled(not problem)

    def _run(self) -> None:
        settings = self.current_settings()
        self.session.save_settings(settings)
        self.run_requested.emit(settings)
