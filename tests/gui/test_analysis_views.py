"""The analysis set-up, the runner, the results view and its charts, on the demo trial.

The numbers are checked against trialdesk.core (planning, padjust, analyze), which its own tests
check against scipy and statsmodels; here the point is that the views show and keep exactly
those numbers. ``session`` (tests/gui/conftest.py) is a copy of the demo trial, open. Screenshots
of every view go to tests/output/screenshots/.
"""

from __future__ import annotations

from dataclasses import replace

import pandas as pd
import pytest
from PySide6.QtCore import QPointF, Qt
from PySide6.QtWidgets import QApplication

from trialdesk.core import planning
from trialdesk.core.analysis import analyze
from trialdesk.core.padjust import familywise_error, per_comparison_level
from trialdesk.core.results import AnalysisSettings
from trialdesk.core.trial_fieldbook import derivation_notes
from trialdesk.desktop import results_view
from trialdesk.desktop.analysis_runner import AnalysisRunner
from trialdesk.desktop.analysis_setup import AnalysisSetup
from trialdesk.desktop.palette import ABOVE_MARK
from trialdesk.desktop.results_view import ResultsView
from trialdesk.desktop.session import TrialSession

WAIT_MS = 60_000  # how long a signal may take before the test gives up (not a speed check)


@pytest.fixture
def shot(shoot):
    """shot(widget, name): the widget at a station-office window size, saved as a picture."""
    def save(widget, name: str, size=(1280, 820)) -> None:
        widget.resize(*size)
        widget.show()
        for _ in range(3):  # let the charts lay their axes out for the new size
            QApplication.processEvents()
        shoot(widget, name)
    return save


def reference(session: TrialSession, settings: AnalysisSettings | None = None):
    """The batch analysis of the same data, as the command line would run it."""
    return analyze(session.fieldbook(), settings or session.settings(),
                   notes=derivation_notes(session.trial))


# --- set-up ---------------------------------------------------------------------------------


def test_readout_follows_method_and_alpha(qtbot, session, shot):
    setup = AnalysisSetup(session)
    qtbot.addWidget(setup)
    precision = planning.trait_precision(session.fieldbook(), "grain_yield", "rcbd")
    df = precision.residual_df

    setup.method_box.setCurrentIndex(setup.method_box.findData("tukey"))
    r = setup.readout
    assert (r.n_entries, r.m) == (25, 300)
    assert r.familywise > 0.999 and r.familywise == familywise_error(0.05, 300)
    assert "more than 0.999" in setup.readout_labels["familywise"].text()
    assert "300 pairs" in setup.readout_labels["comparisons"].text()
    assert r.precision == precision
    assert r.levels == planning.per_comparison_levels("tukey", 0.05, 25, df)
    assert r.difference == planning.detectable_difference_percent(
        precision.cv_percent, 4, df, method="tukey", alpha=0.05, n_entries=25)
    assert f"{r.difference:.1f}% of the mean" in setup.readout_labels["difference"].text()
    assert not setup.direction_box.isEnabled()

    setup.method_box.setCurrentIndex(setup.method_box.findData("bonferroni"))
    assert setup.readout.levels == per_comparison_level(0.05, 300, "bonferroni")
    setup.alpha_box.setValue(0.01)
    assert setup.readout.levels == per_comparison_level(0.01, 300, "bonferroni")
    assert setup.readout.familywise == familywise_error(0.01, 300)

    setup.method_box.setCurrentIndex(setup.method_box.findData("holm"))
    strict, loose = setup.readout.difference
    assert strict > loose
    assert "between" in setup.readout_labels["difference"].text()
    assert "false difference" in setup.method_words.text()
    shot(setup, "setup_holm")


def test_choices_are_saved_in_the_trial_file(qtbot, session):
    setup = AnalysisSetup(session)
    qtbot.addWidget(setup)
    setup.method_box.setCurrentIndex(setup.method_box.findData("bh"))
    setup.alpha_box.setValue(0.10)
    assert setup.trait_model.tick("plant_height", False)
    assert setup.check_model.tick("CHK-2", False)
    path = session.path
    session.close()
    again = TrialSession()
    again.open(path)
    try:
        saved = again.settings()
        assert (saved.method, saved.alpha, saved.checks) == ("bh", 0.10, ("CHK-1",))
        assert saved.traits == ("grain_yield", "heading_days", "test_weight")
        assert saved.lower_is_better == ("heading_days",)
    finally:
        again.close()


def test_last_trait_cannot_be_unticked_and_run_emits_settings(qtbot, session):
    setup = AnalysisSetup(session)
    qtbot.addWidget(setup)
    for trait in ("grain_yield", "heading_days", "plant_height"):
        assert setup.trait_model.tick(trait, False)
    assert not setup.trait_model.tick("test_weight", False)  # the last one stays
    assert setup.readout.trait == "test_weight"
    with qtbot.waitSignal(setup.run_requested) as blocker:
        setup.run_button.click()
    assert blocker.args[0] == session.settings()
    assert blocker.args[0].traits == ("test_weight",)


def test_dunnett_readout_one_and_two_checks(qtbot, session, shot):
    setup = AnalysisSetup(session)
    qtbot.addWidget(setup)
    setup.check_model.tick("CHK-2", False)
    setup.method_box.setCurrentIndex(setup.method_box.findData("dunnett"))
    assert setup.direction_box.isEnabled()
    df = setup.readout.precision.residual_df
    assert setup.readout.m == 24
    setup.direction_box.setCurrentIndex(setup.direction_box.findData("above"))
    assert setup.readout.levels == planning.per_comparison_levels(
        "dunnett", 0.05, 25, df, n_checks=1, check_direction="above")
    # Two checks: the critical value is simulated, in a worker thread.
    with qtbot.waitSignal(setup.readout_updated, timeout=WAIT_MS):
        setup.check_model.tick("CHK-2", True)
    assert setup.readout.m == 46
    assert setup.readout.difference == pytest.approx(planning.detectable_difference_percent(
        setup.readout.precision.cv_percent, 4, df, method="dunnett", alpha=0.05, n_entries=25,
        n_checks=2, check_direction="above"), rel=1e-12)  # the same cached simulation
    setup.check_model.tick("CHK-1", False)
    setup.check_model.tick("CHK-2", False)
    assert not setup.run_button.isEnabled() and "check" in setup.problem.text()
    shot(setup, "setup_dunnett_no_checks")


# --- runner -----------------------------------------------------------------------------------


def test_runner_gives_the_batch_results(qtbot, session):
    runner = AnalysisRunner(session)
    steps = []
    runner.progress.connect(lambda *a: steps.append(a))
    settings = session.settings()
    with qtbot.waitSignal(runner.finished, timeout=WAIT_MS) as blocker:
        runner.start(settings)
        assert runner.is_running()
    analysis = blocker.args[0]
    assert not runner.is_running()
    expected = reference(session, settings)
    assert analysis == expected  # every number, letter and warning
    for ours, theirs in zip(analysis.traits, expected.traits, strict=True):
        assert [e.letters for e in ours.entries] == [e.letters for e in theirs.entries]
    assert steps[0] == (0, 4, "grain_yield") and steps[-1] == (4, 4, "")
    runner.shutdown()


def test_runner_cancel(qtbot, session):
    runner = AnalysisRunner(session)
    runner.finished.connect(session.set_results)
    finished = []
    runner.finished.connect(finished.append)
    with qtbot.waitSignal(runner.cancelled, timeout=WAIT_MS):
        runner.start(session.settings())
        runner.cancel()
    assert finished == [] and session.results is None and not runner.is_running()
    runner.shutdown()


def test_runner_reports_a_failing_trait(qtbot, session):
    plots = list(session.values.index)
    session.set_values([(p, "test_weight", 77.0) for p in plots])
    runner = AnalysisRunner(session)
    alone = AnalysisSettings.from_dict({**session.settings().to_dict(),
                                        "traits": ["test_weight"]})
    with qtbot.waitSignal(runner.failed, timeout=WAIT_MS) as blocker:
        runner.start(alone)
    assert "no error variation" in blocker.args[0] and "test_weight" in blocker.args[0]
    with qtbot.waitSignal(runner.finished, timeout=WAIT_MS) as blocker:
        runner.start(session.settings())  # with the other traits: reported, not fatal
    analysis = blocker.args[0]
    assert analysis == reference(session)
    assert any("test_weight' was not analysed" in w for w in analysis.warnings)
    runner.shutdown()


# --- results ----------------------------------------------------------------------------------


@pytest.fixture
def shown(qtbot, session):
    session.set_results(reference(session))
    view = ResultsView(session)
    qtbot.addWidget(view)
    view.resize(1280, 820)
    view.show()
    qtbot.waitUntil(lambda: view.laid_out, timeout=WAIT_MS)
    return view


def test_entry_table_is_the_result_frame(shown, session):
    result = session.results.trait("grain_yield")
    assert shown.current_trait() == "grain_yield"
    frame = result.to_frame()
    model = shown.entry_model
    pd.testing.assert_frame_equal(model.frame, frame)
    assert model.rowCount() == len(frame) == 25
    for row in range(model.rowCount()):
        for col, column in enumerate(model.columns):
            raw = model.data(model.index(row, col), Qt.ItemDataRole.UserRole)
            value = frame.at[row, column.key]
            expected = ", ".join(value) if isinstance(value, tuple) else value
            assert raw == (None if expected is None else expected)
    d = result.decimals + 1
    first = model.index(0, [c.key for c in model.columns].index("mean"))
    assert model.data(first) == f"{frame.at[0, 'mean']:.{d}f}"
    checks = [r for r in range(25) if frame.at[r, "is_check"]]
    assert model.data(model.index(checks[0], 0), Qt.ItemDataRole.BackgroundRole) is not None


def test_significant_filter_and_summary_sheet(qtbot, shown, session, shot):
    result = session.results.trait("grain_yield")
    pd.testing.assert_frame_equal(shown.pair_model.frame, result.comparisons_frame())
    assert shown.pair_proxy.rowCount() == len(result.comparisons) == 300
    shown.significant_only.setChecked(True)
    assert shown.pair_proxy.rowCount() == sum(c.significant for c in result.comparisons)
    summary = shown.summary_model
    assert summary.rowCount() == 25 + 3 and summary.columnCount() == 1 + 4
    top = result.entries[0]
    assert summary.data(summary.index(0, 1)) == f"{top.mean:.{result.decimals + 1}f} {top.letters}"
    assert summary.data(summary.index(0, 1), Qt.ItemDataRole.UserRole) == top.mean
    assert summary.data(summary.index(25, 0)) == "Grand mean"
    assert summary.data(summary.index(26, 1)) == f"{result.cv_percent:.1f}"
    for i, name in enumerate(["entries", "anova", "pairs", "fit", "charts", "all_traits"]):
        shown.tabs.setCurrentIndex(i)
        shot(shown, f"results_{name}")
    shown.set_trait("heading_days")
    shown.tabs.setCurrentIndex(0)
    shot(shown, "results_entries_heading_days")
    shown.tabs.setCurrentWidget(shown.charts)
    shot(shown, "chart_means_heading_days")


def test_stale_banner_until_a_new_run(qtbot, shown, session, shot):
    assert shown.banner.isHidden()
    session.set_value("101", "grain_yield", 5.5)
    assert not shown.banner.isHidden() and shown.entry_model.stale
    shown.tabs.setCurrentIndex(0)
    shot(shown, "results_stale")
    runner = AnalysisRunner(session)
    runner.finished.connect(session.set_results)
    with qtbot.waitSignal(session.results_changed, timeout=WAIT_MS):
        runner.start(session.settings())
    assert shown.banner.isHidden() and not shown.entry_model.stale
    runner.shutdown()


def test_chart_clicks_emit_the_plot(qtbot, shown, monkeypatch):
    # Draw the charts the way a large trial has them drawn: residuals fitted in the background.
    monkeypatch.setattr(results_view, "QUICK_PLOTS", 0)
    assert shown._charts_for is None  # nothing drawn until the Charts tab is on show
    shown.tabs.setCurrentWidget(shown.charts)
    qtbot.waitUntil(lambda: shown._charts_for == "grain_yield", timeout=WAIT_MS)
    chart = shown.means_chart
    points = chart.plot_points.points()
    point = points[7]
    with qtbot.waitSignal(shown.plot_clicked) as blocker:
        chart._on_points_clicked(chart.plot_points, [point])
    assert blocker.args == [point.data(), "grain_yield"]
    table = shown._residual_table(shown.results.trait("grain_yield"))
    observed = table.dropna(subset=["value"]).reset_index(drop=True)
    assert (point.pos().x(), point.data()) == (observed.at[7, "value"], observed.at[7, "plot"])
    with qtbot.waitSignal(shown.plot_clicked) as blocker:  # field row 1, column 1 is plot 101
        shown.field_chart._on_cell_clicked(QPointF(1.1, 0.8))
    assert blocker.args == ["101", "grain_yield"]


def test_charts_save_png_and_svg(qtbot, shown, tmp_path, shot):
    shown.tabs.setCurrentIndex(4)
    for i in range(shown.charts.count()):
        shown.charts.setCurrentIndex(i)
        chart = shown.charts.currentWidget()
        name = shown.charts.tabText(i).lower().replace(" ", "_")
        shown.save_chart(tmp_path / f"{name}.png")
        chart.save_chart(tmp_path / f"{name}.svg")
        assert (tmp_path / f"{name}.png").read_bytes()[:4] == b"\x89PNG"
        assert "<svg" in (tmp_path / f"{name}.svg").read_text(encoding="utf-8")
        shot(shown, f"chart_{name}")
    shown.field_chart.what.setCurrentIndex(1)
    shot(shown, "chart_field_map_residuals")


def test_dunnett_results_mark_entries_above_the_check(qtbot, session, shot):
    settings = replace(session.settings(), method="dunnett", checks=("CHK-1",),
                       check_direction="above")
    session.set_results(reference(session, settings))
    view = ResultsView(session)
    qtbot.addWidget(view)
    qtbot.waitUntil(lambda: view.laid_out, timeout=WAIT_MS)
    result = session.results.trait("grain_yield")
    keys = [c.key for c in view.entry_model.columns]
    assert "letters" not in keys  # Dunnett does not compare every pair
    above = keys.index("above_checks")
    shown = [view.entry_model.data(view.entry_model.index(r, above)) for r in range(25)]
    expected = [f"{ABOVE_MARK} CHK-1" if e.above_checks else "" for e in result.entries]
    assert shown == expected and any(expected)
    assert view.pair_proxy.rowCount() == 24
    assert "comparisons with the checks" in view.pair_count.text()
    shot(view, "results_entries_dunnett")
