"""The whole flow through the real window, offscreen: open the demo, edit, paste, undo, set up,
run, read the results, click a chart point. Assertions are on the models, the trial file and the
results (the reference for the numbers is trialdesk.core.analysis on the same data)."""

from __future__ import annotations

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

from pathlib import Path  # noqa: E402

import pandas as pd  # noqa: E402
import pytest  # noqa: E402
from PySide6.QtCore import QSettings, QStandardPaths  # noqa: E402
from PySide6.QtWidgets import QApplication  # noqa: E402

from trialdesk.core.analysis import analyze  # noqa: E402
from trialdesk.desktop.main_window import MainWindow  # noqa: E402
from trialdesk.desktop.session import make_demo_trial  # noqa: E402

SHOTS = Path(__file__).parents[1] / "output" / "screenshots"


@pytest.fixture
def window(qtbot, tmp_path):
    QStandardPaths.setTestModeEnabled(True)
    QSettings.setDefaultFormat(QSettings.Format.IniFormat)
    QSettings.setPath(QSettings.Format.IniFormat, QSettings.Scope.UserScope, str(tmp_path / "ini"))
    app = QApplication.instance()
    app.setOrganizationName("TrialdeskTests")
    app.setApplicationName("TrialdeskTests")
    win = MainWindow()
    qtbot.addWidget(win)
    win.resize(1280, 800)
    win.show()
    qtbot.waitUntil(lambda: win.session is not None, timeout=20_000)
    path = tmp_path / "demo.trial"
    make_demo_trial(path)
    win.open_path(path)
    qtbot.waitUntil(lambda: win.session.trial is not None)
    yield win
    win.close()


def shot(widget, name: str) -> None:
    SHOTS.mkdir(parents=True, exist_ok=True)
    widget.grab().save(str(SHOTS / f"{name}.png"))


def test_whole_flow(window, qtbot):
    session = window.session
    assert "Tallow Creek AYT 2026" in window.windowTitle()
    shot(window, "main-plots")

    # Edit a value through the grid's model: written to the trial file at once.
    model = window.grid.model
    col = model.trait_column("grain_yield")
    row = list(session.plots["plot"]).index("101")
    assert model.setData(model.index(row, col), "5.75")
    assert session.trial.values().at["101", "grain_yield"] == 5.75

    # Paste a block of 2 plots x 2 traits as one edit, then undo it in one step.
    QApplication.clipboard().setText("6.01\t60\n6.02\t61\n")
    window.grid.select_plot("102", "grain_yield")
    window.grid.paste()
    values = session.trial.values()
    assert values.at["102", "grain_yield"] == 6.01 and values.at["103", "heading_days"] == 61
    window.undo()
    values = session.trial.values()
    assert values.at["102", "grain_yield"] == 7.25 and values.at["101", "grain_yield"] == 5.75
    window.undo()
    assert session.trial.values().at["101", "grain_yield"] == 5.2

    # Set up and run off the GUI thread; the results equal the core's analysis of the same data.
    window.tabs.setCurrentWidget(window.setup)
    shot(window, "main-setup")
    with qtbot.waitSignal(window.runner.finished, timeout=60_000):
        window.run_analysis()
    results = session.results
    reference = analyze(session.fieldbook(), session.settings())
    ours = results.trait("grain_yield")
    ref = reference.trait("grain_yield")
    assert [e.entry for e in ours.entries] == [e.entry for e in ref.entries]
    assert [e.letters for e in ours.entries] == [e.letters for e in ref.entries]
    assert window.tabs.currentWidget() is window.results_view
    shot(window, "main-results")

    # The results go out of date with an edit, and the title says so.
    session.set_value("101", "grain_yield", 5.3)
    assert session.results_stale and "out of date" in window.windowTitle()

    # A chart point (a plot) shows that plot in the grid.
    with qtbot.waitSignal(window.results_view.plot_clicked):
        window.results_view.plot_clicked.emit("215", "plant_height")
    assert window.tabs.currentIndex() == 0
    selected = window.grid.selected_plots()
    assert selected == ["215"]


def test_bad_field_book_shows_a_message_not_a_traceback(window, tmp_path):
    bad = tmp_path / "broken.csv"
    bad.write_text("entry,rep,yield\nA,1,5\nB,1,x\n", encoding="utf-8")
    window.open_path(bad)
    assert "broken.csv" in window.last_error and "'x'" in window.last_error


def test_import_through_the_column_role_step(window, tmp_path):
    source = tmp_path / "station.csv"
    pd.DataFrame([{"Variety": e, "Replicate": r, "Yield kg": 4 + r * 0.1 + (e == "B") * 0.4}
                  for r in (1, 2, 3) for e in ("A", "B", "C")]).to_csv(source, index=False)

    def accept(dialog):
        assert dialog.chosen_roles()["entry"] == "Variety"
        assert dialog.chosen_roles()["block"] == "Replicate"
        dialog.checks.item(0).setCheckState(dialog.checks.item(0).checkState().Checked)
        return True

    target = window.import_fieldbook(source, tmp_path / "station.trial", dialog_result=accept)
    assert target.exists() and window.session.path == target
    assert list(window.session.entries["role"]) == ["check", "test", "test"]


def test_reports_from_the_window(window, qtbot, tmp_path, monkeypatch):
    from PySide6.QtGui import QPageLayout
    from PySide6.QtPrintSupport import QPrinter

    assert not window.act_workbook.isEnabled()  # nothing to report before an analysis
    with qtbot.waitSignal(window.runner.finished, timeout=60_000):
        window.run_analysis()
    assert window.act_workbook.isEnabled() and window.act_print.isEnabled()

    workbook = tmp_path / "demo results.xlsx"
    chosen = (str(tmp_path / "demo results"), "")  # the suffix is added when left out
    monkeypatch.setattr("PySide6.QtWidgets.QFileDialog.getSaveFileName", lambda *a, **k: chosen)
    with qtbot.waitSignal(window.report_written, timeout=60_000) as written:
        window.save_workbook()
    assert written.args == [str(workbook)] and workbook.exists()

    pdf = tmp_path / "summary.pdf"
    with qtbot.waitSignal(window.report_written, timeout=60_000):
        window.save_pdf(pdf)
    assert pdf.read_bytes().startswith(b"%PDF")

    # Printing draws the same pages on the printer the dialog gives; here a PDF printer.
    printer = QPrinter(QPrinter.PrinterMode.HighResolution)
    printer.setOutputFormat(QPrinter.OutputFormat.PdfFormat)
    printer.setOutputFileName(str(tmp_path / "printed.pdf"))
    printer.setPageOrientation(QPageLayout.Orientation.Portrait)
    assert window.print_to(printer) >= 1
    assert (tmp_path / "printed.pdf").read_bytes().startswith(b"%PDF")

    # Out-of-date results make no report: the window says why instead.
    window.session.set_value("101", "grain_yield", 5.9)
    window.save_pdf(tmp_path / "stale.pdf")
    assert not (tmp_path / "stale.pdf").exists()
    assert "out of date" in window.last_error
