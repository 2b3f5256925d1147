"""The printed report of a trial series (desktop/series_pdf.py): PDF files of open and invented
series.

The numbers printed are those of the series report (trialdesk.core.series_report), which takes
them from the series analysis; tests/test_series.py checks those against statsmodels and scipy,
and tests/test_series_workbook.py the report against the JSON contract. Here the point is that
the PDF prints them, readable as text, on the page asked for, nothing cut at the margin. The text
is read back with poppler's ``pdftotext`` and the pages counted with ``pdfinfo`` (Debian package
poppler-utils); the first page of the MASS ``immer`` report is saved as
tests/output/screenshots/series-report.png with ``pdftoppm``.

Data: MASS ``immer`` and lattice ``barley`` (Immer, Hayes & Powers 1934, J. Am. Soc. Agron.
26:403-419; extracts in tests/data, source in tests/data/README.md), both entry means only; and
invented plot-level series built below (fixed random seeds).
"""

from __future__ import annotations

import html
import re
import shutil
import subprocess
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PySide6.QtGui import QImage
from PySide6.QtPrintSupport import QPrinter

from trialdesk.core.cautions import CAUTIONS
from trialdesk.core.errors import TrialInputError
from trialdesk.core.results import AnalysisSettings
from trialdesk.core.separation import METHOD_NAMES
from trialdesk.core.series import analyze_series, read_series
from trialdesk.core.series_report import SeriesReport, build_series_report
from trialdesk.desktop import series_pdf
from trialdesk.desktop.palette import CHECK_PEN
from trialdesk.desktop.series_pdf import render_series_report, write_series_pdf

DATA = Path(__file__).parents[1] / "data"
SHOTS = Path(__file__).parents[1] / "output" / "screenshots"
FIRST_SENTENCE = CAUTIONS.split(". ")[0] + "."


# --- reading a PDF back -------------------------------------------------------------------------


def poppler(tool: str, *args: str) -> str:
    """The output of one poppler-utils command; the test is skipped when it is not installed."""
    if shutil.which(tool) is None:
        pytest.skip(f"{tool} (poppler-utils) is not installed: the PDF cannot be read back")
    return subprocess.run([tool, *args], check=True, capture_output=True, text=True).stdout


def pdf_text(path: Path, *, layout: bool = True) -> str:
    """The PDF's text, columns kept with ``layout`` (else in reading order, so that a sentence
    wrapped beside the chart reads whole)."""
    return poppler("pdftotext", *(["-layout"] if layout else []), str(path), "-")


def flowing(text: str) -> str:
    """``text`` with its line breaks and runs of spaces made single spaces."""
    return " ".join(text.split())


def page_count(path: Path) -> int:
    return int(re.search(r"Pages:\s+(\d+)", poppler("pdfinfo", str(path))).group(1))


def picture(path: Path, name: str, dpi: int = 80) -> Path:
    """Page 1 of the PDF as tests/output/screenshots/<name>.png, at ``dpi``."""
    SHOTS.mkdir(parents=True, exist_ok=True)
    poppler("pdftoppm", "-r", str(dpi), "-png", "-f", "1", "-l", "1", "-singlefile", str(path),
            str(SHOTS / name))
    target = SHOTS / f"{name}.png"
    assert target.stat().st_size > 0
    return target


@dataclass(frozen=True)
class Word:
    """One word of a PDF page and its box, in points from the page's top left corner."""

    text: str
    left: float
    top: float
    right: float
    bottom: float


def page_words(path: Path) -> list[tuple[float, list[Word]]]:
    """Each page's width and words, as ``pdftotext -bbox`` finds them."""
    pages = []
    for page in poppler("pdftotext", "-bbox", str(path), "-").split("<page ")[1:]:
        width = float(re.search(r'width="([\d.]+)"', page).group(1))
        words = [Word(html.unescape(text), *map(float, box)) for *box, text in re.findall(
            r'<word xMin="([\d.]+)" yMin="([\d.]+)" xMax="([\d.]+)" yMax="([\d.]+)">([^<]*)<',
            page)]
        pages.append((width, words))
    return pages


def assert_within_the_margins_and_readable(path: Path) -> None:
    """No word of any page past the 12 mm side margins, none set smaller than 6.5 pt."""
    margin = 12.0 / 25.4 * 72.0  # the report's margins, in points
    for number, (width, words) in enumerate(page_words(path), start=1):
        assert words, number
        # 1 pt: poppler's boxes are the glyphs' advances, which may reach a hair past the ink.
        outside = [w for w in words if w.right > width - margin + 1.0 or w.left < margin - 1.0]
        assert not outside, (number, outside[:5])
        # A word's box is as tall as the face's ascent and descent, about 1.16 em in the
        # DejaVu Sans embedded here (measured: 7.54 pt for the 6.5 pt footer), so 7 pt tells
        # 6.5 pt type from anything smaller.
        small = [w for w in words if w.bottom - w.top < 7.0]
        assert not small, (number, small[:5])


# --- series -------------------------------------------------------------------------------------


def immer_csv(folder: Path) -> Path:
    """MASS immer in long form: one row per variety (Var), location (Loc) and year (Year)."""
    wide = pd.read_csv(DATA / "immer.csv")
    long = wide.melt(id_vars=["Loc", "Var"], value_vars=["Y1", "Y2"], var_name="Year",
                     value_name="yield")
    long["Year"] = long["Year"].map({"Y1": "1931", "Y2": "1932"})
    path = folder / "immer_long.csv"
    long.to_csv(path, index=False)
    return path


def invented_series(folder: Path, n_entries: int, environments: list[tuple[str, str]], *,
                    traits: tuple[str, ...] = ("yield",), blocks: int = 3,
                    seed: int = 20261202) -> Path:
    """Plots of entries L001... (L001 and L002 the checks intended) in each environment and
    block, each trait drawn around 6, 16, 26... with entry, environment, interaction and plot
    effects; two decimals."""
    rng = np.random.default_rng(seed)
    entry_effect = {t: rng.normal(0, 1, n_entries) for t in traits}
    rows = []
    for location, season in environments:
        env_effect = rng.normal(0, 2)
        interaction = rng.normal(0, .4, n_entries)
        for block in range(1, blocks + 1):
            for i in rng.permutation(n_entries):
                row = {"location": location, "season": season, "block": block,
                       "entry": f"L{i + 1:03d}", "plot": f"{block}{i + 1:03d}"}
                for k, trait in enumerate(traits):
                    row[trait] = round(6 + 10 * k + env_effect + entry_effect[trait][i]
                                       + interaction[i] + rng.normal(0, .5), 2)
                rows.append(row)
    path = folder / f"invented-{n_entries}x{len(environments)}.csv"
    pd.DataFrame(rows).to_csv(path, index=False)
    return path


def invented_report(folder: Path, n_entries: int, environments, **options) -> SeriesReport:
    path = invented_series(folder, n_entries, environments, **options)
    analysis = analyze_series(read_series(path, location="location", season="season"),
                              AnalysisSettings(checks=("L001", "L002")))
    return build_series_report(analysis)


FOUR = [("North", "2025"), ("South", "2025"), ("North", "2026"), ("South", "2026")]


@pytest.fixture(scope="module")
def immer(tmp_path_factory) -> SeriesReport:
    folder = tmp_path_factory.mktemp("immer")
    data = read_series(immer_csv(folder), entry="Var", location="Loc", season="Year")
    return build_series_report(analyze_series(data, AnalysisSettings(checks=("M",))))


# --- the MASS immer series ----------------------------------------------------------------------


def test_immer_report_prints_on_one_page_with_everything(qapp, immer, tmp_path):
    path = write_series_pdf(immer, tmp_path / "immer series.pdf")
    assert page_count(path) == 1
    text = pdf_text(path)
    words = flowing(pdf_text(path, layout=False))
    part = immer.traits[0]
    for row in part.rows:  # every entry, with its rank and mean over environments
        assert re.search(rf"^\s*{row.rank}\s+{row.entry}\s", text, re.MULTILINE), row.entry
        assert f"{row.mean:.{part.decimals}f}" in flowing(text)
    for name in part.environments:  # the names are set over their columns, "UF" over "1931"
        location, season = name.split()
        assert location in words and season in words
    for name in ("UF 1931", "W 1931", "GR 1932", "D 1932"):  # and in full in the header
        assert name in words
    assert METHOD_NAMES["tukey"] in words and "alpha 0.05" in words
    heritability = part.components.heritability
    assert f"Heritability of entry means: {heritability:.3f}" in words
    # The formula, wherever its line breaks ("/" is a place a line may break)
    assert "H2=s2G/(s2G+s2res/e)" in words.replace(" ", "")
    assert "Entry test, environments random (against entry x environment)" in words
    assert "Combined analysis of variance" in words and "entry x environment" in words
    assert f"{part.critical_name} {part.critical_difference:.{part.decimals}f}" in words
    assert FIRST_SENTENCE in words
    assert "Response to the environment: yield" in words
    assert_within_the_margins_and_readable(path)
    shot = picture(path, "series-report")
    assert QImage(str(shot)).width() > 0


def test_the_chart_draws_the_check_in_the_check_colour(qapp, immer, tmp_path):
    path = write_series_pdf(immer, tmp_path / "immer.pdf")
    image = QImage(str(picture(path, "series-report-chart", dpi=100)))

    def near(pixel, color) -> bool:
        return all(abs(a - b) <= 24 for a, b in zip(pixel, color, strict=True))

    # The check M is the only entry in the check colour: its line and its name on the chart.
    check = (CHECK_PEN.red(), CHECK_PEN.green(), CHECK_PEN.blue())
    found = sum(near(image.pixelColor(x, y).getRgb()[:3], check)
                for x in range(0, image.width(), 2) for y in range(0, image.height(), 2))
    assert found > 50


def test_write_takes_an_analysis_and_letter_paper(qapp, immer, tmp_path):
    path = write_series_pdf(immer.analysis, tmp_path / "letter.pdf", paper="Letter")
    info = poppler("pdfinfo", str(path))
    assert "612 x 792" in info or "792 x 612" in info  # US Letter, in points
    assert "immer_long" in flowing(pdf_text(path))


def test_barley_prints_every_variety_and_site(qapp, tmp_path):
    # lattice barley: 10 varieties at six Minnesota sites in 1931 and 1932, entry means only.
    data = read_series(DATA / "barley.csv", entry="variety", location="site", season="year")
    report = build_series_report(analyze_series(data, AnalysisSettings(checks=("Manchuria",))))
    path = write_series_pdf(report, tmp_path / "barley.pdf")
    words = flowing(pdf_text(path))
    for row in report.traits[0].rows:
        assert row.entry in words
    for name in report.traits[0].environments:
        assert name in words  # in the header
    assert FIRST_SENTENCE in words
    assert_within_the_margins_and_readable(path)


# --- invented series ----------------------------------------------------------------------------


def test_plot_series_prints_both_entry_tests_and_bartlett(qapp, tmp_path):
    report = invented_report(tmp_path, 8, FOUR)
    path = write_series_pdf(report, tmp_path / "plots.pdf")
    assert page_count(path) == 1
    words = flowing(pdf_text(path, layout=False))
    for part in ("Entry test, environments random (against entry x environment)",
                 "Entry test, environments fixed (against pooled error)",
                 "Bartlett's test of equal error variances across environments",
                 "block within environment", "pooled error",
                 "North 2025", FIRST_SENTENCE):
        assert part in words, part
    assert "H2=s2G/(s2G+s2GE/e+s2e/(re))" in words.replace(" ", "")
    for row in report.traits[0].rows:
        assert row.entry in words
    assert_within_the_margins_and_readable(path)


def test_forty_entries_flow_on_with_the_heading_repeated(qapp, tmp_path):
    environments = [(f"Loc{k}", "2025") for k in range(1, 7)]
    report = invented_report(tmp_path, 40, environments)
    path = write_series_pdf(report, tmp_path / "forty.pdf")
    text = pdf_text(path)
    for row in report.traits[0].rows:
        assert re.search(rf"^\s*{row.rank}\s+{row.entry}\s", text, re.MULTILINE), row.entry
    assert FIRST_SENTENCE in flowing(text)
    assert_within_the_margins_and_readable(path)


def test_many_environments_print_in_sections(qapp, tmp_path):
    environments = [(f"Site{k}", season) for k in range(1, 9) for season in ("2024", "2025",
                                                                               "2026")]
    report = invented_report(tmp_path, 12, environments, blocks=2)
    path = write_series_pdf(report, tmp_path / "wide.pdf")
    words = flowing(pdf_text(path))
    assert "yield: environments 1\u2013" in words and "of 24" in words
    for location, season in environments:
        assert f"{location} {season}" in words  # in the header
    for row in report.traits[0].rows:
        assert row.entry in words
    assert_within_the_margins_and_readable(path)


def test_several_traits_each_with_its_analysis(qapp, tmp_path):
    report = invented_report(tmp_path, 10, FOUR, traits=("yield", "height", "protein"))
    path = write_series_pdf(report, tmp_path / "traits.pdf")
    words = flowing(pdf_text(path))
    for part in report.traits:
        assert f"Combined analysis of variance: {part.trait}" in words
        assert f"Heritability of entry means: {part.components.heritability:.3f}" in words
    assert words.count("Response to the environment") == 1  # the main trait's chart only
    assert page_count(path) > 1 and f"Page {page_count(path)} of {page_count(path)}" in words
    assert_within_the_margins_and_readable(path)


def test_two_environments_have_no_chart_and_say_why(qapp, tmp_path):
    report = invented_report(tmp_path, 6, FOUR[:2])
    assert not report.traits[0].has_stability
    path = write_series_pdf(report, tmp_path / "two.pdf")
    words = flowing(pdf_text(path))
    assert "Response to the environment" not in words
    assert "stability needs at least 3 environments" in words  # the analysis' note
    assert_within_the_margins_and_readable(path)


# --- writing and printing -----------------------------------------------------------------------


def test_unwritable_paths_are_refused_with_a_message(qapp, immer, tmp_path):
    not_a_folder = tmp_path / "notes.txt"
    not_a_folder.write_text("not a folder")
    for path in (not_a_folder / "series.pdf", tmp_path / "no such folder" / "series.pdf",
                 tmp_path):
        with pytest.raises(TrialInputError) as caught:
            write_series_pdf(immer, path)
        assert caught.value.file == str(path)
    with pytest.raises(TrialInputError, match="A4 or Letter"):
        write_series_pdf(immer, tmp_path / "series.pdf", paper="A5")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt"]


def test_a_failed_write_leaves_the_good_file(qapp, immer, tmp_path, monkeypatch):
    good = write_series_pdf(immer, tmp_path / "series.pdf")
    before = good.read_bytes()

    def disk_full(source, target):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(series_pdf.os, "replace", disk_full)
    with pytest.raises(TrialInputError, match="No space left"):
        write_series_pdf(immer, good)
    monkeypatch.undo()

    def crash(report, device):
        raise RuntimeError("drawing failed")

    monkeypatch.setattr(series_pdf, "render_series_report", crash)
    with pytest.raises(RuntimeError):
        write_series_pdf(immer, good)
    assert good.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["series.pdf"]  # no temporary file left


def test_printer_uses_the_same_drawing(qapp, immer, tmp_path):
    printer = QPrinter(QPrinter.PrinterMode.HighResolution)
    printer.setOutputFormat(QPrinter.OutputFormat.PdfFormat)
    printer.setOutputFileName(str(tmp_path / "printed.pdf"))
    assert render_series_report(immer, printer) == 1
    assert "Heritability of entry means" in flowing(pdf_text(tmp_path / "printed.pdf"))
