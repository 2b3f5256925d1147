"""The main window: the open trial's pages (plots, entries, trial facts, set-up, results).

Nothing here is ever unsaved: every edit goes into the trial file when it is made, so the window
has no Save and never asks about unsaved changes. The pages are built right after the window first
shows, so the window appears before the data libraries load.
"""

from __future__ import annotations

from pathlib import Path

from PySide6.QtCore import QSettings, Qt, QTimer, Signal
from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import (
    QApplication,
    QFileDialog,
    QLabel,
    QMainWindow,
    QMessageBox,
    QProgressBar,
    QPushButton,
    QSplitter,
    QTabWidget,
    QWidget,
)

from trialdesk.core.version import VERSION

MAX_RECENT = 8
FIELD_BOOK_FILTER = "Field books (*.csv *.xlsx *.txt *.tsv)"
TRIAL_FILTER = "Trial files (*.trial)"


class MainWindow(QMainWindow):
    """The Trialdesk window. ``pages_ready`` fires once the pages exist."""

    pages_ready = Signal()
    report_written = Signal(str)  # a workbook or PDF was written (or failed): its path

    def __init__(self, parent: QWidget | None = None) -> None:
        super().__init__(parent)
        self.setWindowTitle("Trialdesk")
        self.setAcceptDrops(True)
        self.session = None
        self.runner = None
        self.series_window = None
        self.layout_dialog = None
        self._pending: list = []
        self._build_actions()
        self._build_menus()
        self._build_status()
        self.tabs = QTabWidget()
        self.tabs.setDocumentMode(True)
        self.placeholder = QLabel("Open a trial file, import a field book, or open the demo "
                                  "trial from the Trial menu.")
        self.placeholder.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.setCentralWidget(self.placeholder)
        self._restore_layout()
        self._pages_scheduled = False
        # The pages (and the data libraries they load) come right after the first paint, so the
        # window is on screen at once; the timer covers a window that is never painted.
        QTimer.singleShot(1500, self._schedule_pages)

    def paintEvent(self, event) -> None:  # noqa: N802 (Qt's name)
        super().paintEvent(event)
        self._schedule_pages()

    def _schedule_pages(self) -> None:
        if not self._pages_scheduled:
            self._pages_scheduled = True
            QTimer.singleShot(0, self._build_pages)

    # --- building -------------------------------------------------------------------------------

    def _action(self, text: str, slot, shortcut=None, tip: str = "") -> QAction:
        action = QAction(text, self)
        if shortcut is not None:
            action.setShortcut(QKeySequence(shortcut))
        if tip:
            action.setStatusTip(tip)
        action.triggered.connect(slot)
        return action

    def _build_actions(self) -> None:
        keys = QKeySequence.StandardKey
        self.act_open = self._action("&Open trial...", self.choose_trial, keys.Open,
                                     "Open a trial file")
        self.act_import = self._action("&Import field book...", self.choose_fieldbook, "Ctrl+I",
                                       "Make a trial file from a CSV or XLSX field book")
        self.act_demo = self._action("Open the &demo trial", self.open_demo)
        self.act_layout = self._action(
            "New trial &layout...", self.new_layout,
            tip="Randomize entries to plots and make a new trial file (and its field books)")
        self.act_export = self._action("&Export plot data...", self.export_plots, keys.SaveAs,
                                       "Write the plot data as a field book (CSV or XLSX)")
        self.act_blank = self._action("Export &blank field book...", self.export_blank)
        self.act_workbook = self._action(
            "Save results &workbook...", self.save_workbook, "Ctrl+Shift+W",
            "Write the results workbook (summary, one sheet per trait, diagnostics, data)")
        self.act_pdf = self._action("Save trial summary as P&DF...", self.save_pdf, "Ctrl+Shift+P",
                                    "Write the one-page trial summary as a PDF")
        self.act_print = self._action("&Print trial summary...", self.print_summary, keys.Print)
        self.act_close = self._action("&Close trial", self.close_trial, keys.Close)
        self.act_quit = self._action("&Quit", self.close, keys.Quit)
        self.act_undo = self._action("&Undo", self.undo, keys.Undo)
        self.act_redo = self._action("&Redo", self.redo, keys.Redo)
        self.act_copy = self._action("&Copy", lambda: self._grid_call("copy_selection"),
                                     keys.Copy)
        self.act_paste = self._action("&Paste", lambda: self._grid_call("paste"), keys.Paste)
        self.act_find = self._action("&Find plot or entry", lambda: self._grid_call(
            "focus_find"), keys.Find)
        self.act_run = self._action("&Run analysis", self.run_analysis, "Ctrl+R")
        self.act_cancel = self._action("&Cancel analysis", self.cancel_analysis)
        self.act_series = self._action(
            "Analyse a trial &series...", self.open_series,
            tip="Analyse the same entries grown in several environments (trial files or one "
                "field book)")
        self.act_about = self._action("&About Trialdesk", self.show_about)
        for action in (self.act_undo, self.act_redo, self.act_cancel, self.act_workbook,
                       self.act_pdf, self.act_print):
            action.setEnabled(False)

    def _build_menus(self) -> None:
        bar = self.menuBar()
        trial = bar.addMenu("&Trial")
        for action in (self.act_open, self.act_import, self.act_layout, self.act_demo):
            trial.addAction(action)
        self.recent_menu = trial.addMenu("Recent trials")
        trial.addSeparator()
        for action in (self.act_export, self.act_blank):
            trial.addAction(action)
        trial.addSeparator()
        trial.addAction(self.act_close)
        trial.addAction(self.act_quit)
        edit = bar.addMenu("&Edit")
        for action in (self.act_undo, self.act_redo, self.act_copy, self.act_paste,
                       self.act_find):
            edit.addAction(action)
        analysis = bar.addMenu("&Analysis")
        analysis.addAction(self.act_run)
        analysis.addAction(self.act_cancel)
        analysis.addSeparator()
        analysis.addAction(self.act_series)
        report = bar.addMenu("Re&port")
        for action in (self.act_workbook, self.act_pdf, self.act_print):
            report.addAction(action)
        bar.addMenu("&Help").addAction(self.act_about)
        self._refresh_recent()
        toolbar = self.addToolBar("Main")
        toolbar.setObjectName("main-toolbar")
        for action in (self.act_open, self.act_import, self.act_undo, self.act_redo,
                       self.act_run):
            toolbar.addAction(action)

    def _build_status(self) -> None:
        self.progress = QProgressBar()
        self.progress.setMaximumWidth(220)
        self.progress.setVisible(False)
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setVisible(False)
        self.cancel_button.clicked.connect(self.cancel_analysis)
        self.statusBar().addPermanentWidget(self.progress)
        self.statusBar().addPermanentWidget(self.cancel_button)

    def _build_pages(self) -> None:
        """Make the session and the pages (after the window is on screen)."""
        from trialdesk.desktop.analysis_runner import AnalysisRunner, Background
        from trialdesk.desktop.analysis_setup import AnalysisSetup
        from trialdesk.desktop.entries_panel import EntriesPanel
        from trialdesk.desktop.facts_panel import FactsPanel
        from trialdesk.desktop.plot_grid import PlotGrid
        from trialdesk.desktop.problems_panel import ProblemsPanel
        from trialdesk.desktop.results_view import ResultsView
        from trialdesk.desktop.session import TrialSession

        self.session = TrialSession(self)
        self.grid = PlotGrid(self.session)
        self.problems = ProblemsPanel(self.session)
        plots_page = QSplitter(Qt.Orientation.Horizontal)
        plots_page.addWidget(self.grid)
        plots_page.addWidget(self.problems)
        plots_page.setStretchFactor(0, 4)
        plots_page.setStretchFactor(1, 1)
        self.entries_panel = EntriesPanel(self.session)
        self.facts_panel = FactsPanel(self.session)
        self.setup = AnalysisSetup(self.session)
        self.results_view = ResultsView(self.session)
        self.tabs.addTab(plots_page, "Plots")
        self.tabs.addTab(self.entries_panel, "Entries")
        self.tabs.addTab(self.facts_panel, "Trial facts")
        self.tabs.addTab(self.setup, "Analysis set-up")
        self.tabs.addTab(self.results_view, "Results")
        self.runner = AnalysisRunner(self.session, self)
        self.runner.progress.connect(self._on_progress)
        self.runner.finished.connect(self._on_finished)
        self.runner.failed.connect(self._on_failed)
        self.runner.cancelled.connect(self._on_cancelled)
        self.setup.run_requested.connect(self.run_analysis)
        self.problems.problem_activated.connect(self.show_plot)
        for panel in (self.grid, self.entries_panel, self.facts_panel):
            panel.status_message.connect(lambda text: self.statusBar().showMessage(text, 8000))
        self.results_view.plot_clicked.connect(self.show_plot)
        self.session.opened.connect(self._on_opened)
        self.session.undo_changed.connect(self._on_undo_changed)
        self.session.results_changed.connect(self._update_title)
        self.session.results_changed.connect(self._results_changed)
        self.reports = Background(self)
        index = QSettings().value("window/tab", 0, type=int)
        self.tabs.setCurrentIndex(index if 0 <= index < self.tabs.count() else 0)
        self.pages_ready.emit()
        for job in self._pending:
            job()
        self._pending.clear()

    def _when_ready(self, job) -> None:
        if self.session is None:
            self._pending.append(job)
        else:
            job()

    # --- opening --------------------------------------------------------------------------------

    def open_demo(self) -> None:
        """Open the demo trial (made from the bundled field book the first time)."""
        self._when_ready(lambda: self._guarded(self._open_demo_now))

    def _open_demo_now(self) -> None:
        path = self.session.open_demo()
        self._remember(path)

    def open_path(self, path: str | Path) -> None:
        """Open a trial file, or import a field book through the column-role step."""
        self._when_ready(lambda: self._guarded(lambda: self._open_now(Path(path))))

    def _open_now(self, path: Path) -> None:
        if path.suffix.lower() == ".trial":
            self.session.open(path)
            self._remember(path)
        else:
            self.import_fieldbook(path)

    def open_last(self) -> None:
        """Reopen the trial used last, if it still exists."""
        recent = self._recent()
        if recent and Path(recent[0]).exists():
            self.open_path(recent[0])

    def choose_trial(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Open trial", "", TRIAL_FILTER)
        if path:
            self.open_path(path)

    def choose_fieldbook(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Import field book", "", FIELD_BOOK_FILTER)
        if path:
            self.open_path(path)

    def import_fieldbook(self, path: Path, target: Path | None = None, *,
                         dialog_result=None) -> Path | None:
        """Import a field book: roles, traits and checks in a dialog, then a new trial file.

        ``target`` and ``dialog_result`` (a callable taking the dialog, returning True to accept)
        let tests run the step without a user.
        """
        from trialdesk.core.importer import import_fieldbook
        from trialdesk.desktop.import_dialog import ImportDialog

        dialog = ImportDialog(path, self)
        accepted = dialog_result(dialog) if dialog_result else dialog.exec()
        if not accepted:
            return None
        book = dialog.fieldbook()
        if target is None:
            name, _ = QFileDialog.getSaveFileName(self, "Save the new trial as",
                                                  str(path.with_suffix(".trial")), TRIAL_FILTER)
            if not name:
                return None
            target = Path(name)
        report = import_fieldbook(book, target, checks=dialog.chosen_checks())
        self.statusBar().showMessage(report.text().splitlines()[0], 8000)
        self.session.open(target)
        self._remember(target)
        return target

    def close_trial(self) -> None:
        if self.session is not None:
            self.session.close()

    def _guarded(self, job) -> None:
        """Run a job, showing a TrialInputError as a message, never a traceback."""
        from trialdesk.core.errors import TrialInputError

        try:
            job()
        except TrialInputError as error:
            self.show_error(str(error))

    def show_error(self, message: str) -> None:
        box = QMessageBox(QMessageBox.Icon.Warning, "Trialdesk", message,
                          QMessageBox.StandardButton.Ok, self)
        box.setModal(True)
        if QApplication.platformName() == "offscreen":
            self.statusBar().showMessage(message, 15000)
            self.last_error = message
        else:
            box.exec()

    # --- editing and analysis -------------------------------------------------------------------

    def undo(self) -> None:
        if self.session is not None and self.session.trial is not None:
            self._guarded(self.session.undo)

    def redo(self) -> None:
        if self.session is not None and self.session.trial is not None:
            self._guarded(self.session.redo)

    def _grid_call(self, name: str) -> None:
        if self.session is not None and hasattr(self.grid, name):
            getattr(self.grid, name)()

    def show_plot(self, plot: str, trait: str | None = None) -> None:
        """Show a plot's row in the grid (from a problem or a chart point)."""
        self.tabs.setCurrentIndex(0)
        self.grid.select_plot(plot, trait)

    def run_analysis(self, settings=None) -> None:
        if self.session is None or self.session.trial is None or self.runner.is_running():
            return
        settings = settings if settings is not None else self.session.settings()
        self.progress.setRange(0, 0)
        self.progress.setVisible(True)
        self.cancel_button.setVisible(True)
        self.act_cancel.setEnabled(True)
        self.act_run.setEnabled(False)
        self.statusBar().showMessage("Analysing...")
        self.runner.start(settings)

    def open_series(self) -> None:
        """Show the trial-series window (made the first time)."""
        if self.series_window is None:
            from trialdesk.desktop.series_window import SeriesWindow

            self.series_window = SeriesWindow(self)
        self.series_window.show()
        self.series_window.raise_()
        self.series_window.activateWindow()

    def new_layout(self) -> None:
        """Show the dialog that draws a field layout and writes a new trial file (made the first
        time and kept, so what was typed is still there when it is opened again)."""
        if self.layout_dialog is None:
            from trialdesk.desktop.layout_dialog import LayoutDialog

            self.layout_dialog = LayoutDialog(self)
            self.layout_dialog.open_requested.connect(self.open_path)
        self.layout_dialog.open()

    def cancel_analysis(self) -> None:
        if self.runner is not None and self.runner.is_running():
            self.runner.cancel()

    def _analysis_done(self) -> None:
        self.progress.setVisible(False)
        self.cancel_button.setVisible(False)
        self.act_cancel.setEnabled(False)
        self.act_run.setEnabled(True)

    def _on_progress(self, done: int, total: int, trait: str) -> None:
        self.progress.setRange(0, total)
        self.progress.setValue(done)
        self.statusBar().showMessage(f"Analysing {trait} ({done + 1} of {total})...")

    def _on_finished(self, results) -> None:
        self._analysis_done()
        # Show the results page first, so hidden pages (the set-up read-out) wait until they
        # are looked at instead of recomputing now.
        self.tabs.setCurrentWidget(self.results_view)
        self.session.set_results(results)
        self.statusBar().showMessage("Analysis done.", 5000)

    def _on_failed(self, message: str) -> None:
        self._analysis_done()
        self.show_error(message)

    def _on_cancelled(self) -> None:
        self._analysis_done()
        self.statusBar().showMessage("Analysis cancelled.", 5000)

    # --- output ---------------------------------------------------------------------------------

    def export_plots(self, blank: bool = False) -> None:
        if self.session is None or self.session.trial is None:
            return
        from trialdesk.core.exporter import export_fieldbook

        title = "Export blank field book" if blank else "Export plot data"
        suggested = self.session.path.with_suffix(".xlsx" if blank else ".csv")
        name, _ = QFileDialog.getSaveFileName(self, title, str(suggested),
                                              "Field books (*.csv *.xlsx)")
        if name:
            self._guarded(lambda: export_fieldbook(self.session.trial, name, blank=blank))

    def export_blank(self) -> None:
        self.export_plots(blank=True)

    def current_report(self):
        """The report of the current results, or None (told why) when there are none or they are
        out of date: a report of results that no longer match the data would mislead."""
        session = self.session
        if session is None or session.results is None:
            self.statusBar().showMessage("Run the analysis first.", 5000)
            return None
        if session.results_stale:
            self.show_error("The results are out of date: the data changed after the analysis. "
                            "Run the analysis again before making a report.")
            return None
        from trialdesk.core.report import build_report

        return build_report(session.results, session.results_book, facts=session.facts,
                            traits=session.traits, entries=session.entries)

    def _report_path(self, title: str, suffix: str, kind: str) -> str | None:
        suggested = self.session.path.with_name(f"{self.session.path.stem} results{suffix}")
        name, _ = QFileDialog.getSaveFileName(self, title, str(suggested), kind)
        if name and not name.lower().endswith(suffix):
            name += suffix
        return name or None

    def save_workbook(self, path: str | Path | None = None) -> None:
        """Write the results workbook (in the background: a large trial takes seconds)."""
        report = self.current_report()
        if report is None:
            return
        path = path or self._report_path("Save results workbook", ".xlsx",
                                         "Excel workbooks (*.xlsx)")
        if not path:
            return
        from trialdesk.core.workbook import write_workbook

        book = self.session.results_book
        self.statusBar().showMessage(f"Writing {Path(path).name}...")
        self.reports.submit("workbook", lambda: write_workbook(report, path, book=book),
                            lambda outcome: self._report_written(outcome, path))

    def save_pdf(self, path: str | Path | None = None, paper: str = "A4") -> None:
        """Write the printable trial summary as a PDF."""
        report = self.current_report()
        if report is None:
            return
        path = path or self._report_path("Save trial summary as PDF", ".pdf", "PDF (*.pdf)")
        if not path:
            return
        from trialdesk.core.errors import TrialInputError
        from trialdesk.desktop.report_pdf import write_pdf

        try:
            write_pdf(report, path, paper=paper)
        except TrialInputError as error:
            self._report_written(error, path)
            return
        self._report_written(Path(path), path)

    def _report_written(self, outcome, path: str | Path) -> None:
        from trialdesk.core.errors import TrialInputError

        if isinstance(outcome, TrialInputError):
            self.show_error(str(outcome))
        else:
            self.statusBar().showMessage(f"Wrote {path}.", 8000)
        self.report_written.emit(str(path))

    def print_summary(self) -> None:
        """Print the trial summary through the system's print dialog."""
        report = self.current_report()
        if report is None:
            return
        from PySide6.QtPrintSupport import QPrintDialog, QPrinter

        printer = QPrinter(QPrinter.PrinterMode.HighResolution)
        if QPrintDialog(printer, self).exec():
            self.print_to(printer, report)

    def print_to(self, printer, report=None) -> int:
        """Draw the trial summary on a printer (the same drawing as the PDF); the page count."""
        from trialdesk.desktop.report_pdf import render_report

        report = report if report is not None else self.current_report()
        return 0 if report is None else render_report(report, printer)

    def _results_changed(self) -> None:
        ready = self.session.results is not None
        for action in (self.act_workbook, self.act_pdf, self.act_print):
            action.setEnabled(ready)

    def show_about(self) -> None:
        from trialdesk.core.cautions import CAUTIONS

        QMessageBox.about(self, "About Trialdesk",
                          f"<h3>Trialdesk {VERSION}</h3><p>Analysis of replicated variety and "
                          f"yield trials.</p><p>{CAUTIONS}</p>")

    # --- state ----------------------------------------------------------------------------------

    def _on_opened(self) -> None:
        trial_open = self.session.trial is not None
        self.setCentralWidget(self.tabs if trial_open else self._new_placeholder())
        for action in (self.act_export, self.act_blank, self.act_close, self.act_run):
            action.setEnabled(trial_open)
        self._update_title()

    def _new_placeholder(self) -> QLabel:
        self.tabs.setParent(None)
        self.placeholder = QLabel("No trial is open. Use the Trial menu to open one.")
        self.placeholder.setAlignment(Qt.AlignmentFlag.AlignCenter)
        return self.placeholder

    def _update_title(self) -> None:
        if self.session is None or self.session.trial is None:
            self.setWindowTitle("Trialdesk")
            return
        stale = " (results out of date)" if self.session.results_stale else ""
        self.setWindowTitle(f"{self.session.name} [{self.session.path.name}]{stale} - Trialdesk")

    def _on_undo_changed(self, can_undo: bool, can_redo: bool) -> None:
        self.act_undo.setEnabled(can_undo)
        self.act_redo.setEnabled(can_redo)

    def _recent(self) -> list[str]:
        value = QSettings().value("recent", [])
        return [value] if isinstance(value, str) else list(value or [])

    def _remember(self, path: Path) -> None:
        path = str(Path(path).resolve())
        recent = [path, *(p for p in self._recent() if p != path)][:MAX_RECENT]
        QSettings().setValue("recent", recent)
        self._refresh_recent()

    def _refresh_recent(self) -> None:
        self.recent_menu.clear()
        for path in self._recent():
            self.recent_menu.addAction(Path(path).name,
                                       lambda p=path: self.open_path(p)).setToolTip(path)
        self.recent_menu.setEnabled(bool(self._recent()))

    def _restore_layout(self) -> None:
        settings = QSettings()
        geometry = settings.value("window/geometry")
        if geometry is not None:
            self.restoreGeometry(geometry)
        else:
            self.resize(1200, 760)
        state = settings.value("window/state")
        if state is not None:
            self.restoreState(state)

    def closeEvent(self, event) -> None:  # noqa: N802 (Qt's name)
        settings = QSettings()
        settings.setValue("window/geometry", self.saveGeometry())
        settings.setValue("window/state", self.saveState())
        settings.setValue("window/tab", self.tabs.currentIndex())
        if self.series_window is not None:
            self.series_window.close()
        if self.layout_dialog is not None:
            self.layout_dialog.wait()  # a trial file being written is finished, not cut off
        if self.runner is not None:
            self.runner.shutdown()
            self.reports.wait()  # a workbook being written is finished, not cut off
        if self.session is not None:
            self.session.close()
        super().closeEvent(event)

    # --- drag and drop --------------------------------------------------------------------------

    def dragEnterEvent(self, event) -> None:  # noqa: N802
        if event.mimeData().hasUrls():
            event.acceptProposedAction()

    def dropEvent(self, event) -> None:  # noqa: N802
        urls = event.mimeData().urls()
        if urls:
            self.open_path(urls[0].toLocalFile())
