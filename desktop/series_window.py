"""The trial-series window: the same entries grown in several environments, analysed together.

An environment is a location in a season. The series is read from several trial files (one
environment each, named by the trial's station and season) or from one field book whose columns
say the entry, location, season and block of each row. The set-up page says at once what was
read ("4 environments x 3 blocks, 8 entries, E5 missing in North 2026"), or what is wrong with
the choices, naming the file, row and column; the choices are kept either way. The analysis
(:func:`trialdesk.core.series.analyze_series`) runs in a worker thread with progress and a
cancel button; its results are shown per trait on four tabs: the entries across environments,
the environments, the combined analysis, and two charts. Reading the files and writing reports
happen off the GUI thread too.
"""

from __future__ import annotations

import re
import threading
import traceback
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from PySide6.QtCore import (
    QItemSelection,
    QItemSelectionModel,
    QModelIndex,
    QObject,
    QPersistentModelIndex,
    QSortFilterProxyModel,
    Qt,
    QThreadPool,
    Signal,
    Slot,
)
from PySide6.QtGui import QCloseEvent
from PySide6.QtWidgets import (
    QAbstractItemView,
    QApplication,
    QButtonGroup,
    QComboBox,
    QDoubleSpinBox,
    QFileDialog,
    QFormLayout,
    QGridLayout,
    QGroupBox,
    QHBoxLayout,
    QLabel,
    QListView,
    QMainWindow,
    QMessageBox,
    QProgressBar,
    QPushButton,
    QRadioButton,
    QScrollArea,
    QStackedWidget,
    QTabWidget,
    QToolButton,
    QVBoxLayout,
    QWidget,
)

from trialdesk.core.analysis import AnalysisCancelled
from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import ROLE_NAMES, _open
from trialdesk.core.planning import method_sentence
from trialdesk.core.results import AnalysisSettings
from trialdesk.core.separation import METHOD_NAMES, METHODS
from trialdesk.core.series import (
    COMPONENT_METHODS,
    SeriesData,
    analyze_series,
    read_series,
    series_from_trials,
)
from trialdesk.core.series_results import SeriesAnalysis, SeriesTraitResult
from trialdesk.core.summary_text import family_sentence
from trialdesk.core.trialfile import TrialFile
from trialdesk.desktop.analysis_runner import Background
from trialdesk.desktop.analysis_setup import ALPHAS, DIRECTIONS, CheckList
from trialdesk.desktop.palette import (
    ABOVE,
    ABOVE_MARK,
    BELOW,
    BELOW_MARK,
    ERROR_FG,
    WARNING_BG,
)
from trialdesk.desktop.results_view import (
    LEFT,
    Column,
    FrameModel,
    _fit_columns,
    _heading,
    _page,
    _table,
    fixed,
    marks,
    p_value,
)
from trialdesk.desktop.series_charts import RankChangeChart, ResponseChart

AnyIndex = QModelIndex | QPersistentModelIndex

TRIAL_FILTER = "Trial files (*.trial)"
FIELD_BOOK_FILTER = "Field books (*.csv *.xlsx *.txt *.tsv)"
COMPONENT_WORDS = {
    "auto": "From the ANOVA when balanced, else REML",
    "reml": "Always by REML",
}
# The columns of a field book series, with the words of their drop-downs: (role, label, empty
# choice). The entry and location are needed; without a season each location is one environment;
# without a block each row is an entry's mean in its environment (or a plot of a completely
# randomized trial).
COLUMN_ROLES = (("entry", "Entry:", "(choose a column)"),
                ("location", "Location:", "(choose a column)"),
                ("season", "Season:", "(none: one season)"),
                ("block", "Block:", "(none)"))
# Column names taken for the location and season when a field book is chosen (plain usage); the
# entry and block are found under the field-book reader's own names (ROLE_NAMES).
USUAL_NAMES = {"entry": ROLE_NAMES["entry"], "block": ROLE_NAMES["block"],
               "location": ("location", "loc", "site", "station", "place", "environment"),
               "season": ("season", "year", "yr")}
LISTED = 3  # environments with entries missing named in the read-out, at most


# --- what the series is read from -------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Sources:
    """Where the series comes from: trial files (``kind`` "trials"), or one field book
    (``kind`` "fieldbook") and the columns chosen for its entry, location, season and block."""

    kind: str = "trials"
    trials: tuple[str, ...] = ()
    fieldbook: str | None = None
    entry: str | None = None
    location: str | None = None
    season: str | None = None
    block: str | None = None


@dataclass(frozen=True, slots=True)
class Reading:
    """The sources as read: the series (or the error that stopped it), each trial file's station
    and season, and the field book's column names when they were asked for."""

    sources: Sources
    data: SeriesData | None = None
    error: TrialInputError | None = None
    trial_facts: tuple[tuple[str, str, str], ...] = ()  # file, station, season
    columns: tuple[str, ...] | None = None


def _natural(code: str) -> list:
    """Sort key putting E2 before E10."""
    return [(0, int(part), "") if part.isdigit() else (1, 0, part.casefold())
            for part in re.split(r"(\d+)", code) if part]


def _name_key(name: str) -> str:
    return re.sub(r"[\s_.\-]+", " ", name.casefold()).strip()


def guess_columns(columns: tuple[str, ...]) -> dict[str, str | None]:
    """The column taken for each role of :data:`COLUMN_ROLES` by its name, or None."""
    keys = [_name_key(c) for c in columns]
    guessed: dict[str, str | None] = {}
    for role, names in USUAL_NAMES.items():
        found = [(names.index(k), c) for k, c in zip(keys, columns, strict=True) if k in names
                 and c not in guessed.values()]
        guessed[role] = min(found)[1] if found else None
    return guessed


def read_sources(sources: Sources, *, header: bool = False) -> Reading:
    """Read the series from ``sources`` (pure: no Qt; runs in a worker thread).

    With ``header`` the field book's column names are read too, and its roles still unset are
    guessed from them (:func:`guess_columns`). Problems come back in ``Reading.error``.
    """
    if sources.kind == "trials":
        facts, error = [], None
        for path in sources.trials:
            try:
                with TrialFile.open(path, read_only=True) as trial:
                    known = trial.facts()
                facts.append((path, str(known.get("station") or ""),
                              str(known.get("season") or "")))
            except TrialInputError as problem:
                facts.append((path, "(cannot be read)", ""))
                error = error or problem
        if error is not None or len(sources.trials) < 2:
            return Reading(sources=sources, error=error, trial_facts=tuple(facts))
        try:
            return Reading(sources=sources, data=series_from_trials(sources.trials),
                           trial_facts=tuple(facts))
        except TrialInputError as problem:
            return Reading(sources=sources, error=problem, trial_facts=tuple(facts))
    if sources.fieldbook is None:
        return Reading(sources=sources)
    columns = () if header else None  # a field book that cannot be opened has no columns
    try:
        if header:
            # The header as the field-book reader itself finds it (blank rows skipped).
            columns = _open(sources.fieldbook, None).table.names
            guessed = guess_columns(columns)
            sources = replace(sources, **{role: getattr(sources, role) or guessed[role]
                                          for role in guessed})
        if sources.entry is None or sources.location is None:
            return Reading(sources=sources, columns=columns)
        data = read_series(sources.fieldbook, entry=sources.entry, location=sources.location,
                           season=sources.season, block=sources.block)
    except TrialInputError as problem:
        return Reading(sources=sources, error=problem, columns=columns)
    return Reading(sources=sources, data=data, columns=columns)


def describe(data: SeriesData) -> str:
    """What was read, in one line: "4 environments x 3 blocks, 8 entries, E5 missing in North
    2026"."""
    plots = data.plots
    entries = list(dict.fromkeys(plots["entry"]))
    first = f"{len(data.environments)} environments"
    if data.roles["block"] is not None:
        blocks = plots.groupby("environment", sort=False)["block"].nunique()
        low, high = int(blocks.min()), int(blocks.max())
        first += f" x {low} blocks" if low == high else f" x {low} to {high} blocks"
    parts = [first, f"{len(entries)} entries"]
    if data.means_only:
        parts.append("means only")
    elif data.roles["block"] is None:
        parts.append("no blocks (completely randomized)")
    grown = plots.groupby("environment", sort=False)["entry"].agg(set)
    missing = []
    for env in data.environments:
        absent = [e for e in entries if e not in grown[env.environment]]
        if absent:
            what = absent[0] if len(absent) == 1 else f"{len(absent)} entries"
            missing.append(f"{what} missing in {env.environment}")
    if len(missing) > LISTED:
        missing = [*missing[:LISTED], f"entries missing in {len(missing) - LISTED} more "
                   "environments"]
    return ", ".join(parts + missing)


@dataclass(frozen=True, slots=True)
class Choices:
    """The analysis chosen on the set-up page."""

    method: str
    alpha: float
    check_direction: str
    checks: tuple[str, ...]
    traits: tuple[str, ...]
    components: str

    def settings(self, data: SeriesData) -> AnalysisSettings:
        """The settings for ``data``: the design within environments follows its blocks (or the
        trials' saved design), lower-is-better traits come from the trials."""
        saved = data.saved_settings
        design = "crd" if data.roles["block"] is None else str(saved.get("design") or "rcbd")
        lower = tuple(t for t in saved.get("lower_is_better", ()) if t in data.traits)
        return AnalysisSettings(design=design, method=self.method, alpha=self.alpha,
                                checks=self.checks, check_direction=self.check_direction,
                                traits=self.traits, lower_is_better=lower)


# --- running ----------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Outcome:
    reading: Reading | None = None
    analysis: SeriesAnalysis | None = None
    message: str | None = None  # why it failed; None when done or cancelled


class SeriesRunner(QObject):
    """Reads the sources again and analyses the series in a worker thread.

    Signals
    -------
    progress(int done, int total, str trait) : as :func:`analyze_series` reports it.
    finished(Reading, SeriesAnalysis) : the run completed.
    failed(Reading or None, str) : the data or the choices do not allow the analysis (the
        message of the TrialInputError, naming file, row and column).
    cancelled() : the run was cancelled; nothing was produced.
    """

    progress = Signal(int, int, str)
    finished = Signal(object, object)
    failed = Signal(object, str)
    cancelled = Signal()
    _ended = Signal(object)

    def __init__(self, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._pool = QThreadPool(self)
        self._pool.setMaxThreadCount(1)
        self._stop = threading.Event()
        self._running = False
        self._ended.connect(self._deliver)

    def is_running(self) -> bool:
        """Whether a run is under way (from ``start`` until one of the end signals)."""
        return self._running

    def start(self, sources: Sources, choices: Choices) -> None:
        """Start a run; a run already under way must end (or be cancelled) first."""
        if self._running:
            raise RuntimeError("a series analysis is already running")
        self._running = True
        self._stop = threading.Event()
        stop = self._stop

        def work() -> None:
            outcome = self._work(sources, choices, stop)
            try:
                self._ended.emit(outcome)
            except RuntimeError:  # the window closed meanwhile: nobody wants the outcome
                pass

        self._pool.start(work)

    def _work(self, sources: Sources, choices: Choices, stop: threading.Event) -> _Outcome:
        reading = read_sources(sources)
        if reading.error is not None or reading.data is None:
            message = (str(reading.error) if reading.error is not None
                       else "choose the sources of the series first")
            return _Outcome(reading=reading, message=message)
        try:
            analysis = analyze_series(reading.data, choices.settings(reading.data),
                                      components=choices.components,
                                      progress=self.progress.emit, should_stop=stop.is_set)
        except AnalysisCancelled:
            return _Outcome(reading=reading)
        except TrialInputError as error:
            return _Outcome(reading=reading, message=str(error))
        except Exception as error:  # a fault of the program: say so rather than hang the run
            traceback.print_exc()
            return _Outcome(reading=reading, message=(
                f"the analysis stopped on an unexpected error ({error!r}); please report it "
                "with the files"))
        return _Outcome(reading=reading, analysis=analysis)

    def cancel(self) -> None:
        """Ask the run to stop; it stops before the next trait and emits ``cancelled``."""
        self._stop.set()

    def wait(self) -> None:
        """Wait for the run under way (when the window closes)."""
        self._pool.waitForDone()

    @Slot(object)
    def _deliver(self, outcome: _Outcome) -> None:
        self._running = False
        if outcome.analysis is not None:
            self.finished.emit(outcome.reading, outcome.analysis)
        elif outcome.message is not None:
            self.failed.emit(outcome.reading, outcome.message)
        else:
            self.cancelled.emit()


# --- the entries table --------------------------------------------------------------------------


class FooterLast(QSortFilterProxyModel):
    """Sorts by raw value (``UserRole``) and keeps the footer rows (the source model's bold rows:
    grand mean, CV%, LSD) below the entries, in their own order, whichever way it sorts."""

    def __init__(self, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self.setSortRole(Qt.ItemDataRole.UserRole)

    def lessThan(self, left: AnyIndex, right: AnyIndex) -> bool:  # noqa: N802
        bold = self.sourceModel().bold
        a, b = bold[left.row()], bold[right.row()]
        ascending = self.sortOrder() == Qt.SortOrder.AscendingOrder
        if a or b:
            if a and b:
                return (left.row() < right.row()) == ascending
            return b if ascending else a
        return super().lessThan(left, right)


def _rows_frame(rows: list[dict]) -> pd.DataFrame:
    """Rows of differing keys as one frame of plain Python values (None where a row has no
    value), so whole numbers stay whole and every number sorts."""
    keys = list(dict.fromkeys(k for r in rows for k in r))
    plain = [{k: v.item() if isinstance(v, np.generic) else v for k, v in r.items()}
             for r in rows]
    return pd.DataFrame({k: pd.Series([r.get(k) for r in plain], dtype=object) for k in keys})


def _fit_width(view: QAbstractItemView) -> None:
    """A table as wide as its columns (after ``_fit_columns``), so no empty grid is drawn."""
    header = view.horizontalHeader()
    view.setMaximumWidth(header.length() + 2 * view.frameWidth() + 2)


def _number(value: Any, decimals: int) -> str:
    return "" if value is None or pd.isna(value) else f"{value:.{decimals}f}"


def _sentence(text: str) -> str:
    """A note of the core ("entry 'E6' not grown ...") as a sentence of its own."""
    return text[:1].upper() + text[1:] + ("" if text.endswith(".") else ".")


def _env_title(location: str, season: str | None) -> str:
    return f"{location}\n{season}" if season else location


def _p_is(p: float | None) -> str:
    shown = p_value(p)
    return "p " + (shown.replace("<", "< ") if shown.startswith("<") else f"= {shown}")


# --- the window ---------------------------------------------------------------------------------


class SeriesWindow(QMainWindow):
    """The "Trial series" window.

    Signals
    -------
    series_read() : the sources were read (or failed to be) after a change of the set-up.
    analysis_finished(SeriesAnalysis), analysis_failed(str), analysis_cancelled() : how a run
        ended.
    report_written(str) : a workbook or PDF was written (or failed): its path.
    """

    series_read = Signal()
    analysis_finished = Signal(object)
    analysis_failed = Signal(str)
    analysis_cancelled = Signal()
    report_written = Signal(str)

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowFlag(Qt.WindowType.Window)
        self.setWindowTitle("Trial series - Trialdesk")
        self.sources = Sources()
        self.data: SeriesData | None = None
        self.analysis: SeriesAnalysis | None = None
        self._analysed: tuple[SeriesData, str] | None = None  # the data and components analysed
        self._run_components = "auto"
        self.last_error: str | None = None
        self._columns: tuple[str, ...] = ()
        self._loading = False
        self._charts_drawn = False
        self.background = Background(self)
        self.runner = SeriesRunner(self)
        self.runner.progress.connect(self._on_progress)
        self.runner.finished.connect(self._on_finished)
        self.runner.failed.connect(self._on_failed)
        self.runner.cancelled.connect(self._on_cancelled)
        self.pages = QTabWidget()
        self.pages.setDocumentMode(True)
        self.pages.addTab(self._build_setup(), "Set-up")
        self.pages.addTab(self._build_results(), "Results")
        self.setCentralWidget(self.pages)
        self.resize(1280, 820)
        self._show_sources_kind()
        self._show_method()
        self._show_reading(Reading(sources=self.sources))

    # --- building the set-up --------------------------------------------------------------------

    def _build_setup(self) -> QWidget:
        self.from_trials = QRadioButton("Trial files, one environment each")
        self.from_fieldbook = QRadioButton("One field book holding every environment "
                                           "(CSV or XLSX)")
        self.from_trials.setChecked(True)
        kinds = QButtonGroup(self)
        kinds.addButton(self.from_trials)
        kinds.addButton(self.from_fieldbook)
        self.from_trials.toggled.connect(self._kind_changed)

        self.trial_model = FrameModel(self)
        self.trial_table = _table(self.trial_model, sortable=False)
        self.trial_table.setSelectionMode(QAbstractItemView.SelectionMode.ExtendedSelection)
        add = QPushButton("Add trial files…")
        add.clicked.connect(self._choose_trials)
        self.remove_button = QPushButton("Remove")
        self.remove_button.setToolTip("Leave the selected trial files out of the series")
        self.remove_button.clicked.connect(self.remove_selected_trials)
        buttons = QHBoxLayout()
        buttons.addWidget(add)
        buttons.addWidget(self.remove_button)
        buttons.addStretch(1)
        trials_page = QWidget()
        trials_layout = QVBoxLayout(trials_page)
        trials_layout.setContentsMargins(0, 0, 0, 0)
        trials_layout.addWidget(QLabel("Each trial is one environment, named by its station and "
                                       "season (set them in the trial's facts)."))
        trials_layout.addWidget(self.trial_table, 1)
        trials_layout.addLayout(buttons)

        self.book_label = QLabel("No field book chosen.")
        self.book_label.setWordWrap(True)
        choose = QPushButton("Choose field book…")
        choose.clicked.connect(self._choose_fieldbook)
        book_row = QHBoxLayout()
        book_row.addWidget(self.book_label, 1)
        book_row.addWidget(choose)
        self.column_boxes: dict[str, QComboBox] = {}
        form = QFormLayout()
        for role, label, empty in COLUMN_ROLES:
            box = QComboBox()
            box.addItem(empty, None)
            box.currentIndexChanged.connect(self._column_changed)
            self.column_boxes[role] = box
            form.addRow(label, box)
        block_note = QLabel("Without a block column, one row per entry and environment is read "
                            "as the entry's mean there; several rows as plots of a completely "
                            "randomized trial.")
        block_note.setWordWrap(True)
        book_page = QWidget()
        book_layout = QVBoxLayout(book_page)
        book_layout.setContentsMargins(0, 0, 0, 0)
        book_layout.addLayout(book_row)
        book_layout.addLayout(form)
        book_layout.addWidget(block_note)
        book_layout.addStretch(1)

        self.source_pages = QStackedWidget()
        self.source_pages.addWidget(trials_page)
        self.source_pages.addWidget(book_page)
        self.readout = QLabel()
        self.readout.setWordWrap(True)
        font = self.readout.font()
        font.setBold(True)
        self.readout.setFont(font)
        self.readout.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.problem = QLabel()
        self.problem.setWordWrap(True)
        self.problem.setStyleSheet(f"color: {ERROR_FG.name()};")
        self.problem.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.read_notes = QLabel()
        self.read_notes.setWordWrap(True)
        sources = QGroupBox("Where the series comes from")
        sources_layout = QVBoxLayout(sources)
        sources_layout.addWidget(self.from_trials)
        sources_layout.addWidget(self.from_fieldbook)
        sources_layout.addWidget(self.source_pages, 1)
        read = QGroupBox("What was read")
        read_layout = QVBoxLayout(read)
        read_layout.addWidget(self.readout)
        read_layout.addWidget(self.problem)
        read_layout.addWidget(self.read_notes)
        read_layout.addStretch(1)

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

        self.method_box = QComboBox()
        for key in METHODS:
            self.method_box.addItem(METHOD_NAMES[key], key)
        self.method_box.setCurrentIndex(self.method_box.findData("tukey"))
        self.method_words = QLabel()
        self.method_words.setWordWrap(True)
        self.alpha_box = QDoubleSpinBox()
        self.alpha_box.setDecimals(3)
        self.alpha_box.setRange(0.001, 0.2)
        self.alpha_box.setSingleStep(0.01)
        self.alpha_box.setValue(0.05)
        alpha_row = QHBoxLayout()
        alpha_row.addWidget(self.alpha_box)
        for value in ALPHAS:
            button = QToolButton()
            button.setText(f"{value:.2f}")
            button.clicked.connect(lambda _=False, v=value: self.alpha_box.setValue(v))
            alpha_row.addWidget(button)
        alpha_row.addStretch(1)
        self.direction_box = QComboBox()
        for key, text in DIRECTIONS.items():
            self.direction_box.addItem(text, key)
        self.components_box = QComboBox()
        for key in COMPONENT_METHODS:
            self.components_box.addItem(COMPONENT_WORDS[key], key)
        self.components_box.setToolTip("From the mean squares of the analysis of variance when "
                                       "every entry is in every environment with the same "
                                       "replicates; by restricted maximum likelihood otherwise")
        settings_form = QFormLayout()
        settings_form.addRow("Method:", self.method_box)
        settings_form.addRow("", self.method_words)
        settings_form.addRow("Alpha:", alpha_row)
        settings_form.addRow("Check comparisons:", self.direction_box)
        settings_form.addRow("Variance components:", self.components_box)
        environments_note = QLabel("The entry means over environments and their comparisons "
                                   "treat the environments as random: entries are compared "
                                   "against the entry x environment variation.")
        environments_note.setWordWrap(True)
        settings_form.addRow("", environments_note)
        how = QGroupBox("How to analyse")
        how.setLayout(settings_form)
        for signal in (self.method_box.currentIndexChanged, self.alpha_box.valueChanged,
                       self.direction_box.currentIndexChanged,
                       self.components_box.currentIndexChanged, self.trait_model.changed,
                       self.check_model.changed):
            signal.connect(self._choices_changed)

        self.run_problem = QLabel()
        self.run_problem.setWordWrap(True)
        self.run_problem.setStyleSheet(f"color: {ERROR_FG.name()};")
        self.progress = QProgressBar()
        self.progress.setMaximumWidth(260)
        self.progress.setVisible(False)
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setVisible(False)
        self.cancel_button.clicked.connect(self.cancel)
        self.run_button = QPushButton("Analyse the series")
        self.run_button.setDefault(True)
        self.run_button.setMinimumHeight(32)
        self.run_button.clicked.connect(self.run)
        run_row = QHBoxLayout()
        run_row.addWidget(self.run_problem, 1)
        run_row.addWidget(self.progress)
        run_row.addWidget(self.cancel_button)
        run_row.addWidget(self.run_button)

        page = QWidget()
        grid = QGridLayout(page)
        grid.addWidget(sources, 0, 0)
        grid.addWidget(read, 1, 0)
        grid.addWidget(traits, 0, 1)
        grid.addWidget(checks, 1, 1)
        grid.addWidget(how, 0, 2, 2, 1)
        grid.addLayout(run_row, 2, 0, 1, 3)
        grid.setColumnStretch(0, 5)
        grid.setColumnStretch(1, 2)
        grid.setColumnStretch(2, 4)
        grid.setRowStretch(0, 3)
        grid.setRowStretch(1, 2)
        return page

    # --- building the results -------------------------------------------------------------------

    def _build_results(self) -> QWidget:
        self.empty = QLabel("No results yet. Choose the sources on the Set-up page, then press "
                            "“Analyse the series”.")
        self.empty.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.banner = QLabel("The set-up changed after this analysis: these results are for the "
                             "earlier choices. Analyse the series again to see the new ones.")
        self.banner.setStyleSheet(f"background: {WARNING_BG.name()}; padding: 6px;"
                                  "font-weight: bold;")
        self.banner.setWordWrap(True)
        self.banner.hide()
        self.trait_box = QComboBox()
        self.trait_box.setSizeAdjustPolicy(QComboBox.SizeAdjustPolicy.AdjustToContents)
        self.trait_box.currentIndexChanged.connect(self._show_trait)
        self.workbook_button = QPushButton("Save series workbook…")
        self.workbook_button.clicked.connect(lambda: self.save_workbook())
        self.pdf_button = QPushButton("Save series summary as PDF…")
        self.pdf_button.clicked.connect(lambda: self.save_pdf())
        bar = QHBoxLayout()
        bar.addWidget(QLabel("Trait:"))
        bar.addWidget(self.trait_box)
        bar.addStretch(1)
        bar.addWidget(self.workbook_button)
        bar.addWidget(self.pdf_button)
        self.headline = QLabel()
        self.headline.setTextFormat(Qt.TextFormat.RichText)
        self.headline.setWordWrap(True)
        self.headline.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.family = QLabel()
        self.family.setWordWrap(True)

        self.entry_model = FrameModel(self)
        self.entry_proxy = FooterLast(self)
        self.entry_proxy.setSourceModel(self.entry_model)
        self.entry_table = _table(self.entry_proxy)
        self.entry_table.setSelectionMode(QAbstractItemView.SelectionMode.ExtendedSelection)
        self.entry_table.selectionModel().selectionChanged.connect(self._selection_changed)
        self.entry_note = QLabel()
        self.entry_note.setWordWrap(True)

        self.env_model = FrameModel(self)
        self.env_table = _table(self.env_model)
        self.env_note = QLabel()
        self.env_note.setWordWrap(True)
        self.rank_model = FrameModel(self)
        self.rank_table = _table(self.rank_model)

        self.anova_model = FrameModel(self)
        self.anova_table = _table(self.anova_model, sortable=False)
        self.tests_text = QLabel()
        self.components_model = FrameModel(self)
        self.components_table = _table(self.components_model, sortable=False)
        self.bartlett_text, self.heritability_text, self.notes_text = (QLabel() for _ in range(3))
        for label in (self.tests_text, self.bartlett_text, self.heritability_text,
                      self.notes_text):
            label.setWordWrap(True)
            label.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        combined = _page(_heading("Combined analysis of variance"), self.anova_table,
                         self.tests_text, _heading("Error variances of the environments"),
                         self.bartlett_text, _heading("Variance components"),
                         self.components_table, self.heritability_text,
                         _heading("Warnings and notes"), self.notes_text, fill=False)
        scroll = QScrollArea()
        scroll.setWidgetResizable(True)
        scroll.setWidget(combined)

        self.response_chart = ResponseChart()
        self.rank_chart = RankChangeChart()
        self.charts = QTabWidget()
        self.charts.addTab(self.response_chart, "Response to the environments")
        self.charts.addTab(self.rank_chart, "Rank changes")
        for chart in (self.response_chart, self.rank_chart):
            chart.entry_clicked.connect(self._toggle_entry)

        self.tabs = QTabWidget()
        self.tabs.addTab(_page(self.entry_table, self.entry_note),
                         "Entries across environments")
        self.tabs.addTab(_page(self.env_table, self.env_note,
                               _heading("Rank of each entry in each environment (1 = best "
                                        "there)"), self.rank_table), "Environments")
        self.tabs.addTab(scroll, "Combined analysis")
        self.tabs.addTab(self.charts, "Charts")
        self.tabs.currentChanged.connect(lambda _: self._draw_charts())

        shown = QWidget()
        layout = QVBoxLayout(shown)
        layout.setContentsMargins(0, 0, 0, 0)
        layout.addWidget(self.banner)
        layout.addLayout(bar)
        layout.addWidget(self.headline)
        layout.addWidget(self.family)
        layout.addWidget(self.tabs, 1)
        self.result_pages = QStackedWidget()
        self.result_pages.addWidget(self.empty)
        self.result_pages.addWidget(shown)
        return self.result_pages

    # --- choosing the sources -------------------------------------------------------------------

    def add_trials(self, paths: list[str | Path]) -> None:
        """Add trial files to the series (a file already in it is not added twice)."""
        known = list(self.sources.trials)
        known += [str(p) for p in paths if str(p) not in known]
        self._read(replace(self.sources, kind="trials", trials=tuple(known)))

    def remove_selected_trials(self) -> None:
        """Leave the trial files selected in the list out of the series."""
        rows = {i.row() for i in self.trial_table.selectionModel().selectedRows()}
        kept = tuple(p for i, p in enumerate(self.sources.trials) if i not in rows)
        self._read(replace(self.sources, trials=kept))

    def set_fieldbook(self, path: str | Path) -> None:
        """Read the series from one field book; its columns are guessed, then can be chosen."""
        self._read(Sources(kind="fieldbook", trials=self.sources.trials, fieldbook=str(path)),
                   header=True)

    def set_column(self, role: str, column: str | None) -> None:
        """Choose the field-book column of ``role`` (entry, location, season, block)."""
        box = self.column_boxes[role]
        box.setCurrentIndex(box.findData(column))

    def _choose_trials(self) -> None:
        paths, _ = QFileDialog.getOpenFileNames(self, "Add trial files", "", TRIAL_FILTER)
        if paths:
            self.add_trials(paths)

    def _choose_fieldbook(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Choose the field book", "",
                                              FIELD_BOOK_FILTER)
        if path:
            self.set_fieldbook(path)

    def _kind_changed(self) -> None:
        if self._loading:
            return
        kind = "trials" if self.from_trials.isChecked() else "fieldbook"
        if kind != self.sources.kind:
            self._read(replace(self.sources, kind=kind))

    def _column_changed(self) -> None:
        if self._loading:
            return
        chosen = {role: box.currentData() for role, box in self.column_boxes.items()}
        self._read(replace(self.sources, **chosen))

    def _read(self, sources: Sources, header: bool = False) -> None:
        """Read ``sources`` in the background; the set-up shows them as chosen meanwhile."""
        self.sources = sources
        self._show_sources_kind()
        self.readout.setText("Reading…")
        self._mark_stale()
        self.background.submit("read", lambda: read_sources(sources, header=header),
                               self._show_reading)

    def _show_sources_kind(self) -> None:
        trials = self.sources.kind == "trials"
        self._loading = True
        try:
            (self.from_trials if trials else self.from_fieldbook).setChecked(True)
        finally:
            self._loading = False
        self.source_pages.setCurrentIndex(0 if trials else 1)

    def _show_reading(self, reading: Reading) -> None:
        """Show what was read: the trial list or the columns, the read-out, traits and checks."""
        self.sources = reading.sources
        self._show_trial_list(reading)
        if reading.columns is not None:
            self._columns = reading.columns
        self._show_columns()
        self.data = reading.data
        error = reading.error
        self.last_error = None if error is None else str(error)
        self.problem.setText("" if error is None else str(error))
        self.problem.setVisible(error is not None)
        data = reading.data
        if data is not None:
            self.readout.setText(describe(data))
            notes = [str(w) for w in data.warnings] + list(data.notes)
            if self.sources.kind == "fieldbook" and self.sources.block is None \
                    and data.roles["block"] is not None:
                notes.insert(0, f"Column '{data.roles['block']}' is read as the blocks by its "
                                "name.")
            self.read_notes.setText("\n".join(notes))
            self._show_traits_and_checks(data)
        else:
            self.readout.setText(self._what_is_missing() if error is None
                                 else "Nothing could be read; see below.")
            self.read_notes.setText("")
        self._show_run_problem()
        self.series_read.emit()

    def _what_is_missing(self) -> str:
        s = self.sources
        if s.kind == "trials":
            return ("Add two or more trial files." if len(s.trials) < 2 else "")
        if s.fieldbook is None:
            return "Choose a field book."
        return "Choose the entry and location columns."

    def _show_trial_list(self, reading: Reading) -> None:
        named = {}
        if reading.data is not None:
            named = {e.source: e.environment for e in reading.data.environments}
        rows = [{"file": Path(path).name, "station": station, "season": season,
                 "environment": named.get(path, ""), "path": path}
                for path, station, season in reading.trial_facts]
        if reading.sources.kind != "trials":
            rows = [{"file": Path(p).name, "station": "", "season": "", "environment": "",
                     "path": p} for p in reading.sources.trials]
        frame = pd.DataFrame(rows, columns=["file", "station", "season", "environment", "path"])
        self.trial_model.set_frame(frame, [
            Column("file", "Trial file", align=LEFT), Column("station", "Station", align=LEFT),
            Column("season", "Season", align=LEFT),
            Column("environment", "Environment", align=LEFT,
                   tip="the environment's name in the results")])
        _fit_columns(self.trial_table)
        self.remove_button.setEnabled(bool(rows))

    def _show_columns(self) -> None:
        s = self.sources
        self.book_label.setText(f"Field book: <b>{Path(s.fieldbook).name}</b>" if s.fieldbook
                                else "No field book chosen.")
        self.book_label.setToolTip(s.fieldbook or "")
        self._loading = True
        try:
            for role, box in self.column_boxes.items():
                empty = box.itemText(0)
                box.clear()
                box.addItem(empty, None)
                for name in self._columns:
                    box.addItem(name, name)
                box.setCurrentIndex(max(box.findData(getattr(s, role)), 0))
        finally:
            self._loading = False

    def _show_traits_and_checks(self, data: SeriesData) -> None:
        """Fill the tick lists, keeping what was ticked (new traits come ticked; the trials'
        own checks come ticked the first time their entries are seen)."""
        old_traits = {k for k, _ in self.trait_model.items}
        ticked = (self.trait_model.ticked | {t for t in data.traits if t not in old_traits})
        self.trait_model.set_items([(t, t) for t in data.traits], ticked or set(data.traits))
        entries = sorted(dict.fromkeys(data.plots["entry"]), key=_natural)
        old_entries = {k for k, _ in self.check_model.items}
        saved = set(data.saved_settings.get("checks", ()))
        checks = self.check_model.ticked | {e for e in saved if e not in old_entries}
        self.check_model.set_items([(e, e) for e in entries], checks)

    # --- choices --------------------------------------------------------------------------------

    def choices(self) -> Choices:
        """The analysis as chosen on the set-up page."""
        return Choices(method=self.method_box.currentData(),
                       alpha=round(self.alpha_box.value(), 3),
                       check_direction=self.direction_box.currentData(),
                       checks=tuple(self.check_model.keys()),
                       traits=tuple(self.trait_model.keys()),
                       components=self.components_box.currentData())

    def _choices_changed(self) -> None:
        self._show_method()
        self._show_run_problem()
        self._mark_stale()

    def _show_method(self) -> None:
        method = self.method_box.currentData()
        self.method_words.setText(method_sentence(method))
        self.direction_box.setEnabled(method == "dunnett")
        self.direction_box.setToolTip("" if method == "dunnett" else
                                      "Only Dunnett's comparisons with the checks can be "
                                      "one-sided.")

    def _show_run_problem(self) -> None:
        problem = ""
        if self.data is None:
            problem = ("Put right the problem under “What was read” to analyse the series."
                       if self.problem.text() else "Nothing to analyse yet.")
        elif self.method_box.currentData() == "dunnett" and not self.check_model.keys():
            problem = "Dunnett's method compares entries with checks: tick at least one check."
        self.run_problem.setText(problem)
        self.run_button.setEnabled(not problem and not self.runner.is_running())

    def _mark_stale(self) -> None:
        self.banner.setVisible(self.analysis is not None)

    # --- running --------------------------------------------------------------------------------

    def run(self) -> None:
        """Analyse the series as set up, in the background (the files are read again)."""
        if self.runner.is_running():
            return
        self.progress.setRange(0, 0)
        self.progress.setFormat("Reading the files…")
        self.progress.setVisible(True)
        self.cancel_button.setVisible(True)
        self.run_button.setEnabled(False)
        self.run_problem.setText("")
        choices = self.choices()
        self._run_components = choices.components
        self.runner.start(self.sources, choices)

    def cancel(self) -> None:
        """Stop the analysis under way (it stops between traits)."""
        if self.runner.is_running():
            self.runner.cancel()
            self.progress.setFormat("Cancelling…")

    def _run_ended(self) -> None:
        self.progress.setVisible(False)
        self.cancel_button.setVisible(False)
        self._show_run_problem()

    def _on_progress(self, done: int, total: int, trait: str) -> None:
        self.progress.setRange(0, total)
        self.progress.setValue(done)
        self.progress.setFormat(f"Analysing {trait} ({done + 1} of {total})" if trait
                                else "Done")

    def _on_finished(self, reading: Reading, analysis: SeriesAnalysis) -> None:
        self._show_reading(reading)
        self.analysis = analysis
        self._analysed = (reading.data, self._run_components)
        self._run_ended()
        self.banner.hide()
        names = [t.trait for t in analysis.traits]
        wanted = self.current_trait()
        self.trait_box.blockSignals(True)
        self.trait_box.clear()
        for name in names:
            self.trait_box.addItem(name, name)
        self.trait_box.setCurrentIndex(names.index(wanted) if wanted in names else 0)
        self.trait_box.blockSignals(False)
        self.result_pages.setCurrentIndex(1)
        self.pages.setCurrentIndex(1)
        self._show_trait()
        self.statusBar().showMessage("Series analysed.", 5000)
        self.analysis_finished.emit(analysis)

    def _on_failed(self, reading: Reading | None, message: str) -> None:
        if reading is not None:
            self._show_reading(reading)
        self._run_ended()
        self.last_error = message
        self.run_problem.setText(message)
        self.pages.setCurrentIndex(0)
        self.analysis_failed.emit(message)

    def _on_cancelled(self) -> None:
        self._run_ended()
        self.statusBar().showMessage("Analysis cancelled.", 5000)
        self.analysis_cancelled.emit()

    # --- showing the results --------------------------------------------------------------------

    def current_trait(self) -> str | None:
        """The trait shown."""
        return self.trait_box.currentData()

    def set_trait(self, trait: str) -> None:
        """Show ``trait``."""
        self.trait_box.setCurrentIndex(self.trait_box.findData(trait))

    def _show_trait(self) -> None:
        trait = self.current_trait()
        if self.analysis is None or trait is None:
            return
        result = self.analysis.trait(trait)
        self._show_headline(result)
        self._show_entries(result)
        self._show_environments(result)
        self._show_combined(result)
        self._charts_drawn = False
        self._draw_charts()

    def _show_headline(self, result: SeriesTraitResult) -> None:
        d = result.decimals + 1
        direction = "higher is better" if result.higher_is_better else "lower is better"
        basis = ("entry means only" if result.means_only else
                 f"{result.replicates:.3g} plots per entry and environment")
        weighted = ", weighted by the environments' error" if result.weighted else ""
        self.headline.setText(
            f"<b>{result.trait}</b>, {direction}: {len(result.environment_table)} environments, "
            f"{len(result.entries)} entries, {basis}.&nbsp;&nbsp; Grand mean "
            f"<b>{result.grand_mean:.{d}f}</b> &nbsp;·&nbsp; CV <b>{result.cv_percent:.1f}%</b>"
            f" &nbsp;·&nbsp; SED {result.sed:.{d}f} &nbsp;·&nbsp; LSD({result.alpha:g}) "
            f"{result.lsd:.{d}f} on {result.error_df} df &nbsp;·&nbsp; "
            f"{METHOD_NAMES[result.method]}, alpha {result.alpha:g}{weighted}")
        self.family.setText(family_sentence(result))

    def _show_entries(self, result: SeriesTraitResult) -> None:
        d = result.decimals + 1
        cell_d = result.decimals if result.means_only else d
        squares = min(2 * result.decimals + 1, 4)
        frame = result.to_frame()
        cells = result.cell_means_frame()
        stable = result.stability_frame()
        stable = stable.set_index("entry") if not stable.empty else stable
        envs = result.environment_table
        has_checks = bool(frame["is_check"].any())
        stability_keys = ("regression_slope", "slope_se", "ecovalence", "ecovalence_share",
                          "shukla_variance")
        rows = []
        for e in result.entries:
            row = {"rank": e.rank, "entry": e.entry, "mean": e.mean,
                   "mean:text": _number(e.mean, d), "letters": e.letters,
                   "percent_of_check": e.percent_of_check, "above_checks": e.above_checks,
                   "below_checks": e.below_checks}
            for j, env in enumerate(envs):
                value = cells.at[e.entry, env.environment]
                row[f"env:{j}"] = value
                row[f"env:{j}:text"] = _number(value, cell_d)
            for key in stability_keys:
                row[key] = stable.at[e.entry, key] if e.entry in stable.index else None
            rows.append(row)
        footers = (("Grand mean", result.grand_mean, d, [env.mean for env in envs], d),
                   ("CV%", result.cv_percent, 1, [env.cv_percent for env in envs], 1),
                   (f"LSD ({result.alpha:g})", result.lsd, d, [env.lsd for env in envs], d))
        for title, value, digits, per_env, env_digits in footers:
            row = {"entry": title, "mean": value, "mean:text": _number(value, digits),
                   "above_checks": (), "below_checks": ()}
            for j, env_value in enumerate(per_env):
                row[f"env:{j}"] = env_value
                row[f"env:{j}:text"] = _number(env_value, env_digits)
            rows.append(row)
        columns = [Column("rank", "Rank"), Column("entry", "Entry", align=LEFT),
                   Column("mean", "Mean", text_key="mean:text",
                          tip="least-squares mean over the environments")]
        if result.method != "dunnett":
            columns.append(Column("letters", "Letters", align=LEFT,
                                  tip="entries sharing a letter were not declared different"))
        if has_checks:
            up, down = (ABOVE, BELOW) if result.higher_is_better else (BELOW, ABOVE)
            columns += [
                Column("percent_of_check", "% of\nchecks", fixed(1),
                       tip="the mean as a percentage of the mean of the checks"),
                Column("above_checks", "Above", marks(ABOVE_MARK), LEFT,
                       "checks this entry is significantly above", up),
                Column("below_checks", "Below", marks(BELOW_MARK), LEFT,
                       "checks this entry is significantly below", down)]
        columns += [Column(f"env:{j}", _env_title(env.location, env.season),
                           text_key=f"env:{j}:text", tip=f"mean in {env.environment}")
                    for j, env in enumerate(envs)]
        if not stable.empty:
            columns += [
                Column("regression_slope", "Slope", fixed(3),
                       tip="regression on the environment index (Finlay-Wilkinson); 1 is the "
                           "average response"),
                Column("slope_se", "SE of\nslope", fixed(3)),
                Column("ecovalence", "Ecovalence", fixed(squares),
                       tip="the entry's part of the entry x environment sum of squares "
                           "(Wricke)"),
                Column("ecovalence_share", "Share\n%",
                       lambda v: "" if v is None or pd.isna(v) else f"{100 * v:.1f}",
                       tip="the entry's share of the entry x environment sum of squares"),
                Column("shukla_variance", "Shukla\nvariance", fixed(squares),
                       tip="Shukla's stability variance; a negative estimate reads as zero")]
        n = len(result.entries)
        self.entry_model.set_frame(_rows_frame(rows), columns,
                                   tint=frame["is_check"].tolist() + [False] * len(footers),
                                   bold=[False] * n + [True] * len(footers))
        self.entry_proxy.sort(-1)
        _fit_columns(self.entry_table)
        _fit_width(self.entry_table)
        notes = ["Entries in rank order of their mean over the environments; the mean in each "
                 "environment follows, and the environments' own mean, CV% and LSD below."]
        if result.method != "dunnett":
            notes.append("Entries sharing a letter were not declared different by the method.")
        if has_checks:
            notes.append(f"Check rows are shaded. {ABOVE_MARK} / {BELOW_MARK}: significantly "
                         "above / below the named checks.")
        if not stable.empty:
            notes.append("Slope: the regression on the environment index; ecovalence and its "
                         "share: the entry's part of the entry x environment interaction; "
                         "Shukla variance: its own interaction variance.")
        notes += [_sentence(n) for n in result.notes if "stability" in n]
        notes.append("Select entries (Ctrl+click) to draw them on the charts.")
        self.entry_note.setText(" ".join(notes))

    def _show_environments(self, result: SeriesTraitResult) -> None:
        d = result.decimals + 1
        frame = result.environment_frame()
        has_seasons = frame["season"].notna().any()
        columns = [Column("environment", "Environment", align=LEFT),
                   Column("location", "Location", align=LEFT)]
        if has_seasons:
            columns.append(Column("season", "Season", align=LEFT))
        columns += [Column("n_entries", "Entries"), Column("mean", "Mean", fixed(d))]
        if not result.means_only:
            columns += [Column("cv_percent", "CV%", fixed(1)),
                        Column("error_ms", "Error MS", fixed(min(2 * result.decimals + 2, 4))),
                        Column("error_df", "df", tip="degrees of freedom of the error"),
                        Column("lsd", f"LSD ({result.alpha:g})", fixed(d),
                               tip="the environment's own unadjusted least significant "
                                   "difference")]
        self.env_model.set_frame(frame.astype(object), columns)
        _fit_columns(self.env_table, rows_shown=True)
        _fit_width(self.env_table)
        self.env_note.setText(
            "Entry means only: the environments have no error of their own, so no CV%, error "
            "mean square or LSD." if result.means_only else
            "Each environment analysed on its own, as a single trial.")
        ranks = result.ranks_frame()
        table = ranks.astype(object).where(ranks.notna(), None)
        table.columns = [f"env:{j}" for j in range(len(table.columns))]
        table.insert(0, "entry", list(ranks.index))
        checks = {e.entry for e in result.entries if e.is_check}
        self.rank_model.set_frame(
            table.reset_index(drop=True),
            [Column("entry", "Entry", align=LEFT)]
            + [Column(f"env:{j}", _env_title(env.location, env.season),
                      tip=f"rank in {env.environment}; empty where not grown")
               for j, env in enumerate(result.environment_table)],
            tint=[e in checks for e in ranks.index])
        self.rank_table.model().sort(-1)
        _fit_columns(self.rank_table)
        _fit_width(self.rank_table)

    def _show_combined(self, result: SeriesTraitResult) -> None:
        squares = min(2 * result.decimals + 2, 4)
        self.anova_model.set_frame(result.anova_frame().astype(object), [
            Column("source", "Source", align=LEFT), Column("df", "df"),
            Column("ss", "Sum of squares", fixed(squares)),
            Column("ms", "Mean square", fixed(squares)), Column("f", "F", fixed(2)),
            Column("p", "p", p_value)])
        _fit_columns(self.anova_table, rows_shown=True)
        _fit_width(self.anova_table)
        used = result.entry_test_weighted if result.weighted else result.entry_test_random
        lines = []
        for test in (result.entry_test_random, result.entry_test_fixed,
                     result.entry_test_weighted):
            if test is None:
                continue
            f = "" if test.f is None else f"F = {test.f:.2f} on {test.df1} and {test.df2} df, "
            mark = " (this test protects the mean separation)" if test is used else ""
            lines.append(f"Entries, {test.label} (against {test.against}): {f}"
                         f"{_p_is(test.p)}{mark}.")
        if result.entry_test_fixed is None:
            lines.append("With entry means only there is no pooled error: the entries are "
                         "tested against entry x environment alone.")
        lines.append("In the table, entries are tested against entry x environment"
                     + ("" if result.means_only else
                        " and environments against blocks within environment") + ".")
        self.tests_text.setText("\n".join(lines))
        b = result.bartlett
        if b is None:
            self.bartlett_text.setText("Bartlett's test needs each environment's own error mean "
                                       "square, which entry means alone do not give.")
        else:
            reading = b.reading[:1].upper() + b.reading[1:]
            weighted = (" The entry means therefore come from the weighted analysis." if
                        result.weighted else "")
            self.bartlett_text.setText(f"{reading}: Bartlett's chi-square = {b.statistic:.2f} "
                                       f"on {b.df} df, {_p_is(b.p)}.{weighted}")
        self._show_components(result)
        notes = ([f"Warning: {w}" for w in (*result.warnings, *self.analysis.warnings)]
                 + [f"Note: {n}" for n in (*result.notes, *self.analysis.notes)])
        self.notes_text.setText("\n".join(notes) or "None.")

    def _show_components(self, result: SeriesTraitResult) -> None:
        c = result.components
        self.components_table.setVisible(c is not None)
        if c is None:
            self.heritability_text.setText("The variance components could not be estimated "
                                           "(see the warnings below).")
            return
        digits = min(2 * result.decimals + 2, 4)
        rows = [("Entries (s2G)", c.entry)]
        if c.entry_by_environment is not None:
            rows += [("Entry x environment (s2GE)", c.entry_by_environment),
                     ("Plot error (s2e)", c.error)]
        else:
            rows.append(("Residual of the entry means (s2res: entry x environment and error "
                         "together)", c.error))
        self.components_model.set_frame(
            pd.DataFrame(rows, columns=["component", "estimate"]),
            [Column("component", "Component", align=LEFT),
             Column("estimate", f"Estimate ({c.method})", fixed(digits))])
        _fit_columns(self.components_table, rows_shown=True)
        _fit_width(self.components_table)
        h2 = "undefined" if np.isnan(c.heritability) else f"{c.heritability:.3f}"
        sizes = f"e = {c.n_environments:.4g}" + ("" if c.entry_by_environment is None
                                                 else f", r = {c.replicates:.4g}")
        lines = [f"<b>Heritability of entry means: {h2}</b>",
                 f"{c.heritability_formula} ({sizes}).",
                 f"Source: {c.source}."]
        if not c.converged:
            lines.append("The REML estimation did not converge: read the components with care.")
        lines += [f"Note: {w}" for w in c.warnings]
        self.heritability_text.setText("<br>".join(lines))

    # --- selection and charts -------------------------------------------------------------------

    def selected_entries(self) -> list[str]:
        """The entries selected in the entries table, in the table's order."""
        n = len(self.analysis.trait(self.current_trait()).entries) if self.analysis else 0
        rows = sorted(self.entry_proxy.mapToSource(i).row()
                      for i in self.entry_table.selectionModel().selectedRows())
        codes = self.entry_model.frame["entry"]
        return [codes[r] for r in rows if r < n]

    def select_entries(self, entries: list[str]) -> None:
        """Select ``entries`` in the entries table (and so draw them on the charts)."""
        codes = self.entry_model.frame["entry"].tolist()
        selection = QItemSelection()
        for entry in entries:
            row = self.entry_proxy.mapFromSource(self.entry_model.index(codes.index(entry), 0))
            selection.select(row, row)
        flags = (QItemSelectionModel.SelectionFlag.ClearAndSelect
                 | QItemSelectionModel.SelectionFlag.Rows)
        self.entry_table.selectionModel().select(selection, flags)

    def _toggle_entry(self, entry: str) -> None:
        chosen = self.selected_entries()
        self.select_entries([e for e in chosen if e != entry] if entry in chosen
                            else [*chosen, entry])

    def _selection_changed(self) -> None:
        self._charts_drawn = False
        self._draw_charts()

    def _draw_charts(self, now: bool = False) -> None:
        """Draw the charts of the trait shown when the Charts tab is on show (or ``now``)."""
        if self.analysis is None or self.current_trait() is None or self._charts_drawn:
            return
        if not now and self.tabs.currentWidget() is not self.charts:
            return
        result = self.analysis.trait(self.current_trait())
        chosen = self.selected_entries()
        self.response_chart.show_trait(result, chosen)
        self.rank_chart.show_trait(result, chosen)
        self._charts_drawn = True

    # --- reports --------------------------------------------------------------------------------

    def _report_path(self, title: str, suffix: str, kind: str) -> str | None:
        first = Path(self.analysis.sources[0]).stem if self.analysis.sources else "series"
        name, _ = QFileDialog.getSaveFileName(self, title, f"{first} series{suffix}", kind)
        if name and not name.lower().endswith(suffix):
            name += suffix
        return name or None

    def save_workbook(self, path: str | Path | None = None) -> None:
        """Write the series workbook (in the background)."""
        if self.analysis is None:
            self.show_error("Analyse the series first.")
            return
        try:
            from trialdesk.core.series_workbook import write_series_workbook
        except ImportError:
            self.show_error("The series workbook cannot be written yet: this copy of Trialdesk "
                            "does not have its writer (trialdesk.core.series_workbook).")
            return
        path = path or self._report_path("Save series workbook", ".xlsx",
                                         "Excel workbooks (*.xlsx)")
        if not path:
            return
        analysis, (data, components) = self.analysis, self._analysed
        self.statusBar().showMessage(f"Writing {Path(path).name}…")
        self.background.submit(
            "workbook",
            lambda: write_series_workbook(analysis, path, data=data, components=components),
            lambda outcome: self._report_written(outcome, path))

    def save_pdf(self, path: str | Path | None = None, paper: str = "A4") -> None:
        """Write the printable series summary as a PDF."""
        if self.analysis is None:
            self.show_error("Analyse the series first.")
            return
        try:
            from trialdesk.desktop.series_pdf import write_series_pdf
        except ImportError:
            self.show_error("The series summary cannot be written as a PDF yet: this copy of "
                            "Trialdesk does not have its writer (trialdesk.desktop.series_pdf).")
            return
        path = path or self._report_path("Save series summary as PDF", ".pdf", "PDF (*.pdf)")
        if not path:
            return
        try:
            write_series_pdf(self.analysis, path, paper=paper)
        except TrialInputError as error:
            self._report_written(error, path)
            return
        self._report_written(Path(path), path)

    def _report_written(self, outcome: object, path: str | Path) -> None:
        if isinstance(outcome, TrialInputError):
            self.show_error(str(outcome))
        else:
            self.statusBar().showMessage(f"Wrote {path}.", 8000)
        self.report_written.emit(str(path))

    def show_error(self, message: str) -> None:
        """Show a message about something that could not be done (offscreen: kept in
        ``last_error`` and the status bar, for tests)."""
        self.last_error = message
        self.statusBar().showMessage(message, 15000)
        if QApplication.platformName() != "offscreen":
            QMessageBox.warning(self, "Trial series", message)

    def closeEvent(self, event: QCloseEvent) -> None:  # noqa: N802 (Qt's name)
        self.runner.cancel()
        self.runner.wait()
        self.background.wait()  # a workbook being written is finished, not cut off
        super().closeEvent(event)

