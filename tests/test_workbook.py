"""The results workbook: its numbers are the JSON contract's at full precision, shown at the
report's decimals; text stays text; every sheet prints; a failed write spoils nothing."""

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

import openpyxl
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy.stats import studentized_range

from trialdesk.core import DEMO_SETTINGS, analyze, demo_fieldbook_path, read_fieldbook
from trialdesk.core.errors import TrialInputError
from trialdesk.core.json_output import analysis_to_json
from trialdesk.core.report import ABOVE_MARK, BELOW_MARK, build_report
from trialdesk.core.results import AnalysisSettings, TrialAnalysis
from trialdesk.core.workbook import P_FORMAT, command_line, sheet_titles, write_workbook

TRAITS = ["grain_yield", "heading_days", "plant_height", "test_weight"]
SHEETS = ["Summary", *TRAITS, "Diagnostics", "Data", "Settings"]
ANALYSED_ON = dt.date(2026, 5, 4)
FORMULA_CODES = ["=SUM(A1:A9)", "+45", "-3", "@x", "#N/A"]


def _written(tmp_path: Path, book, settings: AnalysisSettings, **context) -> SimpleNamespace:
    analysis = analyze(book, settings)
    report = build_report(analysis, book, analysed_on=ANALYSED_ON, **context)
    path = write_workbook(report, tmp_path / "results.xlsx", book=book)
    # The JSON contract (itself checked against statsmodels and scipy in test_analysis.py and
    # test_cli.py) is the reference for every number of the workbook.
    doc = json.loads(analysis_to_json(analysis))
    return SimpleNamespace(book=book, analysis=analysis, report=report, path=path, doc=doc,
                           wb=openpyxl.load_workbook(path))


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> SimpleNamespace:
    return _written(tmp_path_factory.mktemp("demo"), read_fieldbook(demo_fieldbook_path()),
                    DEMO_SETTINGS)


@pytest.fixture(scope="module")
def dunnett(tmp_path_factory) -> SimpleNamespace:
    settings = AnalysisSettings(method="dunnett", checks=("CHK-1",),
                                lower_is_better=("heading_days",))
    return _written(tmp_path_factory.mktemp("dunnett"), read_fieldbook(demo_fieldbook_path()),
                    settings)


@pytest.fixture(scope="module")
def formulas(tmp_path_factory) -> SimpleNamespace:
    """An invented field book whose entry codes and names look like formulas."""
    folder = tmp_path_factory.mktemp("formulas")
    lines = ["plot,block,entry,yield"]
    values = {"=SUM(A1:A9)": (4.1, 4.3, 4.0), "+45": (3.9, 3.7, 3.6), "-3": (4.4, 4.6, 4.8),
              "@x": (4.0, 4.1, None), "#N/A": (4.2, 4.5, 4.4)}
    plot = 0
    for block in (1, 2, 3):
        for code, ys in values.items():
            plot += 1
            y = ys[block - 1]
            lines.append(f"{plot},{block},{code},{'' if y is None else y}")
    source = folder / "formula_codes.csv"
    source.write_text("\n".join(lines) + "\n", encoding="utf-8")
    names = pd.DataFrame({"code": FORMULA_CODES,
                          "name": ['=HYPERLINK("http://example.invalid")', "", "", "", ""]})
    return _written(folder, read_fieldbook(source), AnalysisSettings(checks=("+45",)),
                    facts={"name": "Wheat & barley, =2026"}, entries=names)


# --- reading the workbook back -----------------------------------------------------------------

def _decimals(cell) -> int:
    """The decimals a number cell shows, read off its number format (the last section of a
    conditional format such as P_FORMAT)."""
    shown = cell.number_format.split(";")[-1]
    match = re.fullmatch(r"0(?:\.(0+))?", shown)
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
    assert round(cell.value, shown) == round(expected, shown), cell.coordinate
    assert cell.value == expected, cell.coordinate  # full precision, not the rounded figure


def _text(cell, expected: str | None) -> None:
    if not expected:
        assert cell.value is None, cell.coordinate
        return
    assert cell.value == expected and cell.data_type == "s", cell.coordinate


def _row_of(ws, text: str, col: int = 1) -> int:
    for row in range(1, ws.max_row + 1):
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


def _marks(entry: dict) -> str:
    return (ABOVE_MARK if entry["above_checks"] else "") + (
        BELOW_MARK if entry["below_checks"] else "")


# --- the sheets -----------------------------------------------------------------------------------

def test_sheets_in_order(demo):
    assert demo.wb.sheetnames == SHEETS


def test_summary_numbers_are_the_json_numbers(demo):
    ws = demo.wb["Summary"]
    traits = demo.doc["traits"]
    head = _row_of(ws, "Entry")
    first = 2  # the demo has no entry names, so the first mean is in column B
    assert [ws.cell(row=head, column=first + 2 * j).value for j in range(len(traits))] == (
        ["mean"] * len(traits))
    assert [ws.cell(row=head - 1, column=first + 2 * j).value for j in range(2)] == [
        "grain_yield", "heading_days (lower is better)"]
    main = traits[0]
    for i, entry in enumerate(main["entries"]):
        row = head + 1 + i
        _text(ws.cell(row=row, column=1), entry["entry"])
        for j, trait in enumerate(traits):
            same = next(e for e in trait["entries"] if e["entry"] == entry["entry"])
            # Means show one decimal more than the plot data (common practice).
            _same(ws.cell(row=row, column=first + 2 * j), same["mean"], trait["decimals"] + 1)
            _text(ws.cell(row=row, column=first + 2 * j + 1),
                  f"{same['letters']} {_marks(same)}".strip())
        last = first + 2 * len(traits)
        _same(ws.cell(row=row, column=last), entry["percent_of_check"], 1)
        _same(ws.cell(row=row, column=last + 1), entry["rank"], 0)

    def bottom(label: str) -> list:
        row = _row_of(ws, label)
        return [ws.cell(row=row, column=first + 2 * j) for j in range(len(traits))]

    for trait, mean, cv, p in zip(traits, bottom("Grand mean"), bottom("CV%"),
                                  bottom("Entry F-test p"), strict=True):
        _same(mean, trait["grand_mean"], trait["decimals"] + 1)
        _same(cv, trait["cv_percent"], 1)
        entry_p = next(a["p"] for a in trait["anova"] if a["source"] == "entry")
        _same(p, entry_p, 4)
        assert p.number_format == P_FORMAT  # shows "<0.0001" below 0.0001
    # Tukey's HSD = q(1 - alpha; entries, residual df) / sqrt(2) x SED (Tukey 1953; Kramer 1956,
    # Biometrics 12:307) with q from scipy.stats.studentized_range. Both sides find q by
    # numerical integration and root finding; rtol=1e-9 is far inside the 1e-3 to 1e-1 shown.
    for trait, cell in zip(traits, bottom("Critical difference (HSD 0.05)"), strict=True):
        q = studentized_range.ppf(0.95, len(trait["entries"]), trait["residual_df"])
        assert _decimals(cell) == trait["decimals"] + 1
        assert_allclose(cell.value, q / math.sqrt(2) * trait["sed"], rtol=1e-9)


def test_summary_header_footnotes_and_cautions(demo):
    ws = demo.wb["Summary"]
    assert ws["A1"].value == demo.report.title
    for label, value in demo.report.header:
        row = _row_of(ws, label)
        assert ws.cell(row=row, column=2).value == value
    texts = [c.value for row in ws.iter_rows() for c in row if isinstance(c.value, str)]
    for note in demo.report.footnotes:
        assert note in texts
    assert demo.report.cautions in texts


def test_summary_highlights_checks_and_marks_entries_against_them(demo):
    ws = demo.wb["Summary"]
    head = _row_of(ws, "Entry")
    fills, fonts = {}, {}
    for i, row in enumerate(demo.report.rows):
        fills[row.entry] = ws.cell(row=head + 1 + i, column=1).fill.fgColor.rgb
        fonts[row.entry] = ws.cell(row=head + 1 + i, column=2).font  # the main trait's mean
    check_fills = {fills[r.entry] for r in demo.report.rows if r.is_check}
    assert len(check_fills) == 1 and not check_fills & {
        fills[r.entry] for r in demo.report.rows if not r.is_check}
    # The main trait (grain yield, higher is better): nothing differs from the checks in the
    # demo, so no mean there is coloured; on plant height (higher is better) the entries above
    # the checks are bold.
    assert all(not f.b for f in fonts.values())
    height = 2 + 2 * TRAITS.index("plant_height")
    for i, row in enumerate(demo.report.rows):
        font = ws.cell(row=head + 1 + i, column=height).font
        assert font.b == (row.marks[2] == ABOVE_MARK)


def _check_trait_sheet(ws, trait: dict, critical_name: str) -> None:
    d = trait["decimals"] + 1
    anova = _table(ws, _row_of(ws, "Source"))
    assert [r["Source"].value for r in anova] == [a["source"] for a in trait["anova"]]
    for cells, ref in zip(anova, trait["anova"], strict=True):
        _same(cells["df"], ref["df"], 0)
        _same(cells["SS"], ref["ss"])
        _same(cells["MS"], ref["ms"])
        _same(cells["F"], ref["f"])
        _same(cells["p"], ref["p"], 4)

    head = _row_of(ws, "Statistic")
    stats = {ws.cell(row=r, column=1).value: ws.cell(row=r, column=4)
             for r in range(head + 1, _row_of(ws, "Entries, ranked") - 1)}
    family = trait["family"]
    expected = {
        "Grand mean": (trait["grand_mean"], d), "CV%": (trait["cv_percent"], 1),
        "Residual mean square": (trait["residual_ms"], None),
        "Residual df": (trait["residual_df"], 0), "SE of a mean (SEm)": (trait["sem"], d),
        "SE of a difference (SED)": (trait["sed"], d),
        "LSD 0.05 (unadjusted)": (trait["lsd"], d), "Plots": (trait["n_plots"], 0),
        "Missing plots": (trait["n_missing"], 0), "Comparisons made": (family["m"], 0),
        "Chance of a false difference if unadjusted": (family["familywise_unadjusted"], 4),
        "Per-comparison level, lowest": (family["per_comparison_min"], None),
        "Per-comparison level, highest": (family["per_comparison_max"], None),
    }
    for label, (value, decimals) in expected.items():
        _same(stats[label], value, decimals)
    [critical] = [label for label in stats if critical_name in label]
    assert critical.startswith("Critical difference") or "difference" in critical_name

    entries = _table(ws, _row_of(ws, "Rank"))
    assert len(entries) == len(trait["entries"])
    for cells, ref in zip(entries, trait["entries"], strict=True):
        _same(cells["Rank"], ref["rank"], 0)
        _text(cells["Entry"], ref["entry"])
        _text(cells["Check"], "yes" if ref["is_check"] else "no")
        _same(cells["Mean"], ref["mean"], d)
        _same(cells["SE"], ref["se"], d)
        _same(cells["n"], ref["n"], 0)
        _text(cells["Letters"], ref["letters"])
        _same(cells["% of check"], ref["percent_of_check"], 1)
        _text(cells["Above checks"], ", ".join(ref["above_checks"]))
        _text(cells["Below checks"], ", ".join(ref["below_checks"]))

    pairs = _table(ws, _row_of(ws, "Entry a"))
    assert len(pairs) == len(trait["comparisons"])
    for cells, ref in zip(pairs, trait["comparisons"], strict=True):
        _text(cells["Entry a"], ref["entry_a"])
        _text(cells["Entry b"], ref["entry_b"])
        _same(cells["Difference (a - b)"], ref["difference"], d)
        _same(cells["SE"], ref["se"], d)
        _same(cells["Adjusted p"], ref["p_adjusted"], 4)
        _same(cells["Lower limit"], ref["lower"], d)
        _same(cells["Upper limit"], ref["upper"], d)
        _text(cells["Significant"], "yes" if ref["significant"] else "no")


def test_trait_sheets_are_the_json_numbers(demo):
    for trait, column in zip(demo.doc["traits"], demo.report.columns, strict=True):
        _check_trait_sheet(demo.wb[trait["trait"]], trait, column.critical_name)


def test_dunnett_workbook(dunnett):
    ws = dunnett.wb["Summary"]
    head = _row_of(ws, "Entry")
    assert ws.cell(row=head, column=3).value == "vs checks"  # no letters for Dunnett
    for trait, column in zip(dunnett.doc["traits"], dunnett.report.columns, strict=True):
        sheet = dunnett.wb[trait["trait"]]
        _row_of(sheet, "Comparisons with the checks")
        assert len(trait["comparisons"]) == len(trait["entries"]) - 1  # each entry vs CHK-1
        assert all(e["letters"] is None for e in trait["entries"])
        _check_trait_sheet(sheet, trait, column.critical_name)


def test_diagnostics_sheet(demo):
    ws = demo.wb["Diagnostics"]
    plots = _row_of(ws, "Plot")
    flagged = _table(ws, plots)
    ref = demo.doc["traits"][0]["diagnostics"]
    assert len(flagged) == len(ref["flagged_plots"]) == 1
    for cells, f in zip(flagged, ref["flagged_plots"], strict=True):
        _text(cells["Plot"], f["plot"])
        _same(cells["Field-book row"], f["source_row"], 0)
        _text(cells["Entry"], f["entry"])
        _same(cells["Value"], f["value"], demo.doc["traits"][0]["decimals"])
        _same(cells["Fitted"], f["fitted"])
        _same(cells["Residual"], f["residual"])
        _same(cells["Studentized residual"], f["studentized_residual"], 2)
    tests = _table(ws, _row_of(ws, "Test"))
    for cells, t in zip(tests, ref["tests"], strict=True):
        _text(cells["Test"], t["name"])
        _same(cells["Statistic"], t["statistic"])
        _text(cells["df"], t["df"])
        _same(cells["p"], t["p"], 4)
        _text(cells["Reading"], t["reading"])


def test_data_sheet_has_one_row_per_plot_and_blank_missing_values(demo):
    ws = demo.wb["Data"]
    book = demo.book
    headers = [c.value for c in ws[1]]
    assert headers == ["Plot", "Block", "Entry", "Row", "Column", *book.traits]
    assert ws.max_row == 1 + len(book.plots)
    decimals = {t["trait"]: t["decimals"] for t in demo.doc["traits"]}
    for j, trait in enumerate(book.traits, start=6):
        values = book.values[trait].to_numpy()
        cells = [ws.cell(row=i + 2, column=j) for i in range(len(values))]
        blanks = sum(c.value is None for c in cells)
        assert blanks == int(pd.isna(values).sum())
        for cell, value in zip(cells, values, strict=True):
            _same(cell, None if math.isnan(value) else float(value), decimals[trait])
    # The demo has two missing yield plots and one missing height plot.
    assert sum(ws.cell(row=r, column=6).value is None for r in range(2, ws.max_row + 1)) == 2
    assert sum(ws.cell(row=r, column=8).value is None for r in range(2, ws.max_row + 1)) == 1
    assert [ws.cell(row=r, column=1).value for r in range(2, ws.max_row + 1)] == list(
        book.plots["plot"])
    assert [ws.cell(row=r, column=3).value for r in range(2, ws.max_row + 1)] == list(
        book.plots["entry"])


def test_data_sheet_without_the_field_book(demo, tmp_path):
    path = write_workbook(demo.report, tmp_path / "no_data.xlsx")
    ws = openpyxl.load_workbook(path)["Data"]
    assert "not supplied" in ws["A1"].value


def _settings_rows(ws) -> dict[str, list]:
    rows = {}
    for row in ws.iter_rows(min_row=2):
        values = [c.value for c in row[1:] if c.value is not None]
        rows.setdefault(row[0].value, []).append(values)
    return rows


def test_settings_sheet_round_trips(demo):
    rows = _settings_rows(demo.wb["Settings"])
    lists = {f.name for f in fields(AnalysisSettings) if isinstance(f.default, tuple)}
    data = {f.name: rows[f.name][0] if f.name in lists else rows[f.name][0][0]
            for f in fields(AnalysisSettings)}
    assert AnalysisSettings.from_dict(data) == demo.analysis.settings
    assert rows["source file"] == [["demo_trial.csv"]]
    assert rows["source path"] == [[os.path.abspath(demo.book.source)]]
    assert rows["source SHA-256"] == [[demo.analysis.sha256]]
    assert rows["software version"] == [[demo.analysis.software_version]]
    assert rows["analysed on"] == [[ANALYSED_ON.isoformat()]]


def test_command_line_repeats_the_analysis(demo, tmp_path):
    from trialdesk.core.cli import main

    [[command]] = _settings_rows(demo.wb["Settings"])["command line"]
    assert command == command_line(demo.analysis, demo.book)
    args = shlex.split(command)
    assert args[:2] == ["trialdesk", "analyze"]
    for flag in ("--design", "--method", "--alpha", "--check-direction"):
        assert flag in args
    assert args.count("--check") == 2 and args.count("--trait") == 4
    assert args[args.index("--lower-is-better") + 1] == "heading_days"
    out = tmp_path / "again.json"
    assert main([*args[1:], "--json", str(out)]) == 0
    assert json.loads(out.read_text(encoding="utf-8")) == demo.doc


def test_command_line_keeps_odd_codes_as_values(formulas):
    args = shlex.split(command_line(formulas.analysis, formulas.book))
    assert args[args.index("--check") + 1] == "+45"
    dash = command_line(TrialAnalysis(settings=AnalysisSettings(checks=("-3",)), source="t.csv",
                                      sha256="", software_version="", traits=(), warnings=()))
    assert "--check=-3" in shlex.split(dash)  # "-3" alone would be read as an option


# --- text stays text ------------------------------------------------------------------------------

def test_formula_looking_text_stays_text(formulas):
    found = set()
    for ws in formulas.wb:
        for row in ws.iter_rows():
            for cell in row:
                if cell.value in FORMULA_CODES or (
                        isinstance(cell.value, str) and cell.value.startswith("=HYPERLINK")):
                    assert cell.data_type == "s", (ws.title, cell.coordinate)
                    found.add(cell.value)
                    if cell.value[0] in "=+-@":
                        assert cell.quotePrefix, (ws.title, cell.coordinate)
    assert set(FORMULA_CODES) <= found
    assert '=HYPERLINK("http://example.invalid")' in found  # the entry name on the summary
    with zipfile.ZipFile(formulas.path) as archive:
        sheets = [n for n in archive.namelist() if n.startswith("xl/worksheets/sheet")]
        assert len(sheets) == len(formulas.wb.sheetnames)
        for name in sheets:
            xml = archive.read(name).decode("utf-8")
            assert "<f>" not in xml and "<f " not in xml, name
            assert 't="e"' not in xml, name  # "#N/A" is not an error value either
        summary = archive.read("xl/worksheets/sheet1.xml").decode("utf-8")
        assert 't="inlineStr"' in summary and "<t>=SUM(A1:A9)</t>" in summary


def test_sheet_titles_are_excel_safe():
    titles = sheet_titles(["yield [t/ha]", "Data", "data", "a" * 40, "a" * 40, "'quoted'",
                           "History", "?*:"])
    assert titles == ["yield _t_ha_", "Data (2)", "data (3)", "a" * 31, "a" * 27 + " (2)",
                      "quoted", "History (2)", "___"]
    assert len({t.casefold() for t in titles}) == len(titles)
    workbook = openpyxl.Workbook()
    for title in titles:  # openpyxl refuses a title Excel would refuse
        assert workbook.create_sheet(title).title == title


# --- layout and print set-up ----------------------------------------------------------------------

def test_every_sheet_prints_one_page_wide_with_header_and_footer(demo, formulas):
    for case in (demo, formulas):
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
    assert demo.wb["Summary"].page_setup.orientation == "landscape"


def test_frozen_panes_filters_and_widths(demo):
    wb = demo.wb
    summary = wb["Summary"]
    head = _row_of(summary, "Entry")
    assert summary.freeze_panes == "B1"  # the entry column
    assert summary.auto_filter.ref == f"A{head}:K{head + len(demo.report.rows)}"
    assert summary.print_title_rows == f"${head - 1}:${head}"
    for trait in TRAITS:
        ws = wb[trait]
        pairs = _row_of(ws, "Entry a")
        assert ws.freeze_panes == "A2"
        assert ws.auto_filter.ref == f"A{pairs}:H{pairs + 300}"  # 25 entries, 300 pairs
    assert wb["Data"].freeze_panes == "D2"  # the header row and the plot, block, entry
    assert wb["Data"].auto_filter.ref == "A1:I101"
    for ws in wb:
        for letter, dimension in ws.column_dimensions.items():
            assert 6 <= dimension.width <= 50, (ws.title, letter)
    data = wb["Data"]
    assert data.column_dimensions["C"].width == len("TC26-126") + 2  # the longest entry code


# --- writing safely -------------------------------------------------------------------------------

def test_failed_write_leaves_the_old_workbook(demo, tmp_path, monkeypatch):
    path = write_workbook(demo.report, tmp_path / "results.xlsx", book=demo.book)
    before = path.read_bytes()

    def full_disk(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", full_disk)
    with pytest.raises(TrialInputError) as caught:
        write_workbook(demo.report, path, book=demo.book)
    assert caught.value.file == str(path) and "No space left" in str(caught.value)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["results.xlsx"]  # no part-file left


def test_missing_folder_is_a_message(demo, tmp_path):
    target = tmp_path / "no such folder" / "results.xlsx"
    with pytest.raises(TrialInputError) as caught:
        write_workbook(demo.report, target)
    assert str(target) in str(caught.value)


def test_another_field_book_is_refused(demo, formulas, tmp_path):
    with pytest.raises(TrialInputError, match="not the one"):
        write_workbook(demo.report, tmp_path / "x.xlsx", book=formulas.book)
    assert not (tmp_path / "x.xlsx").exists()
