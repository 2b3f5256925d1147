"""The report of a trial series (trialdesk.core.series_report) and its workbook
(trialdesk.core.series_workbook): every number is the JSON contract's at full precision, shown at
the report's decimals; text stays text; every sheet prints; a failed write spoils nothing.

References
----------
- The JSON contract (``trialdesk.core.json_output.series_to_json``) is the reference for every
  number of the workbook; its numbers are themselves checked against statsmodels and scipy in
  tests/test_series.py and tests/test_stability.py.
- Tukey's critical difference over environments: scipy ``studentized_range``.
- Open data: MASS ``immer`` (Immer, Hayes & Powers 1934, J. Am. Soc. Agron. 26:403-419;
  tests/data/immer.csv, source in tests/data/README.md): entry means only.
- An invented plot-level series (fixed random seed, built below): 8 entries in 4 environments
  (two locations in two seasons), 3 blocks, two traits; and one with formula-looking entry codes.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import os
import re
import shlex
import zipfile
from dataclasses import fields
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import openpyxl
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy.stats import studentized_range

from trialdesk.core.errors import TrialInputError
from trialdesk.core.json_output import series_to_json
from trialdesk.core.report import ABOVE_MARK, BELOW_MARK
from trialdesk.core.results import AnalysisSettings
from trialdesk.core.series import analyze_series, read_series
from trialdesk.core.series_report import LABELLED_LINES, build_series_report
from trialdesk.core.series_workbook import (
    SERIES_SHEETS,
    series_command_line,
    write_series_workbook,
)
from trialdesk.core.workbook import P_FORMAT

DATA = Path(__file__).parent / "data"
ANALYSED_ON = dt.date(2026, 6, 1)
ENVIRONMENTS = (("North", "2025"), ("South", "2025"), ("North", "2026"), ("South", "2026"))
FORMULA_CODES = ["=SUM(A1:A9)", "+45", "-3", "@x", "#N/A"]


# --- data -------------------------------------------------------------------------------------


def immer_csv(folder: Path) -> Path:
    """MASS immer in long form: one row per variety (Var), location (Loc) and year (Year)."""
    wide = pd.read_csv(DATA / "immer.csv")
    long = wide.melt(id_vars=["Loc", "Var"], value_vars=["Y1", "Y2"], var_name="Year",
                     value_name="yield")
    long["Year"] = long["Year"].map({"Y1": "1931", "Y2": "1932"})
    path = folder / "immer_long.csv"
    long.to_csv(path, index=False)
    return path


def invented_plots(seed: int = 20260601) -> pd.DataFrame:
    """An invented series: 8 entries x 4 environments x 3 blocks, traits yield (t/ha, two
    decimals) and height (cm, whole numbers); plot numbers repeat in each environment."""
    rng = np.random.default_rng(seed)
    genotype = rng.normal(0.0, 1.0, 8)
    tall = rng.normal(0.0, 6.0, 8)
    rows = []
    for location, season in ENVIRONMENTS:
        env_effect = rng.normal(0.0, 2.0)
        interaction = rng.normal(0.0, 0.4, 8)
        for block in (1, 2, 3):
            for i in rng.permutation(8):
                rows.append({"location": location, "season": season, "block": block,
                             "entry": f"E{i + 1}", "plot": f"{block}{i + 1:02d}",
                             "yield": round(6.0 + env_effect + genotype[i] + interaction[i]
                                            + rng.normal(0.0, 0.5), 2),
                             "height": round(95.0 + 4 * env_effect + tall[i]
                                             + rng.normal(0.0, 3.0))})
    return pd.DataFrame(rows)


def _written(folder: Path, data, settings: AnalysisSettings, **options) -> SimpleNamespace:
    analysis = analyze_series(data, settings)
    report = build_series_report(analysis, analysed_on=ANALYSED_ON, **options)
    path = write_series_workbook(report, folder / "series.xlsx", data=data)
    return SimpleNamespace(data=data, analysis=analysis, report=report, path=path,
                           doc=json.loads(series_to_json(analysis)),
                           wb=openpyxl.load_workbook(path))


@pytest.fixture(scope="module")
def immer(tmp_path_factory) -> SimpleNamespace:
    folder = tmp_path_factory.mktemp("immer")
    data = read_series(immer_csv(folder), entry="Var", location="Loc", season="Year")
    return _written(folder, data, AnalysisSettings(checks=("M",)))


@pytest.fixture(scope="module")
def plots(tmp_path_factory) -> SimpleNamespace:
    """The invented series, entry E5 not grown in North 2026 and one plot missing."""
    folder = tmp_path_factory.mktemp("plots")
    frame = invented_plots()
    frame.loc[7, "yield"] = np.nan
    frame = frame[~((frame["location"] == "North") & (frame["season"] == "2026")
                    & (frame["entry"] == "E5"))]
    source = folder / "plots.csv"
    frame.to_csv(source, index=False)
    data = read_series(source, location="location", season="season")
    return _written(folder, data, AnalysisSettings(checks=("E3",)),
                    units={"yield": "t/ha", "height": "cm"})


@pytest.fixture(scope="module")
def formulas(tmp_path_factory) -> SimpleNamespace:
    """Invented entry means of entries whose codes look like formulas, in two locations (too
    few for the stability statistics)."""
    folder = tmp_path_factory.mktemp("formulas")
    rng = np.random.default_rng(5)
    rows = [{"site": site, "entry": code, "yield": round(4 + k * 0.3 + j + rng.normal(0, .2), 2)}
            for j, site in enumerate(("A", "B")) for k, code in enumerate(FORMULA_CODES)]
    source = folder / "formula_codes.csv"
    pd.DataFrame(rows).to_csv(source, index=False)
    data = read_series(source, location="site")
    return _written(folder, data, AnalysisSettings(checks=("+45",)),
                    title="Wheat & barley, =2026")


# --- reading the workbook back -----------------------------------------------------------------


def _decimals(cell) -> int:
    """The decimals a number cell shows, read off its number format (the last section of a
    conditional format such as P_FORMAT; a trailing % for a percentage)."""
    shown = cell.number_format.split(";")[-1]
    match = re.fullmatch(r"0(?:\.(0+))?%?", shown)
    assert match, f"{cell.coordinate} has no fixed-decimals format: {cell.number_format!r}"
    return len(match.group(1) or "")


def _same(cell, expected, decimals: int | None = None) -> None:
    """``cell`` holds ``expected`` at full precision and shows it rounded to its format's decimals
    (``decimals``, when given, is what the report says those decimals are)."""
    if expected is None:
        assert cell.value is None, cell.coordinate
        return
    assert cell.data_type == "n", cell.coordinate
    shown = _decimals(cell)
    if decimals is not None:
        assert shown == decimals, cell.coordinate
    scale = 100 if cell.number_format.endswith("%") else 1
    assert round(scale * cell.value, shown) == round(scale * expected, shown), cell.coordinate
    assert cell.value == expected, cell.coordinate  # full precision, not the rounded figure


def _text(cell, expected: str | None) -> None:
    if not expected:
        assert cell.value is None, cell.coordinate
        return
    assert cell.value == expected and cell.data_type == "s", cell.coordinate


def _row_of(ws, text: str, col: int = 1, start: int = 1) -> int:
    for row in range(start, ws.max_row + 1):
        if ws.cell(row=row, column=col).value == text:
            return row
    raise AssertionError(f"{text!r} is not in column {col} of {ws.title}")


def _table(ws, header_row: int) -> list[dict]:
    """The rows under ``header_row`` until a blank one, as {header: cell}."""
    headers = [c.value for c in ws[header_row] if c.value is not None]
    rows = []
    row = header_row + 1
    while row <= ws.max_row and ws.cell(row=row, column=1).value is not None:
        rows.append({h: ws.cell(row=row, column=j + 1) for j, h in enumerate(headers)})
        row += 1
    return rows


def _by_entry(rows: list[dict], key: str = "entry") -> dict[str, dict]:
    return {r[key]: r for r in rows}


# --- the report's content ----------------------------------------------------------------------


def test_header_names_the_series(immer):
    header = dict(immer.report.header)
    assert header["Series"] == "immer_long"
    assert header["Environments"].startswith("12: UF 1931, W 1931")
    assert header["Locations and seasons"] == ("6 locations (UF, W, M, C, GR, D) in 2 seasons "
                                               "(1931, 1932)")
    assert header["Entries"] == "5"
    assert header["Method"] == "Tukey's HSD (Tukey-Kramer), alpha 0.05; environments random"
    assert header["Analysed on"] == "2026-06-01"
    assert header["Source"] == f"immer_long.csv, SHA-256 {immer.analysis.sha256[0]}"
    assert header["Software"] == f"Trialdesk {immer.analysis.software_version}"


def test_response_lines_are_the_stability_slopes(plots):
    part = plots.report.traits[0]
    stability = {s["entry"]: s for s in plots.doc["traits"][0]["stability"]}
    assert {line.entry for line in part.lines} == set(stability)  # E5 is not grown everywhere
    for line in part.lines:
        assert line.slope == stability[line.entry]["regression_slope"]
        assert line.mean == stability[line.entry]["mean"]
    # The environment index of the stability table: each environment's mean of the entries
    # grown everywhere less their grand mean (Eberhart & Russell 1966); it sums to zero.
    cells = pd.DataFrame(plots.doc["traits"][0]["cell_means"])
    cells = cells[cells["entry"].isin(list(stability))]
    means = cells.groupby("environment")["mean"].mean().reindex(list(part.environments))
    # rtol=1e-12: the same sums in another order, a few ulps of values near 5
    assert_allclose(part.index, means - means.mean(), rtol=1e-12, atol=1e-12)
    assert_allclose(sum(part.index), 0.0, atol=1e-12)


def test_at_most_ten_named_lines_the_checks_first(tmp_path):
    rng = np.random.default_rng(11)
    rows = [{"site": site, "entry": f"L{k:02d}", "yield": round(5 + k * 0.1 + j
                                                                + rng.normal(0, .3), 2)}
            for j, site in enumerate("ABCD") for k in range(20)]
    source = tmp_path / "twenty.csv"
    pd.DataFrame(rows).to_csv(source, index=False)
    analysis = analyze_series(read_series(source, location="site"),
                              AnalysisSettings(checks=("L00", "L01")))
    part = build_series_report(analysis).traits[0]
    named = [line.entry for line in part.lines if line.labelled]
    assert len(named) == LABELLED_LINES
    best = [e.entry for e in analysis.traits[0].entries if not e.is_check][:LABELLED_LINES - 2]
    assert set(named) == {"L00", "L01", *best}


def test_report_frames(plots):
    part = plots.report.traits[0]
    trait = plots.doc["traits"][0]
    frame = part.to_frame()
    assert list(frame.columns) == ["entry", "check", *part.environments, "mean", "letters",
                                   "marks", "percent_of_check", "slope", "ecovalence",
                                   "ecovalence_share", "rank"]
    assert frame["mean"].tolist() == [e["mean"] for e in trait["entries"]]
    assert frame["entry"].tolist() == [e["entry"] for e in trait["entries"]]
    bottom = part.bottom_frame()
    assert bottom["environment"].tolist() == [*part.environments, "over environments"]
    assert bottom["mean"].tolist() == [e["mean"] for e in trait["environment_table"]] + [
        trait["grand_mean"]]


# --- the sheets ---------------------------------------------------------------------------------


def test_sheets_in_order(immer, plots):
    assert immer.wb.sheetnames == [*SERIES_SHEETS[:4], "yield", "Settings"]
    assert plots.wb.sheetnames == [*SERIES_SHEETS[:4], "yield", "height", "Settings"]


def _check_summary(ws, part, trait: dict) -> None:
    """One trait's table on the Series summary sheet against its JSON."""
    d = trait["decimals"] + 1  # means one decimal more than the data (common practice)
    top = _row_of(ws, part.title)
    head = top + 2
    names = [e["environment"] for e in trait["environment_table"]]
    n = len(names)
    assert [ws.cell(row=head, column=2 + j).value for j in range(n)] == names
    assert [ws.cell(row=head, column=2 + n + k).value for k in range(7)] == [
        "Mean", "Letters", "% of check", "Slope", "Ecovalence", "Share of ecovalence", "Rank"]
    assert ws.cell(row=top + 1, column=2).value == "Mean in each environment"
    cells = {(c["entry"], c["environment"]): c["mean"] for c in trait["cell_means"]}
    stability = _by_entry(trait["stability"])
    for i, entry in enumerate(trait["entries"]):
        row = head + 1 + i
        name = entry["entry"]
        _text(ws.cell(row=row, column=1), name)
        for j, env in enumerate(names):
            _same(ws.cell(row=row, column=2 + j), cells.get((name, env)), d)
        marks = (ABOVE_MARK if entry["above_checks"] else "") + (
            BELOW_MARK if entry["below_checks"] else "")
        _same(ws.cell(row=row, column=2 + n), entry["mean"], d)
        _text(ws.cell(row=row, column=3 + n), f"{entry['letters'] or ''} {marks}".strip())
        _same(ws.cell(row=row, column=4 + n), entry["percent_of_check"], 1)
        s = stability.get(name, {})
        _same(ws.cell(row=row, column=5 + n), s.get("regression_slope"), 2)
        _same(ws.cell(row=row, column=6 + n), s.get("ecovalence"), d + 1)
        share = ws.cell(row=row, column=7 + n)
        _same(share, s.get("ecovalence_share"), 1)
        if s:
            assert share.number_format == "0.0%"  # the share itself, shown as a percentage
        _same(ws.cell(row=row, column=8 + n), entry["rank"], 0)

    def bottom(label: str) -> list:
        row = _row_of(ws, label, start=head)
        return [ws.cell(row=row, column=2 + j) for j in range(n + 1)]

    table = trait["environment_table"]
    for cell, value in zip(bottom("Environment mean"),
                           [e["mean"] for e in table] + [trait["grand_mean"]], strict=True):
        _same(cell, value, d)
    for cell, value in zip(bottom("CV%"), [e["cv_percent"] for e in table]
                           + [trait["cv_percent"]], strict=True):
        _same(cell, value, 1)
    for cell, value in zip(bottom("LSD 0.05 (unadjusted)"),
                           [e["lsd"] for e in table] + [trait["lsd"]], strict=True):
        _same(cell, value, d)
    # The entry test the mean separation is protected by: the weighted one where the error
    # variances differ markedly, else the one against entry x environment.
    test = trait["entry_test_weighted"] if trait["weighted"] else trait["entry_test_random"]
    *empty, p = bottom(f"Entry F-test p ({test['label']})")
    assert all(c.value is None for c in empty)
    _same(p, test["p"], 4)
    assert p.number_format == P_FORMAT
    # Tukey's HSD = q(1 - alpha; entries, df of entry x environment) / sqrt(2) x SED (Tukey
    # 1953; Kramer 1956, Biometrics 12:307), q from scipy.stats.studentized_range. Both find q
    # by numerical integration and root finding; rtol=1e-9 is far inside the decimals shown.
    *empty, hsd = bottom("Critical difference (HSD 0.05)")
    q = studentized_range.ppf(0.95, len(trait["entries"]), trait["error_df"])
    assert _decimals(hsd) == d
    assert_allclose(hsd.value, q / math.sqrt(2) * trait["sed"], rtol=1e-9)


def test_summary_numbers_are_the_json_numbers(immer, plots):
    for case in (immer, plots):
        for part, trait in zip(case.report.traits, case.doc["traits"], strict=True):
            _check_summary(case.wb["Series summary"], part, trait)


def test_summary_shows_missing_cells_and_stability_blank(plots):
    ws = plots.wb["Series summary"]
    part = plots.report.traits[0]
    head = _row_of(ws, part.title) + 2
    row = head + 1 + [r.entry for r in part.rows].index("E5")
    north_2026 = 2 + list(part.environments).index("North 2026")
    assert ws.cell(row=row, column=north_2026).value is None
    n = len(part.environments)
    assert [ws.cell(row=row, column=c).value for c in range(5 + n, 8 + n)] == [None] * 3
    assert ws.cell(row=head - 2, column=1).value == "yield (t/ha)"  # the unit given


def test_summary_header_footnotes_and_cautions(immer):
    ws = immer.wb["Series summary"]
    assert ws["A1"].value == immer.report.title
    for label, value in immer.report.header:
        assert ws.cell(row=_row_of(ws, label), column=2).value == value
    texts = [c.value for row in ws.iter_rows() for c in row if isinstance(c.value, str)]
    for note in immer.report.footnotes:
        assert note in texts
    assert immer.report.cautions in texts


def test_checks_shaded_and_marks_coloured(immer):
    ws = immer.wb["Series summary"]
    part = immer.report.traits[0]
    head = _row_of(ws, part.title) + 2
    mean_col = 2 + len(part.environments)
    fills = {r.entry: ws.cell(row=head + 1 + i, column=1).fill.fgColor.rgb
             for i, r in enumerate(part.rows)}
    assert len({fills[r.entry] for r in part.rows if r.is_check}) == 1
    assert fills["M"] not in {fills[r.entry] for r in part.rows if not r.is_check}
    for i, r in enumerate(part.rows):  # T is significantly above the check M (higher is better)
        assert ws.cell(row=head + 1 + i, column=mean_col).font.b == (r.marks == ABOVE_MARK)
    assert [r.entry for r in part.rows if r.marks == ABOVE_MARK] == ["T"]


def test_combined_anova_sheet(immer, plots):
    for case in (immer, plots):
        ws = case.wb["Combined ANOVA"]
        for part, trait in zip(case.report.traits, case.doc["traits"], strict=True):
            top = _row_of(ws, part.title)
            d = trait["decimals"] + 1
            anova = _table(ws, _row_of(ws, "Source", start=top))
            assert [r["Source"].value for r in anova] == [a["source"]
                                                          for a in trait["combined_anova"]]
            for cells, ref in zip(anova, trait["combined_anova"], strict=True):
                _same(cells["df"], ref["df"], 0)
                _same(cells["SS"], ref["ss"], d + 1)
                _same(cells["MS"], ref["ms"], d + 1)
                _same(cells["F"], ref["f"], 2)
                _same(cells["p"], ref["p"], 4)
            tests = _table(ws, _row_of(ws, "Test", start=top))
            expected = [t for t in (trait["entry_test_random"], trait["entry_test_fixed"],
                                    trait["entry_test_weighted"]) if t is not None]
            assert [c["Test"].value for c in tests] == [
                f"Entry test, {t['label']} (against {t['against']})" for t in expected]
            for cells, ref in zip(tests, expected, strict=True):
                _text(cells["Against"], ref["against"])
                _same(cells["F"], ref["f"], 2)
                _same(cells["df (entries)"], ref["df1"], 0)
                _same(cells["df (against)"], ref["df2"], 0)
                _same(cells["p"], ref["p"], 4)
            if trait["bartlett"] is None:
                _row_of(ws, "Not tested: the series holds entry means only.", start=top)
            else:
                [bartlett] = _table(ws, _row_of(ws, "Test", start=_row_of(
                    ws, "Error variances of the environments", start=top)))
                _text(bartlett["Test"], trait["bartlett"]["name"])
                _same(bartlett["Chi-square"], trait["bartlett"]["statistic"], 4)
                _same(bartlett["p"], trait["bartlett"]["p"], 4)
            weighted = ws.cell(row=_row_of(ws, "Weighted analysis", start=top), column=2)
            assert weighted.value.startswith("yes") == trait["weighted"]

            first = _row_of(ws, "Statistic", start=top)
            stats = {ws.cell(row=r, column=1).value: ws.cell(row=r, column=4)
                     for r in range(first + 1, _row_of(ws, "Statistic", start=first + 1) - 1)}
            for label, value, decimals in (
                    ("Grand mean", trait["grand_mean"], d), ("CV%", trait["cv_percent"], 1),
                    ("Error mean square of an entry x environment mean", trait["error_ms"],
                     d + 1),
                    ("Error df (entry x environment)", trait["error_df"], 0),
                    ("Plots per entry and environment (harmonic mean)", trait["replicates"], 2),
                    ("SE of a difference (SED)", trait["sed"], d),
                    ("LSD 0.05 (unadjusted)", trait["lsd"], d),
                    ("Comparisons made", trait["family"]["m"], 0)):
                _same(stats[label], value, decimals)

            components = trait["variance_components"]
            first = _row_of(ws, "Statistic", start=first + 1)
            rows = {ws.cell(row=r, column=1).value: ws.cell(row=r, column=4)
                    for r in range(first + 1, first + 15)}
            _same(rows["Entries (s2G)"], components["entry"], d + 1)
            if components["entry_by_environment"] is None:
                _same(rows["Residual of the means (s2res)"], components["error"], d + 1)
            else:
                _same(rows["Entry x environment (s2GE)"], components["entry_by_environment"],
                      d + 1)
                _same(rows["Error (s2e)"], components["error"], d + 1)
            _same(rows["Heritability of entry means (H2)"], trait["heritability"]["value"], 3)
            _text(rows["Formula"], trait["heritability"]["formula"])
            _text(rows["Estimated by"], trait["heritability"]["method"])
            _text(rows["Source"], components["source"])


def test_environments_sheet(immer, plots):
    for case in (immer, plots):
        ws = case.wb["Environments"]
        listed = _table(ws, _row_of(ws, "Environment"))
        assert [[c.value for c in r.values()] for r in listed] == [
            [e["environment"], e["location"], e["season"], e["source"]]
            for e in case.doc["environments"]]
        for part, trait in zip(case.report.traits, case.doc["traits"], strict=True):
            top = _row_of(ws, part.title)
            d = trait["decimals"] + 1
            own = _table(ws, _row_of(ws, "Environment", start=top))
            for cells, ref in zip(own, trait["environment_table"], strict=True):
                _text(cells["Environment"], ref["environment"])
                _same(cells["Entries"], ref["n_entries"], 0)
                _same(cells["Mean"], ref["mean"], d)
                _same(cells["CV%"], ref["cv_percent"], 1 if ref["cv_percent"] else None)
                _same(cells["Error MS"], ref["error_ms"], d + 1 if ref["error_ms"] else None)
                _same(cells["Error df"], ref["error_df"], 0 if ref["error_df"] else None)
                _same(cells["LSD 0.05 (unadjusted)"], ref["lsd"], d if ref["lsd"] else None)
            ranks = _table(ws, _row_of(ws, "Entry", start=top))
            assert len(ranks) == len(trait["entries"])
            for cells, entry in zip(ranks, trait["entries"], strict=True):
                name = cells["Entry"].value
                assert name == entry["entry"]
                for env, rank in zip(part.environments, trait["ranks"][name], strict=True):
                    _same(cells[env], rank, 0)
                _same(cells["Over environments"], entry["rank"], 0)


def test_stability_sheet(immer, plots):
    for case in (immer, plots):
        ws = case.wb["Stability"]
        for part, trait in zip(case.report.traits, case.doc["traits"], strict=True):
            d = trait["decimals"] + 1
            rows = _table(ws, _row_of(ws, "Entry", start=_row_of(ws, part.title)))
            assert [r["Entry"].value for r in rows] == [s["entry"] for s in trait["stability"]]
            for cells, ref in zip(rows, trait["stability"], strict=True):
                _same(cells["Environments"], ref["n_environments"], 0)
                _same(cells["Mean"], ref["mean"], d)
                _same(cells["Slope"], ref["regression_slope"], 2)
                _same(cells["SE of slope"], ref["slope_se"], 3)
                _same(cells["Deviation MS"], ref["deviation_ms"], d + 1)
                _same(cells["Ecovalence"], ref["ecovalence"], d + 1)
                _same(cells["Share of ecovalence"], ref["ecovalence_share"], 1)
                _same(cells["Stability variance"], ref["shukla_variance"], d + 1)


def test_trait_sheets_have_every_entry_and_pair(immer, plots):
    for case in (immer, plots):
        for trait in case.doc["traits"]:
            ws = case.wb[trait["trait"]]
            d = trait["decimals"] + 1
            entries = _table(ws, _row_of(ws, "Rank"))
            assert len(entries) == len(trait["entries"])
            for cells, ref in zip(entries, trait["entries"], strict=True):
                _same(cells["Rank"], ref["rank"], 0)
                _text(cells["Entry"], ref["entry"])
                _same(cells["Mean"], ref["mean"], d)
                _same(cells["SE"], ref["se"], d)
                _same(cells["n"], ref["n"], 0)
                _text(cells["Letters"], ref["letters"])
                _same(cells["% of check"], ref["percent_of_check"], 1)
            pairs = _table(ws, _row_of(ws, "Entry a"))
            n = len(trait["entries"])
            assert len(pairs) == len(trait["comparisons"]) == n * (n - 1) // 2
            for cells, ref in zip(pairs, trait["comparisons"], strict=True):
                _text(cells["Entry a"], ref["entry_a"])
                _text(cells["Entry b"], ref["entry_b"])
                _same(cells["Difference (a - b)"], ref["difference"], d)
                _same(cells["SE"], ref["se"], d)
                _same(cells["Adjusted p"], ref["p_adjusted"], 4)
                _same(cells["Lower limit"], ref["lower"], d)
                _same(cells["Upper limit"], ref["upper"], d)
                _text(cells["Significant"], "yes" if ref["significant"] else "no")


def _settings_rows(ws) -> dict[str, list]:
    rows = {}
    for row in ws.iter_rows(min_row=2):
        values = [c.value for c in row[1:] if c.value is not None]
        rows.setdefault(row[0].value, []).append(values)
    return rows


def test_settings_sheet_round_trips(plots):
    rows = _settings_rows(plots.wb["Settings"])
    lists = {f.name for f in fields(AnalysisSettings) if isinstance(f.default, tuple)}
    data = {f.name: rows[f.name][0] if f.name in lists else rows[f.name][0][0]
            for f in fields(AnalysisSettings) if rows[f.name][0]}
    assert AnalysisSettings.from_dict(data) == plots.analysis.settings
    assert rows["source file"] == [["plots.csv"]]
    assert rows["source path"] == [[os.path.abspath(plots.data.sources[0])]]
    assert rows["source SHA-256"] == [[plots.analysis.sha256[0]]]
    assert rows["location column"] == [["location"]] and rows["season column"] == [["season"]]
    assert rows["analysed on"] == [[ANALYSED_ON.isoformat()]]
    assert rows["variance components"] == [["auto"]]


def test_command_line_repeats_the_analysis(plots, tmp_path):
    from trialdesk.core.cli import main

    [[command]] = _settings_rows(plots.wb["Settings"])["command line"]
    assert command == series_command_line(plots.analysis, plots.data)
    args = shlex.split(command)
    assert args[:2] == ["trialdesk", "analyze"]
    assert args[args.index("--location") + 1] == "location"
    assert args[args.index("--variance-components") + 1] == "auto"
    out = tmp_path / "again.json"
    assert main([*args[1:], "--json", str(out)]) == 0
    assert json.loads(out.read_text(encoding="utf-8")) == plots.doc


# --- text stays text ------------------------------------------------------------------------------


def test_formula_looking_text_stays_text(formulas):
    found = set()
    for ws in formulas.wb:
        for row in ws.iter_rows():
            for cell in row:
                if cell.value in FORMULA_CODES:
                    assert cell.data_type == "s", (ws.title, cell.coordinate)
                    found.add(cell.value)
                    if cell.value[0] in "=+-@":
                        assert cell.quotePrefix, (ws.title, cell.coordinate)
    assert set(FORMULA_CODES) <= found
    assert formulas.wb["Series summary"]["A1"].value == "Wheat & barley, =2026"
    with zipfile.ZipFile(formulas.path) as archive:
        sheets = [n for n in archive.namelist() if n.startswith("xl/worksheets/sheet")]
        assert len(sheets) == len(formulas.wb.sheetnames)
        for name in sheets:
            xml = archive.read(name).decode("utf-8")
            assert "<f>" not in xml and "<f " not in xml, name
            assert 't="e"' not in xml, name  # "#N/A" is not an error value either


def test_means_only_series_says_what_it_cannot_give(formulas):
    ws = formulas.wb["Combined ANOVA"]
    _row_of(ws, "Not tested: the series holds entry means only.")
    stability = formulas.wb["Stability"]
    assert stability.cell(row=4, column=1).value.startswith("Not computed: stability needs at "
                                                             "least 3 environments and 3")


# --- layout and print set-up ----------------------------------------------------------------------


def test_every_sheet_prints_one_page_wide_with_header_and_footer(immer, plots, formulas):
    for case in (immer, plots, formulas):
        for ws in case.wb:
            setup = ws.page_setup
            widths = sum(ws.column_dimensions[c].width for c in ws.column_dimensions)
            assert setup.orientation == ("landscape" if widths > 95 else "portrait"), ws.title
            assert setup.fitToWidth == 1 and setup.fitToHeight == 0, ws.title
            assert ws.sheet_properties.pageSetUpPr.fitToPage, ws.title
            assert int(setup.paperSize) == int(ws.PAPERSIZE_A4), ws.title  # "9" is A4
            assert ws.print_title_rows, ws.title
            assert ws.oddHeader.left.text == case.report.title.replace("&", "&&"), ws.title
            assert ws.oddHeader.right.text == f"Analysed on {ANALYSED_ON.isoformat()}"
            assert "&P" in ws.oddFooter.center.text and "&N" in ws.oddFooter.center.text
            for letter, dimension in ws.column_dimensions.items():
                assert 6 <= dimension.width <= 50, (ws.title, letter)
    summary = immer.wb["Series summary"]
    head = _row_of(summary, immer.report.traits[0].title) + 2
    assert summary.freeze_panes == "B1"
    assert summary.print_title_rows == f"${head - 1}:${head}"
    assert summary.auto_filter.ref == f"A{head}:T{head + 5}"  # 5 entries, 12 environments


# --- writing safely -------------------------------------------------------------------------------


def test_failed_write_leaves_the_old_workbook(immer, tmp_path, monkeypatch):
    path = write_series_workbook(immer.report, tmp_path / "series.xlsx")
    before = path.read_bytes()

    def full_disk(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", full_disk)
    with pytest.raises(TrialInputError) as caught:
        write_series_workbook(immer.report, path)
    assert caught.value.file == str(path) and "No space left" in str(caught.value)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["series.xlsx"]  # no part-file left


def test_missing_folder_is_a_message(immer, tmp_path):
    target = tmp_path / "no such folder" / "series.xlsx"
    with pytest.raises(TrialInputError) as caught:
        write_series_workbook(immer.analysis, target)
    assert str(target) in str(caught.value)


def test_another_series_is_refused(immer, plots, tmp_path):
    with pytest.raises(TrialInputError, match="not the one"):
        write_series_workbook(immer.report, tmp_path / "x.xlsx", data=plots.data)
    assert not (tmp_path / "x.xlsx").exists()
