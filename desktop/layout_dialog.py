"""The "New trial layout" dialog: entries, design and field in; a new trial file out.

The breeder gives the entries (how many, or a file of entry codes), the checks, the design
(randomized complete blocks, completely randomized, or an alpha design of incomplete blocks), the
replicates, the block size, the field's rows and columns, serpentine numbering and the seed (a
new one drawn at random on request), the traits to record and the files to write: the trial file,
and optionally a blank field book workbook and a printable field book. A line under the form
says, as the settings change, how many plots and blocks that makes and, for an alpha design, its
efficiency factor against the upper bound; it is worked out off the GUI thread (a large alpha
design takes seconds to search). Create writes the files, also off the GUI thread but for the
printed field book, which is drawn where Qt's painting belongs, then offers to open the trial.

A setting that cannot be used is named in the message shown in the dialog, and its field is
marked; nothing typed is lost.
"""

from __future__ import annotations

import secrets
from collections.abc import Mapping
from dataclasses import dataclass, replace
from pathlib import Path

from PySide6.QtCore import Qt, QTimer, Signal
from PySide6.QtGui import QPalette
from PySide6.QtWidgets import (
    QCheckBox,
    QComboBox,
    QDialog,
    QDialogButtonBox,
    QFileDialog,
    QFormLayout,
    QGridLayout,
    QGroupBox,
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QPushButton,
    QRadioButton,
    QSpinBox,
    QVBoxLayout,
    QWidget,
)

from trialdesk.core.errors import TrialInputError
from trialdesk.core.exporter import export_fieldbook
from trialdesk.core.layouts import (
    Layout,
    LayoutSettingError,
    make_layout,
    numbered_entries,
    read_entry_list,
    write_layout,
)
from trialdesk.core.trialfile import TrialFile
from trialdesk.desktop.analysis_runner import Background
from trialdesk.desktop.layout_pdf import write_layout_pdf
from trialdesk.desktop.palette import ERROR_BG, ERROR_FG, STALE_FG
from trialdesk.desktop.report_pdf import PAPERS

__all__ = ["FIELD_LABELS", "LayoutDialog", "LayoutRequest", "new_seed", "summary"]

DESIGNS = (("rcbd", "Randomized complete blocks (RCBD)"), ("crd", "Completely randomized (CRD)"),
           ("alpha", "Alpha design (incomplete blocks)"))
#: The dialog's fields by the setting they hold, as the messages name them.
FIELD_LABELS = {
    "name": "Trial name", "entries": "Entries", "entry_file": "Entry file", "checks": "Checks",
    "design": "Design", "reps": "Replicates", "block_size": "Block size", "rows": "Field rows",
    "columns": "Field columns", "serpentine": "Serpentine", "seed": "Seed",
    "traits": "Traits to record", "trial_file": "Trial file", "xlsx": "Field book (XLSX)",
    "pdf": "Field book (PDF)",
}
# Names a trait cannot take: the plot fields written beside the traits in a field book.
PLOT_FIELDS = frozenset({"plot", "block", "entry", "incomplete_block", "row", "column", "name",
                         "role", "notes"})
SEEDS = (100_000, 1_000_000)  # a new seed has six digits: easy to note down and type again
PREVIEW_DELAY_MS = 250  # settings are read again this long after the last change
TRIAL_FILTER = "Trial files (*.trial)"
DIALOG_WIDTH = 860  # pixels: room for a path in each file field


def new_seed() -> int:
    """A seed drawn at random (six digits)."""
    low, high = SEEDS
    return low + secrets.randbelow(high - low)


def _codes(text: str) -> tuple[str, ...]:
    """Codes typed with commas or semicolons between them."""
    return tuple(code.strip() for code in text.replace(";", ",").split(",") if code.strip())


@dataclass(frozen=True, slots=True, kw_only=True)
class LayoutRequest:
    """What the dialog's fields say: the layout's settings and the files to write."""

    count: int | None  # the number of entries, or None when they come from ``entry_file``
    entry_file: Path | None
    checks: tuple[str, ...]
    design: str
    reps: int
    block_size: int | None
    rows: int | None
    columns: int | None
    serpentine: bool
    seed: int
    traits: tuple[str, ...] = ()
    facts: tuple[tuple[str, str], ...] = ()
    trial_file: Path | None = None
    xlsx: Path | None = None
    pdf: Path | None = None
    paper: str = "A4"

    def settings_key(self) -> LayoutRequest:
        """The request without what does not change the layout (traits, facts, files)."""
        return replace(self, traits=(), facts=(), trial_file=None, xlsx=None, pdf=None,
                       paper="A4")


@dataclass(frozen=True, slots=True, kw_only=True)
class _Drawn:
    """A layout made from a request, and the entry names read with its entries."""

    request: LayoutRequest
    layout: Layout
    names: Mapping[str, str]


@dataclass(frozen=True, slots=True, kw_only=True)
class _Written:
    """What Create wrote: the trial file, the workbook (or why not)."""

    drawn: _Drawn
    trial_file: Path
    xlsx: Path | None
    xlsx_problem: str | None


def _draw(request: LayoutRequest) -> _Drawn:
    """The layout a request asks for (runs off the GUI thread)."""
    names: dict[str, str] = {}
    if request.entry_file is not None:
        try:
            listed = read_entry_list(request.entry_file)
        except TrialInputError as error:
            raise LayoutSettingError(str(error), setting="entry_file") from None
        entries, names = listed.codes, listed.name_map()
    else:
        entries = numbered_entries(request.count)
    layout = make_layout(entries, checks=request.checks, design=request.design,
                         reps=request.reps, block_size=request.block_size, rows=request.rows,
                         columns=request.columns, serpentine=request.serpentine,
                         seed=request.seed)
    return _Drawn(request=request.settings_key(), layout=layout, names=names)


def _write(request: LayoutRequest, drawn: _Drawn | None) -> _Written:
    """Make the layout unless ``drawn`` already holds it, then write the trial file and the
    field book workbook (runs off the GUI thread).

    Raises
    ------
    LayoutSettingError
        When nothing could be written; ``setting`` names the field at fault.
    """
    if drawn is None or drawn.request != request.settings_key():
        drawn = _draw(request)
    try:
        write_layout(drawn.layout, request.trial_file, facts=dict(request.facts),
                     traits=request.traits, names=drawn.names)
    except OSError as error:
        raise LayoutSettingError(f"{request.trial_file}: the trial file could not be written "
                                 f"({error.strerror or error})", setting="trial_file") from None
    except TrialInputError as error:
        raise LayoutSettingError(str(error), setting="trial_file") from None
    problem = None
    if request.xlsx is not None:
        try:
            # Opened for editing, not read-only: closing it then leaves no side files.
            with TrialFile.open(request.trial_file) as trial:
                export_fieldbook(trial, request.xlsx, blank=True)
        except TrialInputError as error:
            problem = str(error)
    return _Written(drawn=drawn, trial_file=request.trial_file, xlsx=request.xlsx,
                    xlsx_problem=problem)


def summary(layout: Layout) -> str:
    """The live line: plots and blocks, and an alpha design's efficiency factor and bound."""
    t, n = len(layout.entries), len(layout.plots)
    checks = f" ({len(layout.checks)} of them checks)" if layout.checks else ""
    if layout.design == "alpha":
        s = t // layout.block_size
        text = (f"{n} plots: {t} entries{checks} in {layout.reps} replicates, each of {s} "
                f"incomplete blocks of {layout.block_size} ({layout.reps * s} blocks in all).")
    elif layout.design == "rcbd":
        text = (f"{n} plots: {t} entries{checks} in {layout.reps} replicates, each a "
                f"complete block.")
    else:
        text = f"{n} plots: {t} entries{checks}, {layout.reps} plots each, in no blocks."
    if layout.rows is not None:
        empty = layout.rows * layout.columns - n
        text += (f" Field of {layout.rows} x {layout.columns}"
                 + (f", {empty} places left empty." if empty else ", every place used."))
    if layout.efficiency is not None:
        factor, bound = layout.efficiency.factor, layout.efficiency.upper_bound
        text += (f" Efficiency factor {factor:.4f} against an upper bound of {bound:.4f} "
                 f"({100 * factor / bound:.1f}% of it).")
    return text


class LayoutDialog(QDialog):
    """The "New trial layout" dialog.

    Signals
    -------
    created(str) : a trial file was written (its path).
    open_requested(str) : the breeder asked to open the new trial in the main window.
    """

    created = Signal(str)
    open_requested = Signal(str)

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("New trial layout")
        self.setMinimumWidth(DIALOG_WIDTH)
        self._background = Background(self)
        self._drawn: _Drawn | None = None
        self._written: Path | None = None
        self._problem_shown = False  # the live line shows a problem, not a layout
        self._previewing = False  # a layout for the live line is being worked out
        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.setInterval(PREVIEW_DELAY_MS)
        self._timer.timeout.connect(self._preview)
        self._build()
        self._design_changed()
        self._field_changed()
        self._schedule()

    # --- building -------------------------------------------------------------------------------

    def _build(self) -> None:
        self.name = QLineEdit()
        self.name.setPlaceholderText("the trial file's name")
        self.station = QLineEdit()
        self.season = QLineEdit()
        self.season.setPlaceholderText("e.g. 2027 or 2026/27")
        trial = QGroupBox("Trial")
        form = QFormLayout(trial)
        form.addRow("Trial name", self.name)
        form.addRow("Station", self.station)
        form.addRow("Season", self.season)

        self.by_count = QRadioButton("Number of entries")
        self.by_file = QRadioButton("Entry codes from a file")
        self.by_count.setChecked(True)
        self.count = QSpinBox()
        self.count.setRange(2, 99_999)
        self.count.setValue(25)
        self.count.setToolTip("Entries are numbered E001, E002, ...")
        self.entry_file = QLineEdit()
        self.entry_file.setPlaceholderText("a text or CSV file")
        self.entry_file.setToolTip("One entry code a line, or a CSV file with a column 'entry' "
                                   "(and, if you like, 'name')")
        self.entry_browse = QPushButton("Choose...")
        self.entry_browse.clicked.connect(self._choose_entry_file)
        self.checks = QLineEdit()
        self.checks.setPlaceholderText("codes separated by commas, e.g. E001, E002")
        self.checks.setToolTip("Checks not among the entries are added to them")
        entries = QGroupBox("Entries")
        grid = QGridLayout(entries)
        grid.addWidget(self.by_count, 0, 0)
        grid.addWidget(self.count, 0, 1, 1, 2)
        grid.addWidget(self.by_file, 1, 0)
        grid.addWidget(self.entry_file, 1, 1)
        grid.addWidget(self.entry_browse, 1, 2)
        grid.addWidget(QLabel("Checks"), 2, 0)
        grid.addWidget(self.checks, 2, 1, 1, 2)
        grid.setColumnStretch(1, 1)

        self.design = QComboBox()
        for key, label in DESIGNS:
            self.design.addItem(label, key)
        self.reps = QSpinBox()
        self.reps.setRange(2, 99)
        self.reps.setValue(3)
        self.reps_label = QLabel("Replicates")
        self.block_size = QSpinBox()
        self.block_size.setRange(2, 999)
        self.block_size.setValue(5)
        self.block_size.setToolTip("Plots in each incomplete block; it must divide the number "
                                   "of entries (checks included)")
        self.seed = QLineEdit(str(new_seed()))
        self.seed.setToolTip("The same seed, with the same entries and settings, gives the same "
                             "layout")
        self.new_seed_button = QPushButton("New seed")
        self.new_seed_button.setToolTip("Draw a new seed at random")
        self.new_seed_button.clicked.connect(lambda: self.seed.setText(str(new_seed())))
        seed_row = QHBoxLayout()
        seed_row.addWidget(self.seed, 1)
        seed_row.addWidget(self.new_seed_button)
        design = QGroupBox("Design")
        form = QFormLayout(design)
        form.addRow("Design", self.design)
        form.addRow(self.reps_label, self.reps)
        form.addRow("Block size", self.block_size)
        form.addRow("Seed", seed_row)

        self.rows = QSpinBox()
        self.columns = QSpinBox()
        for box in (self.rows, self.columns):
            box.setRange(0, 9999)
            box.setSpecialValueText("not given")
        self.serpentine = QCheckBox("Serpentine: every other row runs back")
        field = QGroupBox("Field (optional)")
        form = QFormLayout(field)
        form.addRow("Rows", self.rows)
        form.addRow("Columns", self.columns)
        form.addRow("", self.serpentine)

        self.traits = QLineEdit("grain_yield")
        self.traits.setPlaceholderText("trait names separated by commas")
        record = QGroupBox("Traits to record")
        form = QFormLayout(record)
        form.addRow("Traits", self.traits)

        self.trial_file = QLineEdit()
        self.xlsx = QLineEdit()
        self.pdf = QLineEdit()
        self.xlsx.setPlaceholderText("optional")
        self.pdf.setPlaceholderText("optional")
        self.paper = QComboBox()
        self.paper.addItems(list(PAPERS))
        files = QGroupBox("Files to write")
        form = QFormLayout(files)
        for label, edit, choose in (("Trial file", self.trial_file, self._choose_trial_file),
                                    ("Field book (XLSX)", self.xlsx, self._choose_xlsx),
                                    ("Field book (PDF)", self.pdf, self._choose_pdf)):
            row = QHBoxLayout()
            row.addWidget(edit, 1)
            if edit is self.pdf:
                row.addWidget(self.paper)
            button = QPushButton("Choose...")
            button.clicked.connect(choose)
            row.addWidget(button)
            form.addRow(label, row)

        self.summary = QLabel()
        self.summary.setWordWrap(True)
        self.summary.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.message = QLabel()
        self.message.setWordWrap(True)
        self.message.setVisible(False)
        self.buttons = QDialogButtonBox()
        self.create_button = self.buttons.addButton("Create",
                                                    QDialogButtonBox.ButtonRole.AcceptRole)
        self.open_button = self.buttons.addButton("Open the trial",
                                                  QDialogButtonBox.ButtonRole.ActionRole)
        self.open_button.setVisible(False)
        self.close_button = self.buttons.addButton(QDialogButtonBox.StandardButton.Close)
        self.create_button.setDefault(True)
        self.create_button.clicked.connect(self.create)
        self.open_button.clicked.connect(self._open_trial)
        self.close_button.clicked.connect(self.reject)

        columns = QHBoxLayout()
        left, right = QVBoxLayout(), QVBoxLayout()
        for box in (trial, entries, record):
            left.addWidget(box)
        for box in (design, field):
            right.addWidget(box)
        left.addStretch(1)
        right.addStretch(1)
        columns.addLayout(left, 1)
        columns.addLayout(right, 1)
        layout = QVBoxLayout(self)
        layout.addLayout(columns)
        layout.addWidget(files)
        layout.addWidget(self.summary)
        layout.addWidget(self.message)
        layout.addWidget(self.buttons)

        self.fields: dict[str, QWidget] = {
            "name": self.name, "entries": self.count, "entry_file": self.entry_file,
            "checks": self.checks, "design": self.design, "reps": self.reps,
            "block_size": self.block_size, "rows": self.rows, "columns": self.columns,
            "serpentine": self.serpentine, "seed": self.seed, "traits": self.traits,
            "trial_file": self.trial_file, "xlsx": self.xlsx, "pdf": self.pdf}
        for box in (self.count, self.reps, self.block_size, self.rows, self.columns):
            box.valueChanged.connect(self._schedule)
        for edit in (self.entry_file, self.checks, self.seed):
            edit.textChanged.connect(self._schedule)
        for button in (self.by_count, self.by_file, self.serpentine):
            button.toggled.connect(self._schedule)
        self.by_file.toggled.connect(self._entries_changed)
        self.design.currentIndexChanged.connect(self._design_changed)
        self.design.currentIndexChanged.connect(self._schedule)
        self.rows.valueChanged.connect(self._field_changed)
        self.columns.valueChanged.connect(self._field_changed)
        self._entries_changed()

    def _entries_changed(self) -> None:
        from_file = self.by_file.isChecked()
        self.count.setEnabled(not from_file)
        self.entry_file.setEnabled(from_file)
        self.entry_browse.setEnabled(from_file)

    def _design_changed(self) -> None:
        design = self.design.currentData()
        self.block_size.setEnabled(design == "alpha")
        self.reps_label.setText("Plots per entry" if design == "crd" else "Replicates")

    def _field_changed(self) -> None:
        self.serpentine.setEnabled(self.rows.value() > 0 and self.columns.value() > 0)

    # --- choosing files -------------------------------------------------------------------------

    def _choose_entry_file(self) -> None:
        name, _ = QFileDialog.getOpenFileName(self, "Entry codes", self.entry_file.text(),
                                              "Entry lists (*.csv *.txt *.tsv)")
        if name:
            self.entry_file.setText(name)

    def _choose_trial_file(self) -> None:
        name, _ = QFileDialog.getSaveFileName(self, "The new trial file", self.trial_file.text(),
                                              TRIAL_FILTER)
        if not name:
            return
        path = Path(name if name.lower().endswith(".trial") else f"{name}.trial")
        self.trial_file.setText(str(path))
        for edit, suffix in ((self.xlsx, ".xlsx"), (self.pdf, ".pdf")):
            if not edit.text().strip():
                edit.setText(str(path.with_name(f"{path.stem} field book{suffix}")))

    def _choose_xlsx(self) -> None:
        self._choose_output(self.xlsx, "Blank field book", "Excel workbooks (*.xlsx)", ".xlsx")

    def _choose_pdf(self) -> None:
        self._choose_output(self.pdf, "Printed field book", "PDF (*.pdf)", ".pdf")

    def _choose_output(self, edit: QLineEdit, title: str, kind: str, suffix: str) -> None:
        name, _ = QFileDialog.getSaveFileName(self, title, edit.text(), kind)
        if name:
            edit.setText(name if name.lower().endswith(suffix) else f"{name}{suffix}")

    # --- reading the fields ---------------------------------------------------------------------

    def request(self) -> LayoutRequest:
        """What the fields say.

        Raises
        ------
        LayoutSettingError
            When a field cannot be read; ``setting`` names it (a key of :data:`FIELD_LABELS`).
        """
        entry_file = None
        if self.by_file.isChecked():
            text = self.entry_file.text().strip()
            if not text:
                raise LayoutSettingError("choose the file of entry codes", setting="entry_file")
            entry_file = Path(text)
        seed_text = self.seed.text().strip()
        if not seed_text.isdigit():
            raise LayoutSettingError(f"a seed is a whole number, 0 or more, not '{seed_text}' "
                                     "(press New seed to draw one)", setting="seed")
        rows, columns = self.rows.value() or None, self.columns.value() or None
        design = self.design.currentData()
        facts = tuple((key, edit.text().strip()) for key, edit in (
            ("name", self.name), ("station", self.station), ("season", self.season))
            if edit.text().strip())
        return LayoutRequest(
            count=None if entry_file else self.count.value(), entry_file=entry_file,
            checks=_codes(self.checks.text()), design=design, reps=self.reps.value(),
            block_size=self.block_size.value() if design == "alpha" else None,
            rows=rows, columns=columns,
            serpentine=self.serpentine.isChecked() and self.serpentine.isEnabled(),
            seed=int(seed_text), traits=self._traits(), facts=facts,
            trial_file=self._path(self.trial_file), xlsx=self._path(self.xlsx),
            pdf=self._path(self.pdf), paper=self.paper.currentText())

    def _traits(self) -> tuple[str, ...]:
        traits = _codes(self.traits.text())
        seen: set[str] = set()
        for trait in traits:
            if trait.casefold() in PLOT_FIELDS:
                raise LayoutSettingError(f"'{trait}' is a column of every field book already; "
                                         "give the trait another name", setting="traits")
            if trait.casefold() in seen:
                raise LayoutSettingError(f"'{trait}' is given twice", setting="traits")
            seen.add(trait.casefold())
        return traits

    @staticmethod
    def _path(edit: QLineEdit) -> Path | None:
        text = edit.text().strip()
        return Path(text).expanduser() if text else None

    def _files(self, request: LayoutRequest) -> None:
        """Check the files to write before any is written."""
        if request.trial_file is None:
            raise LayoutSettingError("give the name of the new trial file", setting="trial_file")
        for setting, path, suffix in (("trial_file", request.trial_file, ".trial"),
                                      ("xlsx", request.xlsx, ".xlsx"),
                                      ("pdf", request.pdf, ".pdf")):
            if path is None:
                continue
            if path.suffix.lower() != suffix:
                raise LayoutSettingError(f"{path}: the name must end in {suffix}",
                                         setting=setting)
            if not path.parent.is_dir():
                raise LayoutSettingError(f"{path}: there is no folder {path.parent}",
                                         setting=setting)
        if request.trial_file.exists():
            raise LayoutSettingError(f"{request.trial_file}: the file exists already; a layout "
                                     "is never written over a file: choose a new name",
                                     setting="trial_file")
        if request.xlsx is not None and request.xlsx == request.pdf:
            raise LayoutSettingError("the workbook and the PDF need names of their own",
                                     setting="pdf")

    # --- the live line --------------------------------------------------------------------------

    def _schedule(self) -> None:
        self._timer.start()

    def _preview(self) -> None:
        try:
            request = self.request().settings_key()
        except LayoutSettingError as error:
            self._show_problem(error, live=True)
            return
        if self._drawn is not None and self._drawn.request == request:
            self._show_drawn(self._drawn)
            return
        self.summary.setStyleSheet(f"color: {STALE_FG.name()};")
        if not self.summary.text() or self._problem_shown:
            self.summary.setText("Working out the layout...")
        self._previewing = True
        self._background.submit("preview", lambda: _draw(request), self._previewed)

    def _previewed(self, outcome: _Drawn | TrialInputError) -> None:
        self._previewing = False
        if isinstance(outcome, TrialInputError):
            self._show_problem(outcome, live=True)
        else:
            self._drawn = outcome
            self._show_drawn(outcome)

    def _show_drawn(self, drawn: _Drawn) -> None:
        self._mark(None)
        self._problem_shown = False
        self.summary.setStyleSheet("")
        self.summary.setText(summary(drawn.layout))

    def _show_problem(self, error: TrialInputError, *, live: bool) -> None:
        """Name the field at fault, mark it, and say what is wrong (under the form while the
        settings are typed, or in the message of Create)."""
        setting = getattr(error, "setting", None)
        text = error.message if isinstance(error, LayoutSettingError) else str(error)
        if setting in FIELD_LABELS:
            text = f"{FIELD_LABELS[setting]}: {text}"
        self._mark(setting)
        if live:
            self._problem_shown = True
            self.summary.setStyleSheet(f"color: {ERROR_FG.name()};")
            self.summary.setText(text)
        else:
            repeated = self._problem_shown and self.summary.text() == text
            self.message.setStyleSheet(f"color: {ERROR_FG.name()};")
            self.message.setText("Nothing was written: see the problem above." if repeated
                                 else text)
            self.message.setVisible(True)

    def _mark(self, setting: str | None) -> None:
        """Shade the field at fault (and only it)."""
        for key, widget in self.fields.items():
            palette = QPalette()  # the application's
            if key == setting:
                palette.setColor(QPalette.ColorRole.Base, ERROR_BG)
                palette.setColor(QPalette.ColorRole.Button, ERROR_BG)
            widget.setPalette(palette)

    # --- creating -------------------------------------------------------------------------------

    def is_working(self) -> bool:
        """Whether the live line or the files are still being worked on."""
        return self._timer.isActive() or self._previewing or not self.create_button.isEnabled()

    def create(self) -> None:
        """Write the trial file and the field books asked for (the workbook off the GUI
        thread); ``created`` is emitted when done."""
        self.message.setVisible(False)
        try:
            request = self.request()
            self._files(request)
        except LayoutSettingError as error:
            self._show_problem(error, live=False)
            self.fields[error.setting].setFocus()
            return
        self._mark(None)
        self.create_button.setEnabled(False)
        self.message.setStyleSheet("")
        self.message.setText(f"Writing {request.trial_file.name}...")
        self.message.setVisible(True)
        drawn = self._drawn
        self._background.submit("create", lambda: _write(request, drawn),
                                lambda outcome: self._written_out(request, outcome))

    def _written_out(self, request: LayoutRequest, outcome: _Written | TrialInputError) -> None:
        self.create_button.setEnabled(True)
        if isinstance(outcome, TrialInputError):  # nothing was written
            self._show_problem(outcome, live=False)
            setting = getattr(outcome, "setting", None)
            if setting in self.fields:
                self.fields[setting].setFocus()
            return
        self._drawn = outcome.drawn
        written = [str(outcome.trial_file)]
        problems: list[tuple[str, str]] = []
        if outcome.xlsx_problem is not None:
            problems.append(("xlsx", f"not written: {outcome.xlsx_problem}"))
        elif outcome.xlsx is not None:
            written.append(str(outcome.xlsx))
        if request.pdf is not None:
            try:
                write_layout_pdf(outcome.drawn.layout, request.pdf, paper=request.paper,
                                 facts=dict(request.facts), traits=request.traits)
            except TrialInputError as error:
                problems.append(("pdf", f"not written: {error}"))
            else:
                written.append(str(request.pdf))
        self._written = outcome.trial_file
        text = "Wrote " + "; ".join(written) + "."
        if problems:
            self._mark(problems[0][0])
            text += "".join(f" {FIELD_LABELS[setting]}: {why}" for setting, why in problems)
        self.message.setStyleSheet(f"color: {ERROR_FG.name()};" if problems else "")
        self.message.setText(text)
        self.open_button.setVisible(True)
        self.open_button.setDefault(True)
        self.created.emit(str(outcome.trial_file))

    def _open_trial(self) -> None:
        if self._written is not None:
            self.open_requested.emit(str(self._written))
            self.accept()

    def wait(self) -> None:
        """Wait for the work under way (in tests, and before the dialog goes)."""
        self._background.wait()
