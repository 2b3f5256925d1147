"""The printed field book of a layout (desktop/layout_pdf.py): PDF files of invented layouts.

The layouts come from trialdesk.core.layouts (whose own tests check the designs); here the point
is that the field book prints every plot where the layout puts it, readable as text: the map's
cells in their field rows and columns, each entry code under its plot number, the seed, and an
alpha design's efficiency factor and bound. The text is read back with poppler's ``pdftotext``
and the pages with ``pdfinfo`` (Debian package poppler-utils); page 1 of each is saved as a
picture under tests/output/screenshots/ with ``pdftoppm``.
"""

from __future__ import annotations

import html
import re
import shutil
import subprocess
from dataclasses import dataclass
from pathlib import Path

import pytest
from PySide6.QtPrintSupport import QPrinter

from trialdesk.core.errors import TrialInputError
from trialdesk.core.layouts import Layout, make_layout, numbered_entries
from trialdesk.desktop.launcher import main
from trialdesk.desktop.layout_pdf import render_layout, write_layout_pdf

SHOTS = Path(__file__).parents[1] / "output" / "screenshots"
FACTS = {"name": "Harrow Flats PYT 2027", "station": "Harrow Flats Research Farm",
         "season": "2027", "crop": "barley", "plot_length_m": 5, "plot_width_m": 1.2}
TRAITS = ("grain_yield", "plant_height", "heading_date")
A4_PORTRAIT = (595.276, 841.89)  # points (ISO 216: 210 x 297 mm)
# Qt writes the page's box in whole points (595 x 842 for A4); half a point is far below the
# difference between any two paper sizes.
SIZE_ATOL = 0.5


def poppler(tool: str, *args: str) -> str:
    """The output of one poppler-utils command; the test is skipped when it is not installed."""
    if shutil.which(tool) is None:
        pytest.skip(f"{tool} (poppler-utils) is not installed: the PDF cannot be read back")
    return subprocess.run([tool, *args], check=True, capture_output=True, text=True).stdout


def pdf_text(path: Path, page: int | None = None) -> str:
    pages = ["-f", str(page), "-l", str(page)] if page else []
    return poppler("pdftotext", "-layout", *pages, str(path), "-")


def flowing(text: str) -> str:
    return " ".join(text.split())


def page_sizes(path: Path) -> list[tuple[float, float]]:
    """Each page's width and height in points, as pdfinfo gives them."""
    info = poppler("pdfinfo", "-f", "1", "-l", "9999", str(path))
    return [(float(w), float(h)) for w, h in
            re.findall(r"Page\s+\d+ size:\s+([\d.]+) x ([\d.]+) pts", info)]


def picture(path: Path, name: str, page: int = 1) -> Path:
    """Page ``page`` of the PDF as tests/output/screenshots/<name>.png at 80 dpi."""
    SHOTS.mkdir(parents=True, exist_ok=True)
    poppler("pdftoppm", "-r", "80", "-png", "-f", str(page), "-l", str(page), "-singlefile",
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

    @property
    def centre(self) -> float:
        return (self.left + self.right) / 2


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
    margin = 12.0 / 25.4 * 72.0  # the field book's margins, in points
    for number, (width, words) in enumerate(page_words(path), start=1):
        assert words, number
        # 1 pt: poppler's boxes are the glyphs' advances, which may reach a hair past the ink.
        outside = [w for w in words if w.right > width - margin + 1.0 or w.left < margin - 1.0]
        assert not outside, (number, outside[:5])
        # A word's box is as tall as the face's ascent and descent, 1.16 em in DejaVu Sans (the
        # face embedded here), so 7.54 pt for 6.5 pt type (measured in the report's tests).
        small = [w for w in words if w.bottom - w.top < 7.0]
        assert not small, (number, small[:5])


def assert_map_in_place(layout: Layout, words: list[Word],
                        rows: range | None = None, columns: range | None = None) -> None:
    """Every plot of ``rows`` x ``columns`` (all by default) once on the page, set in a grid:
    one x for each field column, left to right, one y for each field row, top to bottom, and
    its entry code right under its number."""
    rows = rows or range(1, layout.rows + 1)
    columns = columns or range(1, layout.columns + 1)
    shown = [p for p in layout.plots if p.row in rows and p.column in columns]
    by_text: dict[str, list[Word]] = {}
    for word in words:
        by_text.setdefault(word.text, []).append(word)
    x_of: dict[int, list[float]] = {}
    y_of: dict[int, list[float]] = {}
    for plot in shown:
        [number] = by_text[plot.plot]
        # 1 pt across, 4 pt down: the entry code is centred right under the plot number.
        below = [w for w in by_text.get(plot.entry, [])
                 if abs(w.centre - number.centre) < 1.0 and -1.0 < w.top - number.bottom < 4.0]
        assert len(below) == 1, (plot, below)
        x_of.setdefault(plot.column, []).append(number.centre)
        y_of.setdefault(plot.row, []).append(number.top)
    # 1 pt: the numbers are centred in their cells; their advances differ by fractions of a pt.
    for positions in (*x_of.values(), *y_of.values()):
        assert max(positions) - min(positions) < 1.0, positions
    xs = [x_of[c][0] for c in sorted(x_of)]
    ys = [y_of[r][0] for r in sorted(y_of)]
    assert xs == sorted(xs) and len(set(xs)) == len(xs)
    assert ys == sorted(ys) and len(set(ys)) == len(ys)


def assert_every_plot_and_entry(layout: Layout, text: str) -> None:
    words = set(text.split())
    assert {p.plot for p in layout.plots} <= words
    assert set(layout.entries) <= words


@pytest.fixture
def rcbd() -> Layout:
    return make_layout(numbered_entries(25), checks=("E001", "E002"), design="rcbd", reps=4,
                       rows=10, columns=10, serpentine=True, seed=20270311)


@pytest.fixture
def alpha() -> Layout:
    return make_layout(numbered_entries(60), checks=("E001", "E002", "E003"), design="alpha",
                       reps=3, block_size=6, rows=12, columns=15, seed=4417)


def test_rcbd_field_map(rcbd, tmp_path, qapp):
    path = write_layout_pdf(rcbd, tmp_path / "rcbd.pdf", facts=FACTS, traits=TRAITS)
    picture(path, "layout-fieldmap")
    text = pdf_text(path)
    assert_every_plot_and_entry(rcbd, text)
    first = pdf_text(path, 1)
    assert_every_plot_and_entry(rcbd, first)  # the map on page 1 holds every plot
    assert "Field map: 10 rows x 10 columns" in first
    assert "Field book" in first and FACTS["name"] in first and FACTS["station"] in first
    assert re.search(r"\bSeed\s+20270311\. Same seed, same layout", flowing(first))
    assert "serpentine" in flowing(first)
    _, words = page_words(path)[0]
    assert_map_in_place(rcbd, words)
    # The plot list: each plot on a line of its own with its replicate, row, column and entry.
    for plot in rcbd.plots:
        line = re.search(rf"^\s*{plot.plot}\s+(\d+)\s+(\d+)\s+(\d+)\s+(\S+)\s*$", text, re.M)
        assert line is not None, plot
        assert line.groups() == (str(plot.rep), str(plot.row), str(plot.column), plot.entry)
    heading = [line.split() for line in text.splitlines() if "grain_yield" in line]
    assert heading and all(h == ["Plot", "Rep", "Row", "Column", "Entry", *TRAITS, "Notes"]
                           for h in heading)
    pages = page_sizes(path)
    assert len(heading) == len(pages) - 1  # the heading repeated on every page of the list
    for number in range(1, len(pages) + 1):
        assert f"Page {number} of {len(pages)}" in pdf_text(path, number)
    assert_within_the_margins_and_readable(path)


def test_alpha_field_map(alpha, tmp_path, qapp):
    path = write_layout_pdf(alpha, tmp_path / "alpha.pdf", facts=FACTS, traits=("grain_yield",))
    picture(path, "layout-fieldmap-alpha")
    first = flowing(pdf_text(path, 1))
    assert_every_plot_and_entry(alpha, pdf_text(path, 1))
    efficiency = alpha.efficiency
    assert (f"Efficiency factor {efficiency.factor:.4f}; the upper bound for this size is "
            f"{efficiency.upper_bound:.4f}") in first
    assert "Alpha design (resolvable incomplete blocks)" in first
    assert "6 plots each, 10 in each replicate" in first
    assert "Incomplete block" in first  # the key to the thin lines
    assert re.search(r"\bSeed\s+4417\. Same seed, same layout", first)
    _, words = page_words(path)[0]
    assert_map_in_place(alpha, words)
    # Each piece of each incomplete block is named in the map: a piece starts at each plot
    # whose left and upper neighbours lie in other blocks.
    block = {(p.row, p.column): (p.rep, p.incomplete_block) for p in alpha.plots}
    starts = sorted(f"B{b}" for (r, c), (rep, b) in block.items()
                    if block.get((r, c - 1)) != (rep, b) and block.get((r - 1, c)) != (rep, b))
    assert sorted(w.text for w in words if re.fullmatch(r"B\d+", w.text)) == starts
    assert {f"B{b}" for b in range(1, 11)} <= set(starts)
    text = pdf_text(path)
    for plot in alpha.plots:  # the list gives the incomplete block
        line = re.search(rf"^\s*{plot.plot}\s+(\d+)\s+(\d+)\s+(\d+)\s+(\d+)\s+(\S+)\s*$",
                         text, re.M)
        assert line is not None, plot
        assert line.groups() == (str(plot.rep), str(plot.incomplete_block), str(plot.row),
                                 str(plot.column), plot.entry)
    assert all(size == pytest.approx(A4_PORTRAIT, abs=SIZE_ATOL) for size in page_sizes(path))
    assert_within_the_margins_and_readable(path)


def test_crd_without_positions_has_only_the_list(tmp_path, qapp):
    layout = make_layout(numbered_entries(12), checks=("E001",), design="crd", reps=4, seed=99)
    path = write_layout_pdf(layout, tmp_path / "crd.pdf")
    picture(path, "layout-list-crd")
    text = pdf_text(path)
    assert "Field positions not given" in text
    assert "Field map" not in text
    assert "Trial layout" in text  # the title when no facts are given
    assert_every_plot_and_entry(layout, text)
    for plot in layout.plots:
        assert re.search(rf"^\s*{plot.plot}\s+{plot.entry}\s*$", text, re.M), plot
    assert "Plots per entry 4" in flowing(text)
    assert re.search(r"\bSeed\s+99\. Same seed", flowing(text))
    assert_within_the_margins_and_readable(path)


def test_a_large_field_is_printed_in_parts(tmp_path, qapp):
    layout = make_layout(numbered_entries(300), design="rcbd", reps=3, rows=45, columns=20,
                         serpentine=True, seed=5)
    path = write_layout_pdf(layout, tmp_path / "large.pdf", traits=("grain_yield",))
    picture(path, "layout-fieldmap-parts")
    pages = page_words(path)
    titles = [re.search(r"part (\d+) of (\d+): rows (\d+)–(\d+), columns (\d+)–(\d+)",
                        flowing(pdf_text(path, n))) for n in range(1, len(pages) + 1)]
    parts = [t for t in titles if t]
    assert len(parts) >= 2
    assert [int(t.group(1)) for t in parts] == list(range(1, len(parts) + 1))
    covered = set()
    for number, found in enumerate(titles, start=1):
        if found:
            r0, r1, c0, c1 = (int(found.group(k)) for k in range(3, 7))
            assert_map_in_place(layout, pages[number - 1][1], range(r0, r1 + 1),
                                range(c0, c1 + 1))
            covered |= {(r, c) for r in range(r0, r1 + 1) for c in range(c0, c1 + 1)}
    assert covered == {(r, c) for r in range(1, 46) for c in range(1, 21)}
    # The list turns back to portrait after the map.
    sizes = page_sizes(path)
    assert sizes[len(parts):] == [pytest.approx(A4_PORTRAIT, abs=SIZE_ATOL)] * (
        len(sizes) - len(parts))
    assert_within_the_margins_and_readable(path)


def test_the_layout_command_prints_the_field_book(rcbd, tmp_path, qapp, capsys):
    path = tmp_path / "letter.pdf"
    status = main(["layout", "--entries", "25", "--checks", "E001", "E002", "--design", "rcbd",
                   "--reps", "4", "--rows", "10", "--columns", "10", "--serpentine",
                   "--seed", "20270311", "-o", str(tmp_path / "cli.trial"), "--pdf", str(path),
                   "--paper", "Letter"])
    assert status == 0
    # US Letter is 8.5 x 11 in = 612 x 792 pt.
    assert all(size == pytest.approx((612.0, 792.0), abs=SIZE_ATOL)
               for size in page_sizes(path))
    first = pdf_text(path, 1)
    assert_every_plot_and_entry(rcbd, first)  # the same seed: the same layout as make_layout's
    assert_map_in_place(rcbd, page_words(path)[0][1])
    assert "Seed 20270311." in flowing(first)


def test_printer_gets_the_same_drawing(rcbd, tmp_path, qapp):
    printer = QPrinter(QPrinter.PrinterMode.HighResolution)
    printer.setOutputFormat(QPrinter.OutputFormat.PdfFormat)
    printer.setOutputFileName(str(tmp_path / "printed.pdf"))
    pages = render_layout(rcbd, printer, facts=FACTS)
    assert pages == len(page_sizes(tmp_path / "printed.pdf"))
    assert_every_plot_and_entry(rcbd, pdf_text(tmp_path / "printed.pdf", 1))


def test_unwritable_paths_are_refused_naming_the_file(rcbd, tmp_path, qapp):
    missing = tmp_path / "no such folder" / "book.pdf"
    with pytest.raises(TrialInputError) as error:
        write_layout_pdf(rcbd, missing)
    assert error.value.file == str(missing)
    with pytest.raises(TrialInputError, match="folder"):
        write_layout_pdf(rcbd, tmp_path)
    with pytest.raises(TrialInputError, match="paper size"):
        write_layout_pdf(rcbd, tmp_path / "book.pdf", paper="A3")


def test_a_read_only_folder_is_refused(rcbd, tmp_path, qapp):
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o500)
    try:
        if _writable(locked):
            pytest.skip("this user can write into a read-only folder (running as root)")
        with pytest.raises(TrialInputError) as error:
            write_layout_pdf(rcbd, locked / "book.pdf")
        assert error.value.file == str(locked / "book.pdf")
    finally:
        locked.chmod(0o700)
    assert not list(tmp_path.rglob("*.part"))  # no temporary file left behind


def test_an_existing_file_is_replaced_whole(rcbd, tmp_path, qapp):
    path = tmp_path / "book.pdf"
    path.write_bytes(b"an older field book")
    write_layout_pdf(rcbd, path)
    assert path.read_bytes().startswith(b"%PDF-")
    assert not list(tmp_path.glob("*.part")) and not list(tmp_path.glob(".*.part"))


def _writable(folder: Path) -> bool:
    probe = folder / "probe"
    try:
        probe.write_bytes(b"")
    except OSError:
        return False
    probe.unlink()
    return True
