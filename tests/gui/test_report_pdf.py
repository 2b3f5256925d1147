"""The printed report (desktop/report_pdf.py): PDF files of the demo trial and of invented ones.

The numbers printed are those of the report model (trialdesk.core.report), which takes them from
trialdesk.core.analysis; the core's own tests check those against statsmodels and scipy. Here the
point is that the PDF prints every one of them, readable as text, on the pages and paper asked
for. The text is read back with poppler's ``pdftotext`` and the pages counted with ``pdfinfo``
(Debian package poppler-utils). Each PDF's first page is saved as a picture under
tests/output/screenshots/ with ``pdftoppm``.
"""

from __future__ import annotations

import html
import itertools
import os
import re
import shutil
import string
import subprocess
import sys
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PySide6.QtPrintSupport import QPrinter

from trialdesk.core.analysis import analyze
from trialdesk.core.cautions import CAUTIONS
from trialdesk.core.demo import DEMO_SETTINGS, demo_fieldbook_path
from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import read_fieldbook
from trialdesk.core.report import ABOVE_MARK, BELOW_MARK, TrialReport, build_report
from trialdesk.core.results import AnalysisSettings
from trialdesk.core.separation import METHOD_NAMES
from trialdesk.core.version import VERSION
from trialdesk.desktop import report_pdf
from trialdesk.desktop.report_pdf import render_report, write_pdf

SHOTS = Path(__file__).parents[1] / "output" / "screenshots"

FACTS = {"name": "Tallow Creek AYT 2026", "station": "Tallow Creek Field Station",
         "season": "2026 main", "crop": "wheat", "plot_length_m": 5, "plot_width_m": 1.5,
         "harvested_area_m2": 6}


def poppler(tool: str, *args: str) -> str:
    """The output of one poppler-utils command; the test is skipped when it is not installed."""
    if shutil.which(tool) is None:
        pytest.skip(f"{tool} (poppler-utils) is not installed: the PDF cannot be read back")
    return subprocess.run([tool, *args], check=True, capture_output=True, text=True).stdout


def pdf_text(path: Path, page: int | None = None, *, layout: bool = True) -> str:
    """The PDF's text (one page of it when ``page`` is given), columns kept with ``layout``."""
    pages = ["-f", str(page), "-l", str(page)] if page else []
    return poppler("pdftotext", *(["-layout"] if layout else []), *pages, str(path), "-")


def flowing(text: str) -> str:
    """``text`` with its line breaks and runs of spaces made single spaces."""
    return " ".join(text.split())


def pdf_info(path: Path) -> dict[str, str]:
    lines = poppler("pdfinfo", str(path)).splitlines()
    return {key.strip(): value.strip() for key, _, value in (line.partition(":") for line in lines)}


def page_count(path: Path) -> int:
    return int(pdf_info(path)["Pages"])


def picture(path: Path, name: str, page: int = 1, dpi: int = 80) -> Path:
    """Page ``page`` of the PDF as tests/output/screenshots/<name>.png, at ``dpi``."""
    SHOTS.mkdir(parents=True, exist_ok=True)
    poppler("pdftoppm", "-r", str(dpi), "-png", "-f", str(page), "-l", str(page), "-singlefile",
            str(path), str(SHOTS / name))
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
        # A word's box is as tall as the face's ascent and descent: 1.16 em for DejaVu Sans, the
        # face embedded here (pdffonts), so 7.54 pt for the 6.5 pt footer (measured) and 6.98 pt
        # for 6 pt type. 7 pt also passes 6.5 pt type in the other common sans faces (from
        # memory: ascent and descent 1.12 em in Liberation Sans and Arial, 1.36 em in Noto Sans).
        # Words turned up (the chart's entry codes) are as tall as they are long, taller still.
        small = [w for w in words if w.bottom - w.top < 7.0]
        assert not small, (number, small[:5])


def entry_line(text: str, entry: str) -> str:
    """The line of the table that starts with the rank and ``entry``."""
    found = [line for line in text.splitlines() if re.match(rf"\s*\d+\s+{re.escape(entry)}\b",
                                                          line)]
    assert len(found) == 1, (entry, found)
    return found[0]


def statistics_line(text: str, label: str) -> str:
    """The line of the statistics under the table that starts with ``label``."""
    found = [line for line in text.splitlines() if line.strip().startswith(label)]
    assert len(found) == 1, (label, found)
    return found[0]


def table_heading(text: str) -> tuple[str, str]:
    """The two lines of the table's heading: the traits, then Rank, Entry, mean, letters..."""
    lines = [line for line in text.splitlines() if line.strip()]
    found = [k for k, line in enumerate(lines) if re.match(r"\s*Rank\s+Entry\b", line)]
    assert len(found) == 1, found
    return lines[found[0] - 1], lines[found[0]]


def demo_report(settings: AnalysisSettings = DEMO_SETTINGS, **options) -> TrialReport:
    book = read_fieldbook(demo_fieldbook_path())
    return build_report(analyze(book, settings), book, facts=FACTS, **options)


def invented_book(folder: Path, n_entries: int, n_blocks: int, traits: dict[str, tuple]):
    """An invented field book: entries N001... (N001 and N002 the checks) once per block, each
    trait drawn at random around its (mean, spread of entries, plot error)."""
    rng = np.random.default_rng(20261201)
    codes = [f"N{k:03d}" for k in range(1, n_entries + 1)]
    effects = {t: rng.normal(0, spread, n_entries) for t, (_, spread, _) in traits.items()}
    rows = []
    for block in range(1, n_blocks + 1):
        for k, index in enumerate(rng.permutation(n_entries)):
            row = {"plot": 1000 * block + k + 1, "block": block, "entry": codes[index]}
            for trait, (mean, _, error) in traits.items():
                row[trait] = round(mean + effects[trait][index] + rng.normal(0, error), 2)
            rows.append(row)
    path = folder / f"invented-{n_entries}.csv"
    pd.DataFrame(rows).to_csv(path, index=False)
    return read_fieldbook(path), codes


@pytest.fixture(scope="module")
def demo() -> TrialReport:
    return demo_report()


# --- the demo trial ------------------------------------------------------------------------------


def test_demo_report_prints_on_one_page_with_every_number(qapp, demo, tmp_path):
    path = write_pdf(demo, tmp_path / "demo report.pdf")

    assert path == tmp_path / "demo report.pdf"
    assert path.read_bytes().startswith(b"%PDF")
    assert page_count(path) == 1
    assert pdf_info(path)["Page size"].startswith("595 x 842")  # A4 portrait, in points
    picture(path, "report-page1")
    text = pdf_text(path)
    words = flowing(pdf_text(path, layout=False))

    for row in demo.rows:
        assert row.entry in text
    # The means and letters of several entries, as trialdesk.core.analysis computed them, printed
    # with the column's decimals (one more than the data: 3 for grain yield).
    main = demo.analysis.trait("grain_yield")
    column = demo.columns[0]
    assert column.trait == "grain_yield" and column.decimals == 3
    by_entry = {e.entry: e for e in main.entries}
    for entry in ("TC26-156", "TC26-133", "CHK-1", "CHK-2", demo.rows[-1].entry):
        result = by_entry[entry]
        line = entry_line(text, entry)
        assert re.search(rf"{re.escape(f'{result.mean:.3f}')}\s+{result.letters}\b", line), line
        assert f"{result.percent_of_check:.1f}" in line
    assert METHOD_NAMES["tukey"] in words
    assert CAUTIONS.split(". ")[0] + "." in words
    for label in ("Grand mean", "CV %", "Critical difference", "Entry F-test p"):
        assert label in text
    assert f"{column.grand_mean:.3f}" in statistics_line(text, "Grand mean")
    assert "<0.0001" in statistics_line(text, "Entry F-test p")  # p = 7e-8 for grain yield
    assert column.critical_name in text
    assert demo.analysis.sha256[:12] in text
    assert demo.analysis.sha256 not in text  # shortened on paper
    assert "Page 1 of 1" in text
    assert f"Trialdesk {VERSION}" in text
    assert "Ranked means of grain_yield" in words


def test_marks_against_the_checks_are_printed(qapp, demo, tmp_path):
    path = write_pdf(demo, tmp_path / "marks.pdf")
    text = pdf_text(path)

    for row in demo.rows:
        line = entry_line(text, row.entry)
        assert line.count(ABOVE_MARK) == sum(m.count(ABOVE_MARK) for m in row.marks), line
        assert line.count(BELOW_MARK) == sum(m.count(BELOW_MARK) for m in row.marks), line


def test_letter_paper(qapp, demo, tmp_path):
    path = write_pdf(demo, tmp_path / "letter.pdf", paper="Letter")

    assert pdf_info(path)["Page size"].startswith("612 x 792")  # 8.5 x 11 in, in points
    assert page_count(path) == 1
    picture(path, "report-letter")


def test_dunnett_report_has_marks_and_no_letters(qapp, tmp_path):
    report = demo_report(replace(DEMO_SETTINGS, method="dunnett"))
    assert not any(c.has_letters for c in report.columns)
    path = write_pdf(report, tmp_path / "dunnett.pdf")

    assert page_count(path) == 1
    picture(path, "report-dunnett")
    text = pdf_text(path)
    assert "letters" not in text.split("Notes")[0]  # no letters column in the table
    assert report.columns[0].critical_name in text  # "Dunnett difference 0.05"
    # The same for every trait: named once under the table, not under each trait's number.
    assert text.split("Ranked means")[0].count(report.columns[0].critical_name) == 1
    marked = [r for r in report.rows if any(r.marks)]
    assert marked  # the demo has entries significantly above or below the checks
    for row in marked:
        line = entry_line(text, row.entry)
        assert f"{row.means[0]:.{report.columns[0].decimals}f}" in line
        assert sum(line.count(m) for m in (ABOVE_MARK, BELOW_MARK)) == sum(map(len, row.marks))
    assert METHOD_NAMES["dunnett"] in flowing(pdf_text(path, layout=False))


def test_names_are_printed_and_long_ones_cut_short(qapp, tmp_path):
    codes = [row.entry for row in demo_report().rows]
    names = {code: f"Line {k}" for k, code in enumerate(codes)}
    names["TC26-156"] = "Tallow Creek selection with a very long pedigree name 1234567890"
    entries = pd.DataFrame({"code": list(names), "name": list(names.values())})
    report = demo_report(entries=entries)
    path = write_pdf(report, tmp_path / "names.pdf")

    text = pdf_text(path)
    assert "Name" in text
    assert "Line 3" in entry_line(text, codes[3])
    long_line = entry_line(text, "TC26-156")
    assert "Tallow Creek selection" in long_line
    assert "1234567890" not in long_line and "\u2026" in long_line
    picture(path, "report-names")


# --- long and wide trials ------------------------------------------------------------------------


def test_eighty_entries_flow_on_with_the_heading_repeated(qapp, tmp_path):
    book, codes = invented_book(tmp_path, 80, 3, {"yield": (5.0, 0.6, 0.4)})
    analysis = analyze(book, AnalysisSettings(method="tukey", checks=("N001", "N002")))
    report = build_report(analysis, book, facts={"name": "Invented 80-entry trial"})
    path = write_pdf(report, tmp_path / "eighty.pdf")

    count = page_count(path)
    assert count >= 2
    picture(path, "report-80-page1")
    picture(path, "report-80-page2", page=2)
    whole = pdf_text(path)
    for code in codes:
        assert re.search(rf"^\s*\d+\s+{code}\b", whole, flags=re.MULTILINE), code
    for page in range(1, count + 1):
        text = pdf_text(path, page)
        assert "Invented 80-entry trial" in text
        assert f"Page {page} of {count}" in text
    # The table's heading again on page 2: the trait over "mean letters", beside Rank and Entry.
    heading = table_heading(pdf_text(path, 1))
    assert "yield" in heading[0] and re.search(r"Rank\s+Entry\s+mean\s+letters", heading[1])
    assert [flowing(line) for line in table_heading(pdf_text(path, 2))] == [
        flowing(line) for line in heading]
    assert "Grand mean" not in pdf_text(path, 1)  # the statistics close the table, at its end
    assert CAUTIONS.split(". ")[0] + "." in flowing(pdf_text(path, layout=False))


def test_forty_entries_and_six_traits_fit_one_page_with_the_chart(qapp, tmp_path):
    traits = {f"trait_{k}": (50.0 + k, 3.0, 1.5) for k in range(1, 7)}
    book, codes = invented_book(tmp_path, 40, 3, traits)
    analysis = analyze(book, AnalysisSettings(method="tukey", checks=("N001", "N002")))
    report = build_report(analysis, book, facts={"name": "Invented 40-entry trial"})
    path = write_pdf(report, tmp_path / "forty.pdf")
    picture(path, "report-40x6")

    assert page_count(path) == 1
    assert pdf_info(path)["Page size"].startswith("595 x 842")  # A4 portrait, in points
    first = pdf_text(path, 1)
    for code in codes:
        assert entry_line(first, code)
    assert statistics_line(first, "Grand mean")
    words = flowing(pdf_text(path, 1, layout=False))
    assert "Ranked means of trait_1" in words
    # The chart names both checks: each code is in the facts, the table and the chart's axis.
    for check in ("N001", "N002"):
        assert words.count(check) == 3, check
    assert METHOD_NAMES["tukey"] in words
    # Every trait has the same critical difference, so the notes name it once.
    assert "Critical differences: HSD 0.05 for every trait" in words
    assert "HSD 0.05 for trait_2" not in words
    assert CAUTIONS.split(". ")[0] + "." in words


def test_eight_traits_turn_the_page(qapp, tmp_path):
    traits = {"grain_yield": (5.0, 0.5, 0.3), "plant_height": (95, 6, 3),
              "heading_days": (62, 2, 1), "maturity_days": (105, 2, 1.2),
              "thousand_kernel_weight": (40, 3, 1.5), "protein": (12.5, 0.6, 0.3),
              "lodging": (2.0, 0.8, 0.6), "test_weight": (77, 1, 0.5)}
    book, codes = invented_book(tmp_path, 24, 3, traits)
    settings = AnalysisSettings(method="tukey", checks=("N001", "N002"),
                                lower_is_better=("heading_days", "lodging"))
    units = pd.DataFrame({"name": list(traits),
                          "unit": ["t/ha", "cm", "days", "days", "g", "%", "1-9", "kg/hl"],
                          "decimals": [2, 0, 0, 0, 1, 1, 0, 1]})
    report = build_report(analyze(book, settings), book, facts={"name": "Invented wide trial"},
                          traits=units)
    assert len(report.columns) == 8
    path = write_pdf(report, tmp_path / "wide.pdf")
    picture(path, "report-wide")

    assert pdf_info(path)["Page size"].startswith("842 x 595")  # A4 landscape, in points
    text = pdf_text(path, 1)
    for trait in traits:
        assert trait in text
    for code in codes:
        assert entry_line(text, code)  # the whole table on the first page
    # What does not fit beside or below the table is on the last page, the cautions always.
    count = page_count(path)
    assert count <= 2
    last = flowing(pdf_text(path, count, layout=False))
    assert "Ranked means of grain_yield" in flowing(pdf_text(path, layout=False))
    assert CAUTIONS.split(". ")[0] + "." in last
    if count == 2:
        picture(path, "report-wide-page2", page=2)


def test_a_table_too_wide_for_the_page_prints_in_sections_of_traits(qapp, tmp_path):
    # An early-generation trial: 150 entries in two blocks, so Tukey's HSD is wide and many
    # entries hold 20 to 30 grouping letters; 8 traits of these do not fit across a landscape
    # page even in 7 pt.
    traits = {f"trait_{k}": (50.0 + 5 * k, 3.0, 1.5) for k in range(1, 9)}
    book, codes = invented_book(tmp_path, 150, 2, traits)
    analysis = analyze(book, AnalysisSettings(method="tukey", checks=("N001", "N002")))
    report = build_report(analysis, book, facts={"name": "Invented early-generation trial"})
    assert max(len(letters) for row in report.rows for letters in row.letters) >= 25
    path = write_pdf(report, tmp_path / "sections.pdf")

    assert pdf_info(path)["Page size"].startswith("842 x 595")  # A4 landscape, in points
    assert_within_the_margins_and_readable(path)
    count = page_count(path)
    sections: dict[str, dict[str, set[str]]] = {}  # "Traits 1–4": its headings, its entries
    for page in range(1, count + 1):
        text = pdf_text(path, page)
        assert f"Page {page} of {count}" in text
        label = re.search(r"(Traits? \d+(?:\u2013\d+)?) of 8(, continued)?", text)
        if label is None:  # a page after the table's
            continue
        section = sections.setdefault(label.group(1), {"traits": set(), "entries": set()})
        assert bool(label.group(2)) == (section["entries"] != set())  # "continued" after the first
        traits_line, columns_line = table_heading(text)
        section["traits"] |= set(traits_line.split()) & set(traits)
        section["entries"] |= set(re.findall(r"^\s*\d+\s+(N\d{3})\b", text, flags=re.MULTILINE))
        # The percent of the checks beside the main trait only, in the first section.
        assert ("checks" in columns_line) == (label.group(1) == "Traits 1\u20134"), page
    picture(path, "report-sections-page1", dpi=70)
    second = next(page for page in range(1, count + 1) if "Traits 5" in pdf_text(path, page))
    picture(path, "report-sections-second", page=second, dpi=70)

    assert "Traits 1\u20134 of 8" in pdf_text(path, 1)
    assert len(sections) >= 2
    # Every trait heads a column of one section, and every section lists every entry.
    assert sorted(t for section in sections.values() for t in section["traits"]) == sorted(traits)
    for name, section in sections.items():
        assert section["entries"] == set(codes), name
    # Each section closes with its traits' statistics.
    whole = pdf_text(path)
    assert len(re.findall(r"^\s*Grand mean\b", whole, flags=re.MULTILINE)) == len(sections)
    words = flowing(pdf_text(path, layout=False))
    assert "Ranked means of trait_1" in words
    assert "Critical differences: HSD 0.05 for every trait" in words
    assert CAUTIONS.split(". ")[0] + "." in words


def test_letters_too_long_for_a_page_wrap_within_their_row(qapp, demo, tmp_path):
    # 156 letters (a to Z, a1 to Z1, a2 to Z2) for three entries' grain yield, wider than a
    # landscape page: the letters run on to further lines in their row, the type as it was.
    letters = "".join(f"{c}{cycle or ''}" for cycle in range(3) for c in string.ascii_letters)
    rows = list(demo.rows)
    wrapped = [rows[k].entry for k in (3, 4, 10)]  # the 5th is a check
    for k in (3, 4, 10):
        rows[k] = replace(rows[k], letters=(letters, *rows[k].letters[1:]))
    path = write_pdf(replace(demo, rows=tuple(rows)), tmp_path / "wrapped.pdf")
    picture(path, "report-wrapped-letters", dpi=70)

    assert_within_the_margins_and_readable(path)
    text = pdf_text(path, 1)
    assert "Trait 1 of 4" in text  # grain yield in a section of its own
    lines = text.splitlines()
    for entry in wrapped:
        first = lines.index(entry_line(text, entry))
        rank, code, mean, start, percent = lines[first].split()
        rest = list(itertools.takewhile(lambda line: not re.match(r"\s*(\d+\s|Grand)", line),
                                        lines[first + 1:]))
        assert len(rest) >= 1, entry  # on two lines at least
        assert start + "".join("".join(line.split()) for line in rest) == letters, entry
    for trait in ("heading_days", "plant_height", "test_weight"):
        assert trait in pdf_text(path)


# --- where the file goes -------------------------------------------------------------------------


def test_unwritable_paths_are_refused_with_a_message(qapp, demo, tmp_path):
    not_a_folder = tmp_path / "notes.txt"
    not_a_folder.write_text("not a folder")
    for path in (not_a_folder / "report.pdf", tmp_path / "no such folder" / "report.pdf",
                 tmp_path):
        with pytest.raises(TrialInputError) as caught:
            write_pdf(demo, path)
        assert caught.value.file == str(path)
    with pytest.raises(TrialInputError, match="A4 or Letter"):
        write_pdf(demo, tmp_path / "report.pdf", paper="A5")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt"]


def test_a_failed_write_leaves_the_good_file(qapp, demo, tmp_path, monkeypatch):
    good = write_pdf(demo, tmp_path / "report.pdf")
    before = good.read_bytes()

    def disk_full(source, target):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(report_pdf.os, "replace", disk_full)
    with pytest.raises(TrialInputError, match="No space left"):
        write_pdf(demo, good)
    monkeypatch.undo()

    def crash(report, device):
        raise RuntimeError("drawing failed")

    monkeypatch.setattr(report_pdf, "render_report", crash)
    with pytest.raises(RuntimeError):
        write_pdf(demo, good)

    assert good.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["report.pdf"]  # no temporary file left


def test_printer_uses_the_same_drawing(qapp, demo, tmp_path):
    printer = QPrinter(QPrinter.PrinterMode.HighResolution)
    printer.setOutputFormat(QPrinter.OutputFormat.PdfFormat)
    printer.setOutputFileName(str(tmp_path / "printed.pdf"))

    assert render_report(demo, printer) == 1
    assert "TC26-156" in pdf_text(tmp_path / "printed.pdf")


def test_write_pdf_needs_no_display(tmp_path):
    # A fresh process with no display and no Qt platform chosen, as the command line runs.
    env = {k: v for k, v in os.environ.items()
           if k not in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM")}
    target = tmp_path / "headless.pdf"
    script = (
        "import sys\n"
        "from trialdesk.core.analysis import analyze\n"
        "from trialdesk.core.demo import DEMO_SETTINGS, demo_fieldbook_path\n"
        "from trialdesk.core.fieldbook import read_fieldbook\n"
        "from trialdesk.core.report import build_report\n"
        "from trialdesk.desktop.report_pdf import write_pdf\n"
        "book = read_fieldbook(demo_fieldbook_path())\n"
        "write_pdf(build_report(analyze(book, DEMO_SETTINGS), book), sys.argv[1])\n")
    done = subprocess.run([sys.executable, "-c", script, str(target)], env=env,
                          capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    assert target.read_bytes().startswith(b"%PDF")
