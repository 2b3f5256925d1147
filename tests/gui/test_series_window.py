"""The trial-series window, offscreen: choose the sources and columns, run, read the results.

Data: MASS ``immer`` (Immer, Hayes & Powers 1934, J. Am. Soc. Agron. 26:403-419; the extract in
tests/data/immer.csv, source in tests/data/README.md), five barley varieties at six locations in
two years, put in long form with a Year column; and three small invented trial files, one
environment each. The numbers are checked against trialdesk.core.series.analyze_series run
directly on the same data (tests/test_series.py checks the core against statsmodels and scipy):
here the window must show exactly those numbers, so equalities are exact. Screenshots of every
tab go to tests/output/screenshots/series-*.png.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from PySide6.QtCore import QSettings, QStandardPaths, Qt
from PySide6.QtWidgets import QApplication

from trialdesk.core.fieldbook import read_fieldbook
from trialdesk.core.importer import import_fieldbook
from trialdesk.core.results import AnalysisSettings
from trialdesk.core.series import analyze_series, read_series, series_from_trials
from trialdesk.desktop.series_charts import environment_index
from trialdesk.desktop.series_window import SeriesWindow

DATA = Path(__file__).parents[1] / "data"
WAIT_MS = 60_000  # how long a signal may take before the test gives up (not a speed check)
# Invented environments: (station, season, error SD, entries grown there).
ENVIRONMENTS = (("Birch Flat", "2025", 0.45, 6), ("Birch Flat", "2026", 0.5, 6),
                ("Stony Ridge", "2026", 0.55, 5))


def immer_long(folder: Path) -> Path:
    """MASS immer in long form: Loc, Var, Year, Yield (one row per variety, location, year)."""
    wide = pd.read_csv(DATA / "immer.csv")
    long = wide.melt(id_vars=["Loc", "Var"], value_vars=["Y1", "Y2"], var_name="Year",
                     value_name="Yield")
    long["Year"] = long["Year"].map({"Y1": "1931", "Y2": "1932"})
    path = folder / "immer_long.csv"
    long.to_csv(path, index=False)
    return path


def make_trials(folder: Path) -> list[Path]:
    """Three invented trials of entries E1-E6 in 3 blocks (E6 not grown at Stony Ridge), traits
    yield and height, each trial with its station and season set; E1 is the check."""
    rng = np.random.default_rng(20260415)
    genotype = rng.normal(0.0, 0.8, 6)
    paths = []
    for station, season, sd, grown in ENVIRONMENTS:
        env = rng.normal(0.0, 1.5)
        rows = []
        for block in (1, 2, 3):
            for i in rng.permutation(grown):
                rows.append({"block": block, "entry": f"E{i + 1}", "plot": f"{block}{i + 1:02d}",
                             "yield": round(5.0 + env + genotype[i] + rng.normal(0.0, 0.3)
                                            + rng.normal(0.0, sd), 2),
                             "height": round(90.0 + 4.0 * genotype[i] + rng.normal(0.0, 3.0))})
        name = f"{station.replace(' ', '')}{season}"
        csv = folder / f"{name}.csv"
        pd.DataFrame(rows).to_csv(csv, index=False)
        path = folder / f"{name}.trial"
        import_fieldbook(read_fieldbook(csv), path, facts={"station": station, "season": season},
                         checks=("E1",))
        paths.append(path)
    return paths


@pytest.fixture
def window(qtbot):
    win = SeriesWindow()
    qtbot.addWidget(win)
    win.resize(1280, 820)
    win.show()
    yield win
    win.close()


@pytest.fixture
def shot(shoot):
    """shot(window, name): the window as it stands, saved as series-<name>.png."""
    def save(win: SeriesWindow, name: str) -> None:
        for _ in range(3):  # let tables and charts lay themselves out
            QApplication.processEvents()
        shoot(win, f"series-{name}")
    return save


def read(qtbot, win: SeriesWindow, action) -> None:
    """Do ``action`` and wait until the window has read the sources again."""
    with qtbot.waitSignal(win.series_read, timeout=WAIT_MS):
        action()


def run(qtbot, win: SeriesWindow):
    with qtbot.waitSignal(win.analysis_finished, timeout=WAIT_MS) as blocker:
        win.run()
    return blocker.args[0]


def column(model, key: str) -> list:
    """The raw values (``UserRole``) of one column of a FrameModel, top to bottom."""
    index = [c.key for c in model.columns].index(key)
    return [model.data(model.index(r, index), Qt.ItemDataRole.UserRole)
            for r in range(model.rowCount())]


def shown(model, key: str) -> list[str]:
    index = [c.key for c in model.columns].index(key)
    return [model.data(model.index(r, index)) for r in range(model.rowCount())]


def immer_window(qtbot, win: SeriesWindow, tmp_path: Path) -> Path:
    path = immer_long(tmp_path)
    read(qtbot, win, lambda: win.set_fieldbook(path))
    # Loc and Year are found by their names; "Var" is not a usual name for the entry column.
    assert win.sources.location == "Loc" and win.sources.season == "Year"
    assert win.sources.entry is None
    assert "entry and location" in win.readout.text()
    read(qtbot, win, lambda: win.set_column("entry", "Var"))
    return path


# --- a field book: MASS immer ---------------------------------------------------------------


def test_field_book_series_shows_what_the_core_gives(qtbot, window, tmp_path, shot):
    path = immer_window(qtbot, window, tmp_path)
    assert window.readout.text() == "12 environments, 5 entries, means only"
    assert window.trait_model.keys() == ["Yield"]
    window.check_model.tick("M")
    window.method_box.setCurrentIndex(window.method_box.findData("tukey"))
    window.pages.setCurrentIndex(0)
    shot(window, "setup-fieldbook")

    reported = []
    window.runner.progress.connect(lambda *args: reported.append(args))
    analysis = run(qtbot, window)
    assert reported == [(0, 1, "Yield"), (1, 1, "")]  # before the trait, and at the end
    # Reference: the core on the same file (checked against statsmodels in tests/test_series.py);
    # the window must show its numbers exactly, so every comparison below is an equality.
    expected = analyze_series(read_series(path, entry="Var", location="Loc", season="Year"),
                              AnalysisSettings(design="crd", checks=("M",))).traits[0]
    result = analysis.traits[0]
    assert analysis.settings.checks == ("M",) and result.method == "tukey"
    model = window.entry_model
    n = len(expected.entries)
    assert column(model, "entry")[:n] == [e.entry for e in expected.entries]
    assert column(model, "mean")[:n] == [e.mean for e in expected.entries]
    assert column(model, "letters")[:n] == [e.letters for e in expected.entries]
    assert column(model, "percent_of_check")[:n] == [e.percent_of_check
                                                     for e in expected.entries]
    assert model.tint[:n] == [e.is_check for e in expected.entries]
    # The mean in each environment, then the environments' own means in the footer.
    cells = expected.cell_means_frame()
    for j, env in enumerate(expected.environment_table):
        values = column(model, f"env:{j}")
        assert values[:n] == cells[env.environment].tolist()
        assert values[n] == env.mean
    footer = column(model, "entry")[n:]
    assert footer == ["Grand mean", "CV%", "LSD (0.05)"]
    assert column(model, "mean")[n:] == [expected.grand_mean, expected.cv_percent, expected.lsd]
    stability = expected.stability_frame().set_index("entry")
    for key in ("regression_slope", "slope_se", "ecovalence", "ecovalence_share",
                "shukla_variance"):
        assert column(model, key)[:n] == stability.loc[column(model, "entry")[:n], key].tolist()
    # Entry means only: no error of their own in the environments.
    env_frame = expected.environment_frame()
    assert column(window.env_model, "environment") == env_frame["environment"].tolist()
    assert column(window.env_model, "mean") == env_frame["mean"].tolist()
    assert "cv_percent" not in [c.key for c in window.env_model.columns]
    assert "with entry means only" in window.tests_text.text().lower()
    assert "Bartlett's test needs" in window.bartlett_text.text()
    assert "s2res" in window.components_model.frame["component"].iloc[-1]
    h2 = f"{expected.components.heritability:.3f}"
    assert h2 in window.heritability_text.text()
    for k, name in enumerate(["entries", "environments", "combined", "charts-immer"]):
        window.tabs.setCurrentIndex(k)
        shot(window, name)
    window.charts.setCurrentIndex(1)
    shot(window, "charts-immer-ranks")


def test_sorting_keeps_the_footer_below(qtbot, window, tmp_path):
    immer_window(qtbot, window, tmp_path)
    run(qtbot, window)
    proxy = window.entry_proxy
    slope = [c.key for c in window.entry_model.columns].index("regression_slope")
    entry = [c.key for c in window.entry_model.columns].index("entry")
    for order in (Qt.SortOrder.AscendingOrder, Qt.SortOrder.DescendingOrder):
        proxy.sort(slope, order)
        codes = [proxy.data(proxy.index(r, entry)) for r in range(proxy.rowCount())]
        assert codes[-3:] == ["Grand mean", "CV%", "LSD (0.05)"]
        slopes = [proxy.data(proxy.index(r, slope), Qt.ItemDataRole.UserRole)
                  for r in range(proxy.rowCount() - 3)]
        assert slopes == sorted(slopes, reverse=order == Qt.SortOrder.DescendingOrder)


def test_bad_column_choice_names_the_column_and_keeps_the_choice(qtbot, window, tmp_path,
                                                                 shot):
    immer_window(qtbot, window, tmp_path)
    read(qtbot, window, lambda: window.set_column("location", "Var"))
    shot(window, "setup-bad-column")
    message = window.problem.text()
    assert "column 'Var'" in message and "immer_long.csv" in message
    assert window.last_error == message
    assert "Traceback" not in message
    # What was chosen stays chosen, so it can be put right.
    assert window.column_boxes["location"].currentData() == "Var"
    assert window.column_boxes["entry"].currentData() == "Var"
    assert not window.run_button.isEnabled()
    read(qtbot, window, lambda: window.set_column("location", "Loc"))
    assert window.problem.text() == "" and window.run_button.isEnabled()


# --- trial files ----------------------------------------------------------------------------


def test_trial_files_series_and_its_charts(qtbot, window, tmp_path, shot):
    paths = make_trials(tmp_path)
    read(qtbot, window, lambda: window.add_trials(paths))
    trials = window.trial_model.frame
    assert trials["station"].tolist() == ["Birch Flat", "Birch Flat", "Stony Ridge"]
    assert trials["season"].tolist() == ["2025", "2026", "2026"]
    assert trials["environment"].tolist() == ["Birch Flat 2025", "Birch Flat 2026",
                                              "Stony Ridge 2026"]
    assert window.readout.text() == ("3 environments x 3 blocks, 6 entries, E6 missing in "
                                     "Stony Ridge 2026")
    assert window.check_model.keys() == ["E1"]  # the trials' own check
    assert window.trait_model.keys() == ["yield", "height"]
    window.pages.setCurrentIndex(0)
    shot(window, "setup-trials")

    analysis = run(qtbot, window)
    # Reference: the core on the same trial files (checked against statsmodels and scipy in
    # tests/test_series.py); the window must show exactly its numbers.
    expected = analyze_series(series_from_trials(paths),
                              AnalysisSettings(checks=("E1",))).traits[0]
    result = analysis.traits[0]
    n = len(expected.entries)
    model = window.entry_model
    assert column(model, "entry")[:n] == [e.entry for e in expected.entries]
    assert column(model, "mean")[:n] == [e.mean for e in expected.entries]
    assert column(model, "letters")[:n] == [e.letters for e in expected.entries]
    env_frame = expected.environment_frame()
    for key in ("environment", "n_entries", "mean", "cv_percent", "error_ms", "error_df", "lsd"):
        assert column(window.env_model, key) == env_frame[key].tolist(), key
    # The environments' own CV% and LSD in the footer of the combined table.
    for j, env in enumerate(expected.environment_table):
        assert column(model, f"env:{j}")[n + 1:] == [env.cv_percent, env.lsd]
    ranks = expected.ranks_frame()
    for j, name in enumerate(ranks.columns):
        assert column(window.rank_model, f"env:{j}") == [
            None if pd.isna(r) else int(r) for r in ranks[name]]
    anova = expected.anova_frame()
    assert column(window.anova_model, "source") == anova["source"].tolist()
    assert column(window.anova_model, "ss") == anova["ss"].tolist()
    tests = window.tests_text.text()
    assert "Entries, environments random (against entry x environment)" in tests
    assert "Entries, environments fixed (against pooled error)" in tests
    assert "Bartlett's chi-square" in window.bartlett_text.text()
    assert f"{expected.components.heritability:.3f}" in window.heritability_text.text()
    assert "E6" in window.entry_note.text()  # not grown everywhere: no stability row
    # The other trait, chosen above the tabs.
    window.set_trait("height")
    height = analyze_series(series_from_trials(paths),
                            AnalysisSettings(checks=("E1",))).trait("height")
    assert column(model, "mean")[:n] == [e.mean for e in height.entries]
    assert column(window.env_model, "mean") == height.environment_frame()["mean"].tolist()
    window.set_trait("yield")
    for k, name in enumerate(["trials-entries", "trials-environments", "trials-combined"]):
        window.tabs.setCurrentIndex(k)
        shot(window, name)

    window.tabs.setCurrentIndex(window.tabs.indexOf(window.charts))
    chart = window.response_chart
    assert set(chart.lines) == {"E1"}  # the check is drawn strongly from the start
    top = next(e.entry for e in expected.entries if not e.is_check)
    window.select_entries([top])
    assert window.selected_entries() == [top]
    assert set(chart.lines) == {"E1", top}
    # The entry's line is mean + slope x index over the range of the index; its points are its
    # means in the environments.
    index = environment_index(result)
    stab = {s.entry: s for s in result.stability}[top]
    x, y = chart.lines[top].getData()
    assert_allclose(x, [index.min(), index.max()], rtol=0, atol=0)  # the same numbers
    # The same product and sum as the chart's, so equal to within one rounding: rtol=1e-15.
    assert_allclose(y, stab.mean + stab.regression_slope * x, rtol=1e-15)
    px, py = chart.points[top].getData()
    cells = expected.cell_means_frame().loc[top]
    assert_allclose(py, cells.to_numpy(), rtol=0, atol=0)  # the core's cell means, unchanged
    # The index is the one the stability table used: the regression of the points on it gives
    # the table's slope (np.polyfit solves by another route, so to rounding: rtol=1e-9).
    assert_allclose(np.polyfit(px, py, 1)[0], stab.regression_slope, rtol=1e-9)
    # A click on a point of another entry draws it too (and selects it in the table).
    other = [s.entry for s in result.stability if s.entry not in ("E1", top)][-1]
    chart.entry_clicked.emit(other)
    assert set(window.selected_entries()) == {top, other}
    assert set(chart.lines) == {"E1", top, other}
    # E6, not grown everywhere, has its points but no line.
    window.select_entries(["E6"])
    assert "E6" in chart.points and "E6" not in chart.lines
    window.select_entries([top, other])
    shot(window, "charts-response")
    # Ranks: environments from the lowest mean to the highest; E6 has a gap where not grown.
    ranks_chart = window.rank_chart
    order = [e.environment for e in sorted(expected.environment_table, key=lambda e: e.mean)]
    _, ranked = ranks_chart.lines[top].getData()
    assert ranked.tolist() == ranks.loc[top, order].astype(float).tolist()
    window.charts.setCurrentWidget(ranks_chart)
    shot(window, "charts-ranks")
    for chart in (window.response_chart, ranks_chart):
        for suffix in ("png", "svg"):
            target = tmp_path / f"chart.{suffix}"
            chart.save_chart(target)
            assert target.stat().st_size > 0


def test_unreadable_trial_file_is_named(qtbot, window, tmp_path):
    paths = make_trials(tmp_path)
    bad = tmp_path / "notes.trial"
    bad.write_text("not a trial\n")
    read(qtbot, window, lambda: window.add_trials([paths[0], bad]))
    assert "notes.trial" in window.problem.text()
    assert window.trial_model.frame["station"].tolist() == ["Birch Flat", "(cannot be read)"]
    assert not window.run_button.isEnabled()
    read(qtbot, window, lambda: (window.trial_table.selectRow(1),
                                 window.remove_selected_trials()))
    assert window.sources.trials == (str(paths[0]),)
    assert window.readout.text() == "Add two or more trial files."


def test_failed_run_keeps_the_choices(qtbot, window, tmp_path):
    paths = make_trials(tmp_path)
    read(qtbot, window, lambda: window.add_trials(paths))
    window.method_box.setCurrentIndex(window.method_box.findData("holm"))
    window.check_model.tick("E2")
    window.trait_model.tick("height", False)
    paths[1].unlink()  # gone between reading and running: the run reads the files again
    with qtbot.waitSignal(window.analysis_failed, timeout=WAIT_MS) as blocker:
        window.run()
    assert paths[1].name in blocker.args[0]
    assert paths[1].name in window.run_problem.text() + window.problem.text()
    assert window.method_box.currentData() == "holm"
    assert window.check_model.keys() == ["E1", "E2"]
    assert window.trait_model.keys() == ["yield"]
    assert len(window.sources.trials) == 3
    assert window.analysis is None


def test_cancel(qtbot, window, tmp_path):
    read(qtbot, window, lambda: window.add_trials(make_trials(tmp_path)))
    with qtbot.waitSignal(window.analysis_cancelled, timeout=WAIT_MS):
        window.run()
        assert window.cancel_button.isVisible() and not window.run_button.isEnabled()
        window.cancel()  # the run stops before its first trait
    assert window.analysis is None
    assert not window.cancel_button.isVisible() and window.run_button.isEnabled()
    run(qtbot, window)  # and it can be run again
    assert window.analysis is not None


# --- reports and the main window --------------------------------------------------------------


def test_series_workbook(qtbot, window, tmp_path):
    pytest.importorskip("trialdesk.core.series_workbook")
    read(qtbot, window, lambda: window.add_trials(make_trials(tmp_path)))
    run(qtbot, window)
    target = tmp_path / "series.xlsx"
    with qtbot.waitSignal(window.report_written, timeout=WAIT_MS):
        window.save_workbook(target)
    assert target.stat().st_size > 0


def test_series_pdf(qtbot, window, tmp_path):
    pytest.importorskip("trialdesk.desktop.series_pdf")
    read(qtbot, window, lambda: window.add_trials(make_trials(tmp_path)))
    run(qtbot, window)
    target = tmp_path / "series.pdf"
    with qtbot.waitSignal(window.report_written, timeout=WAIT_MS):
        window.save_pdf(target)
    assert target.read_bytes().startswith(b"%PDF")


def test_report_writers_missing_give_a_message(qtbot, window, tmp_path, monkeypatch):
    read(qtbot, window, lambda: window.add_trials(make_trials(tmp_path)))
    run(qtbot, window)
    # As when the writers are not installed: importing them fails (None in sys.modules makes
    # the import raise ImportError).
    monkeypatch.setitem(sys.modules, "trialdesk.core.series_workbook", None)
    monkeypatch.setitem(sys.modules, "trialdesk.desktop.series_pdf", None)
    window.save_workbook(tmp_path / "x.xlsx")
    assert "series workbook cannot be written yet" in window.last_error
    window.save_pdf(tmp_path / "x.pdf")
    assert "as a PDF yet" in window.last_error
    assert not (tmp_path / "x.xlsx").exists() and not (tmp_path / "x.pdf").exists()


def test_main_window_opens_the_series_window(qtbot, tmp_path):
    from trialdesk.desktop.main_window import MainWindow

    QStandardPaths.setTestModeEnabled(True)
    QSettings.setDefaultFormat(QSettings.Format.IniFormat)
    QSettings.setPath(QSettings.Format.IniFormat, QSettings.Scope.UserScope, str(tmp_path / "ini"))
    main = MainWindow()
    qtbot.addWidget(main)
    texts = [a.text() for menu in main.menuBar().actions() for a in menu.menu().actions()]
    assert "Analyse a trial &series..." in texts
    main.act_series.trigger()
    assert isinstance(main.series_window, SeriesWindow) and main.series_window.isVisible()
    first = main.series_window
    main.act_series.trigger()
    assert main.series_window is first
    main.close()
