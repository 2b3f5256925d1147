"""An alpha trial in the program: the set-up offers the design, field trend and BLUP ranking,
and the results show what the core computed (the core is checked against statsmodels MixedLM in
tests/test_alpha_lattice.py and tests/test_spatial.py)."""

from __future__ import annotations

import numpy as np
import pytest

from trialdesk.core.analysis import analyze
from trialdesk.core.layouts import make_layout, write_layout
from trialdesk.core.trialfile import TrialFile
from trialdesk.desktop.analysis_setup import AnalysisSetup
from trialdesk.desktop.results_view import ResultsView
from trialdesk.desktop.session import TrialSession

WAIT_MS = 60_000  # how long a view may take to lay out before the test gives up


@pytest.fixture
def alpha_session(tmp_path, qapp):
    layout = make_layout([f"E{i:02d}" for i in range(1, 21)], checks=("E01",), design="alpha",
                         reps=3, block_size=4, rows=6, columns=10, serpentine=True, seed=3)
    path = write_layout(layout, tmp_path / "alpha.trial")
    rng = np.random.default_rng(8)
    with TrialFile.open(path) as trial:
        trial.set_values([(p, "grain_yield", float(6 + rng.normal(0, 0.5)))
                          for p in trial.plots()["plot"]])
    session = TrialSession()
    session.open(path)
    yield session
    session.close()


def test_setup_keeps_design_trend_and_blup_choices(alpha_session, qtbot):
    setup = AnalysisSetup(alpha_session)
    qtbot.addWidget(setup)
    assert setup.design_box.currentData() == "alpha"  # from the trial's facts
    setup.trend_box.setCurrentIndex(setup.trend_box.findData("papadakis"))
    setup.random_box.setChecked(True)
    settings = setup.current_settings()
    assert (settings.design, settings.spatial, settings.entries_random) == (
        "alpha", "papadakis", True)
    alpha_session.save_settings(settings)
    assert alpha_session.settings().spatial == "papadakis"


def test_results_headline_shows_efficiency_trend_and_heritability(alpha_session, qtbot, shoot):
    settings = alpha_session.settings()
    for options in ({"spatial": "papadakis"}, {"entries_random": True}):
        chosen = settings.from_dict({**settings.to_dict(), **options})
        result = analyze(alpha_session.fieldbook(), chosen).traits[0]
        alpha_session.set_results(analyze(alpha_session.fieldbook(), chosen))
        view = ResultsView(alpha_session)
        qtbot.addWidget(view)
        view.resize(1280, 820)
        view.show()
        qtbot.waitUntil(lambda v=view: v.laid_out, timeout=WAIT_MS)
        text = view.headline.text()
        if result.efficiency_vs_rcbd is not None:  # entries random: no BLUE efficiency
            assert f"efficiency vs complete blocks {result.efficiency_vs_rcbd:.0f}%" in text
        else:
            assert "efficiency" not in text
        if options.get("entries_random"):
            assert "no LSD" in text and "nan" not in text
            assert f"heritability {result.heritability:.2f}" in text
        else:
            assert result.efficiency_vs_rcbd is not None
            assert "field trend (papadakis)" in text
            shoot(view, "results-alpha")


def test_field_map_shows_the_fitted_trend(alpha_session, qtbot, shoot):
    settings = alpha_session.settings()
    chosen = settings.from_dict({**settings.to_dict(), "spatial": "rowcol"})
    analysis = analyze(alpha_session.fieldbook(), chosen)
    alpha_session.set_results(analysis)
    view = ResultsView(alpha_session)
    qtbot.addWidget(view)
    view.resize(1280, 820)
    view.show()
    qtbot.waitUntil(lambda: view.laid_out, timeout=WAIT_MS)
    view.tabs.setCurrentWidget(view.charts)
    view.charts.setCurrentWidget(view.field_chart)
    view._draw_charts(now=True)
    chart = view.field_chart
    trend = chart.what.findData("trend")
    assert chart.what.model().item(trend).isEnabled()
    chart.what.setCurrentIndex(trend)
    image = chart.image.image
    expected = {(t.row, t.column): t.trend for t in analysis.traits[0].field_trend}
    rows = min(r for r, _ in expected)
    cols = min(c for _, c in expected)
    assert all(np.isclose(image[r - rows, c - cols], v) for (r, c), v in expected.items())
    shoot(view, "results-alpha-trend")
