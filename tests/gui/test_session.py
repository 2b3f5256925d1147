"""The desktop session: what it takes from the trial file, and when results are current."""

from __future__ import annotations

from trialdesk.core.analysis import analyze
from trialdesk.core.results import AnalysisSettings


def test_direction_of_traits_comes_from_the_traits_table(session):
    # Settings saved while heading_days ranked lowest first must not outlive a change of the
    # trait's direction in the traits table.
    settings = session.settings()
    session.save_settings(AnalysisSettings.from_dict(
        {**settings.to_dict(), "lower_is_better": ["heading_days"]}))
    assert "heading_days" in session.settings().lower_is_better
    session.update_trait("heading_days", higher_is_better=True)
    assert "heading_days" not in session.settings().lower_is_better
    session.update_trait("plant_height", higher_is_better=False)
    assert "plant_height" in session.settings().lower_is_better


def test_results_of_older_data_arrive_out_of_date(session):
    book = session.fieldbook()
    results = analyze(book, session.settings())
    session.set_value("104", "grain_yield", 7.5)  # an edit made while the analysis ran
    session.set_results(results)
    assert session.results_stale
    session.set_results(analyze(session.fieldbook(), session.settings()))
    assert not session.results_stale
    assert session.fieldbook() is session.fieldbook()  # one book until the next edit
    session.set_value("104", "grain_yield", 7.6)
    assert session.fieldbook().sha256 != book.sha256


def test_new_results_keep_the_input_problems(session):
    session.set_value("105", "plant_height", 175.0)  # outside the trait's range: a warning
    before = [p for p in session.problems if p.plot == "105" and p.trait == "plant_height"]
    assert before
    session.set_results(analyze(session.fieldbook(), session.settings()))
    assert all(p in session.problems for p in before)
    assert session.outlier_problems  # the demo's keying slip is flagged
    assert all(p in session.problems for p in session.outlier_problems)
    session.set_results(None)
    assert not session.outlier_problems
    assert all(p in session.problems for p in before)
