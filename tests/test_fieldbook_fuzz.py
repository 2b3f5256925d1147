"""A large, varied fuzz of both field-book readers: any file gives a FieldBook or a TrialInputError.

More than a thousand field books a run, from plausible to hopeless: long and wide layouts and
chaos, cells of every kind (numbers in both decimal conventions, missing markers, labels, text in
any script, quotes, separators and line breaks inside cells, control characters, very long
texts), ragged and blank rows, every separator, quoting style, line ending and encoding, then cut
short, spliced, overwritten or duplicated byte by byte; and workbooks with cells of every type,
intact or damaged. Each file is read by the long reader and the wide reader, with options drawn
too, and every book that comes back goes through the design checks and the value checks.

Hypothesis draws the layout and a seed; the seed drives every other choice (cells, renderer,
encoding, damage, read options) with set shares, so a failure is reproduced from the example
Hypothesis prints, and the mix of files stays as intended instead of leaning to Hypothesis'
favourite boundary values. The counts of files
read, books returned and files refused are checked at the end of each test, so a generator that
stopped producing readable books (or broken ones) would fail.
"""

from __future__ import annotations

import csv
import datetime as dt
import hashlib
import io
import random
import zipfile
from collections import Counter
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from openpyxl.cell.cell import ILLEGAL_CHARACTERS_RE

from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import FieldBook, check_design, read_fieldbook
from trialdesk.core.value_checks import Problem, check_plots
from trialdesk.core.wide_fieldbook import read_wide_fieldbook

CSV_EXAMPLES = 1_500  # one file each
WORKBOOK_EXAMPLES = 150  # three files each: intact and two damaged copies
FUZZ_SETTINGS = settings(
    deadline=None,
    database=None,  # every run draws afresh
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)

# --- what cells hold ------------------------------------------------------------------------------

NUMBERS = ["4.25", "-0.5", "+.5", "1.", "17", "-0", "1e3", "2.5E-1", "0.000001", "9" * 30,
           "1e400", "-1e400", "4,25", "-0,5", ",75", "1,000.5", "1.000,5", "1 000", "١٢",
           "½", "0x1F", "1_000", "inf", "-Infinity", "nan", "NaN", "1e", "--1", "1..2", "4.2t"]
MISSING = ["", " ", "NA", "na", " NA ", ".", "-", "*", "\t"]
LABELS = ["G1", "G2", "G3", "g1 ", "G 1", "Check A", "check a", "17", "17.0", "I", "II", "III",
          "rep1", "Bélé", "Übel", "日数", "Ертрag", "A–1", "TRUE", "=A1", "+G1", "-G1"]
JUNK = ["N/A", "n.a.", "NULL", "#N/A", '"', '""', '"a,b"', "a\"b", "x\ny", "x\r\ny", "\r", ",",
        ";", "|", "\t", "\x00", "\x0c", "\x1a", "\ufeff", "\u2028", "\x85", "\u00a0", "\ud7ff",
        "x" * 300, "é" * 50, "=1/0", "'4.2", "\\", "\\N"]
CELL_KINDS = ["number", "number", "number", "missing", "label", "junk", "random"]

LONG_ROLES = {
    "entry": ["entry", "Variety", "Genotype", "line", "treatment", "Entry code", " ENTRY "],
    "block": ["rep", "block", "Replicate", "Rep", "replication"],
    "plot": ["plot", "Plot No", "plot_number"],
    "row": ["row", "Row"],
    "column": ["col", "column", "Range"],
}
TRAIT_NAMES = ["yield", "height", "Ertrag (t/ha)", "moisture", "plant height", "class", "note",
               "1000-grain weight", "lodging", "日数"]
WIDE_REPLICATES = [["rep1", "rep2", "rep3"], ["I", "II", "III", "IV"], ["R1", "R2"],
                   ["Block 1", "Block 2"], ["1", "2", "3"], ["I", "I"], ["II"]]
# How often each is drawn, in percent: mostly files a program would write, then the odd ones.
ENCODINGS = {"utf-8": 40, "utf-8-sig": 10, "cp1252": 10, "latin-1": 10, "utf-16": 10,
             "mac-roman": 5, "shift_jis": 5, "utf-16-le": 5, "utf-32": 5}
DAMAGE = {"none": 60, "cut": 10, "splice": 8, "overwrite": 8, "duplicate": 6, "nul": 4,
          "cut+splice": 4}

COUNTS: Counter[str] = Counter()


def weighted(rng: random.Random, shares: dict[str, int]) -> str:
    return rng.choices(list(shares), weights=list(shares.values()))[0]


def cell_text(rng: random.Random, kind: str) -> str:
    if kind == "number":
        if rng.random() < 0.75:
            return f"{rng.uniform(-5, 300):.{rng.randint(0, 4)}f}"
        return rng.choice(NUMBERS)
    if kind == "missing":
        return rng.choice(MISSING)
    if kind == "label":
        return rng.choice(LABELS)
    if kind == "junk":
        return rng.choice(JUNK)
    ranges = [(32, 126), (0, 0xD7FF), (0xE000, 0x10FFFF), (0, 31)]  # printable ASCII to controls
    return "".join(chr(rng.randint(*rng.choices(ranges, weights=[50, 25, 20, 5])[0]))
                   for _ in range(rng.randint(0, 8)))


def plausible_cell(rng: random.Random, role: str, number: int, junk_share: float) -> str:
    """A cell as a field book would hold it for its column, and now and then anything at all."""
    if rng.random() < junk_share:
        return cell_text(rng, rng.choice(CELL_KINDS))
    if role == "entry":
        return rng.choice(["G1", "G2", "G3", "G4", "g1 ", "Check A", "17"])
    if role == "block":
        return rng.choice(["1", "2", "3", "I", "II"])
    if role == "plot":
        return str(101 + number)
    if role in ("row", "column"):
        return str(rng.randint(1, 4))
    if rng.random() < 0.1:
        return cell_text(rng, "missing")
    return f"{rng.uniform(-1, 300):.{rng.randint(0, 4)}f}"


def long_grid(rng: random.Random, junk_share: float) -> list[list[str]]:
    roles = ["entry"] + rng.sample(["block", "plot", "row", "column"], rng.randint(0, 4))
    traits = rng.sample(TRAIT_NAMES, rng.randint(1, 4))
    if rng.random() < 0.05:
        traits.append(rng.choice(["", "Yield", traits[0], f" {traits[0].upper()} "]))
    names = [rng.choice(LONG_ROLES[role]) for role in roles] + traits
    kinds = roles + ["trait"] * len(traits)
    order = list(range(len(names)))
    rng.shuffle(order)
    header = [names[i] for i in order]
    body = [[plausible_cell(rng, kinds[i], number, junk_share) for i in order]
            for number in range(rng.choice([0, 1, 2, 6, 6, 6, 9, 9, 12, 12]))]
    return [header, *body]


def wide_grid(rng: random.Random, junk_share: float) -> list[list[str]]:
    replicates = list(rng.choice(WIDE_REPLICATES))
    extra = [rng.choice(["note", "plot", ""])] if rng.random() < 0.15 else []
    header = [rng.choice(["entry", "Variety", "Entry", "Genotype", "line"]), *replicates, *extra]
    body = []
    for number in range(rng.choice([0, 1, 3, 5, 5, 8, 8, 8, 10, 10])):
        entry = plausible_cell(rng, "entry", number, junk_share)
        body.append([entry, *(plausible_cell(rng, "trait", number, junk_share)
                              for _ in header[1:])])
    return [header, *body]


def chaos_grid(rng: random.Random) -> list[list[str]]:
    width = rng.randint(0, 7)
    return [[cell_text(rng, rng.choice(CELL_KINDS)) for _ in range(rng.randint(0, width + 1))]
            for _ in range(rng.randint(0, 10))]


def reshape(rng: random.Random, grid: list[list[str]]) -> list[list[str]]:
    """Blank rows, notes above the header, and rows cut short or run long."""
    rows = [list(cells) for cells in grid]
    for _ in range(rng.choice([0, 0, 0, 1, 3])):
        rows.insert(rng.randint(0, len(rows)), [""] * rng.randint(0, 3))
    if rng.random() < 0.05:
        rows.insert(0, [rng.choice(["Trial 2024", "Site: North", "日数"])])
    for cells in rows:
        if rng.random() < 0.03:
            del cells[rng.randint(0, len(cells)):]
        if rng.random() < 0.01:
            cells += [cell_text(rng, rng.choice(CELL_KINDS)) for _ in range(rng.randint(1, 2))]
    return rows


def grid_for(rng: random.Random, layout: str) -> list[list[str]]:
    junk_share = rng.choice([0.0, 0.0, 0.0, 0.01, 0.05, 0.3])
    if layout == "long":
        return reshape(rng, long_grid(rng, junk_share))
    if layout == "wide":
        return reshape(rng, wide_grid(rng, junk_share))
    return chaos_grid(rng)


def damaged(rng: random.Random, data: bytes, damage: str) -> bytes:
    where = rng.randint(0, len(data))
    noise = bytes(rng.randint(0, 255) for _ in range(rng.randint(1, 8)))
    if damage in ("splice", "cut+splice"):
        data = data[:where] + noise + data[where:]
    if damage in ("cut", "cut+splice"):
        data = data[:where]
    if damage == "overwrite" and data:
        flipped = bytearray(data)
        for _ in range(rng.randint(1, 6)):
            flipped[rng.randrange(len(flipped))] = rng.randint(0, 255)
        data = bytes(flipped)
    if damage == "duplicate":
        data = data[:where] + data[where // 2: where] + data[where:]
    if damage == "nul":
        data = data[:where] + b"\x00" + data[where:]
    return data


@st.composite
def broken_csv(draw: st.DrawFn) -> tuple[bytes, str, dict]:
    """The file's bytes, its layout, and the options to read it with."""
    layout = draw(st.sampled_from(["long", "long", "wide", "wide", "chaos"]))
    rng = random.Random(draw(st.integers(0, 2**32 - 1)))
    grid = grid_for(rng, layout)
    delimiter = rng.choice([",", ";", "\t", ",", ";", "|"])
    comma = delimiter != "," and rng.random() < 0.5
    if comma:
        grid = [[cell.replace(".", ",") for cell in cells] for cells in grid]
    style = rng.choice(["minimal", "minimal", "all", "none"])
    ending = rng.choice(["\r\n", "\n", "\r"])
    if style == "none":
        text = ending.join(delimiter.join(cells) for cells in grid)
    else:
        buffer = io.StringIO(newline="")
        quoting = csv.QUOTE_ALL if style == "all" else csv.QUOTE_MINIMAL
        csv.writer(buffer, delimiter=delimiter, lineterminator=ending,
                   quoting=quoting).writerows(grid)
        text = buffer.getvalue()
    if rng.random() < 0.5:
        text = text.rstrip("\r\n")
    encoding = weighted(rng, ENCODINGS)
    data = text.encode(encoding, errors=rng.choice(["replace", "ignore"]))
    options = read_options(rng, comma)
    if rng.random() < 0.95:
        options["sheet"] = None  # a sheet asked of a CSV file is refused at once
    return damaged(rng, data, weighted(rng, DAMAGE)), layout, options


def workbook_cell(rng: random.Random) -> object:
    kind = rng.choice(["text", "text", "float", "int", "none", "bool", "date", "formula"])
    if kind == "text":
        return ILLEGAL_CHARACTERS_RE.sub("?", cell_text(rng, rng.choice(CELL_KINDS)))
    if kind == "float":
        return rng.choice([rng.uniform(-5, 300), -0.0, 1e308, 5e-324, 4.25, 1.0])
    if kind == "int":
        return rng.choice([rng.randint(-10, 300), 10**20, -(10**15), 0])
    if kind == "bool":
        return rng.random() < 0.5
    if kind == "date":
        return rng.choice([dt.datetime(2024, 4, 2, 13, 30), dt.date(2024, 4, 1), dt.time(6, 0)])
    if kind == "formula":
        return rng.choice(["=1/0", "=A1", "=SUM(B2:B3)", "=B2*2", '="x"'])
    return None


def typed(rng: random.Random, text: str, junk_share: float) -> object:
    """A field book's text cell as a spreadsheet would type it, or now and then anything."""
    if rng.random() < junk_share:
        return workbook_cell(rng)
    try:
        number = float(text)
    except ValueError:
        return ILLEGAL_CHARACTERS_RE.sub("?", text) or None
    return int(number) if number.is_integer() and rng.random() < 0.5 else number


@st.composite
def broken_workbook(draw: st.DrawFn) -> tuple[list[bytes], str, dict]:
    """The workbook's bytes and two damaged copies, its layout, and the options to read it with."""
    layout = draw(st.sampled_from(["long", "wide", "chaos"]))
    rng = random.Random(draw(st.integers(0, 2**32 - 1)))
    junk_share = rng.choice([0.0, 0.0, 0.02, 0.2])
    grid = [[typed(rng, cell, junk_share) for cell in cells] for cells in grid_for(rng, layout)]
    book = openpyxl.Workbook()
    sheet = book.active
    sheet.title = rng.choice(["Plots", "Sheet1", "Yield 2024"])
    start = rng.choice([1, 1, 3])
    for r, cells in enumerate(grid, start=start):
        for c, value in enumerate(cells, start=1):
            sheet.cell(row=r, column=c, value=value)
    if rng.random() < 0.5:
        book.create_sheet("Notes").append(["nothing to see"])
    buffer = io.BytesIO()
    book.save(buffer)
    whole = buffer.getvalue()
    copies = [damaged(rng, whole, damage)
              for damage in rng.sample(["cut", "splice", "overwrite", "duplicate"], 2)]
    return [whole, *copies], layout, read_options(rng, comma=False)


# --- reading --------------------------------------------------------------------------------------


def check_book(book: FieldBook, data: bytes, reader: str) -> None:
    plots, values = book.plots, book.values
    assert values.index.equals(plots.index)
    assert book.traits == tuple(values.columns) and book.traits
    assert all(dtype == np.float64 for dtype in values.dtypes)
    assert all(isinstance(e, str) and e and e == e.strip() for e in plots["entry"])
    assert plots["source_row"].dtype == np.int64 and (plots["source_row"] >= 1).all()
    assert plots["plot"].is_unique
    blocks = plots["block"].tolist()
    assert all(b is None for b in blocks) or all(isinstance(b, str) and b for b in blocks)
    assert book.sha256 == hashlib.sha256(data).hexdigest()
    if reader == "wide":
        replicates = plots["block"].nunique()
        assert len(plots) == replicates * plots["source_row"].nunique()
    for design in ("rcbd", "crd"):
        try:
            check_design(book, design=design, traits=book.traits, checks=["G1"])
        except TrialInputError as error:
            assert error.message and error.file == book.source
    found = check_plots(plots, values, pd.DataFrame({"name": list(book.traits)}),
                        design="rcbd" if book.roles["block"] else "crd")
    assert all(isinstance(p, Problem) and p.severity in ("error", "warning") for p in found)


def read_both(path: Path, data: bytes, kind: str, options: dict) -> None:
    """Read the file with both readers; count what came back."""
    path.write_bytes(data)
    COUNTS[f"{kind} files"] += 1
    readers = {
        "long": lambda: read_fieldbook(path, decimal_comma=options["decimal_comma"],
                                       traits=options["traits"], sheet=options["sheet"]),
        "wide": lambda: read_wide_fieldbook(path, trait=options["trait"],
                                            entry=options["entry"], sheet=options["sheet"],
                                            decimal_comma=options["decimal_comma"]),
    }
    for reader, read in readers.items():
        try:
            book = read()
        except TrialInputError as error:
            assert str(error) and error.file in (None, str(path))
            COUNTS[f"{kind} {reader} refused"] += 1
            continue
        check_book(book, data, reader)
        COUNTS[f"{kind} {reader} books"] += 1


def read_options(rng: random.Random, comma: bool) -> dict:
    """Mostly the defaults, which read most files; now and then names that may not be there."""
    return {
        # The file's own decimal convention four times in five.
        "decimal_comma": comma if rng.random() < 0.8 else not comma,
        "traits": None if rng.random() < 0.8 else rng.choice(
            [["yield"], ["Yield", "height"], ["entry"], []]),
        "trait": rng.choice(["yield", "grain yield", "Ertrag"]),
        "entry": None if rng.random() < 0.8 else rng.choice(["entry", "Variety", "x"]),
        "sheet": None if rng.random() < 0.8 else rng.choice(["Plots", "Notes", "plots"]),
    }


def test_a_thousand_broken_csv_files(tmp_path: Path) -> None:
    before = COUNTS.copy()

    @settings(FUZZ_SETTINGS, max_examples=CSV_EXAMPLES)
    @given(case=broken_csv(),
           name=st.sampled_from(["trial.csv", "trial.txt", "trial.xlsx", "TRIAL.CSV"]))
    def read_one(case: tuple[bytes, str, dict], name: str) -> None:
        data, layout, options = case
        COUNTS[f"csv {layout} layout"] += 1
        read_both(tmp_path / name, data, "csv", options)

    read_one()
    counts = COUNTS - before
    assert counts["csv files"] >= 1_000, counts
    for reader in ("long", "wide"):
        # Both readers see readable books and refuse broken ones, in good numbers (about 90
        # books of each are expected).
        assert counts[f"csv {reader} books"] >= 50, counts
        assert counts[f"csv {reader} refused"] >= 50, counts
    assert all(counts[f"csv {layout} layout"] >= 50 for layout in ("long", "wide", "chaos"))


def test_broken_workbooks(tmp_path: Path) -> None:
    before = COUNTS.copy()

    @settings(FUZZ_SETTINGS, max_examples=WORKBOOK_EXAMPLES)
    @given(case=broken_workbook())
    def read_one(case: tuple[list[bytes], str, dict]) -> None:
        files, layout, options = case
        COUNTS[f"xlsx {layout} layout"] += 1
        for data in files:
            read_both(tmp_path / "trial.xlsx", data, "xlsx", options)

    read_one()
    counts = COUNTS - before
    assert counts["xlsx files"] >= 3 * 100, counts
    # About 25 books of each reader are expected; 5 leaves room for chance.
    assert counts["xlsx long books"] >= 5 and counts["xlsx wide books"] >= 5, counts
    assert counts["xlsx long refused"] >= 100 and counts["xlsx wide refused"] >= 100, counts
    assert all(counts[f"xlsx {layout} layout"] >= 10 for layout in ("long", "wide", "chaos"))


def test_zip_version_the_reader_cannot_open(tmp_path: Path) -> None:
    # Found by the fuzz above: a central-directory entry asking for a zip version past what
    # Python's zipfile reads (here 12.5) made it raise NotImplementedError.
    book = openpyxl.Workbook()
    book.active.append(["entry", "yield"])
    buffer = io.BytesIO()
    book.save(buffer)
    data = bytearray(buffer.getvalue())
    entry = data.index(b"PK\x01\x02")  # first central-directory entry
    data[entry + 6: entry + 8] = (125).to_bytes(2, "little")  # version needed to extract
    path = tmp_path / "version.xlsx"
    path.write_bytes(bytes(data))
    for read in (read_fieldbook, lambda p: read_wide_fieldbook(p, trait="yield")):
        try:
            read(path)
        except TrialInputError as error:
            assert str(error) == (f"{path}: the workbook is damaged: it cannot be opened as a "
                                  "zip archive (zip file version 12.5)")
        else:
            raise AssertionError("a workbook zipfile cannot open was read")


def test_damaged_workbook_parts(tmp_path: Path) -> None:
    # Not random: each part of a small workbook removed in turn, or replaced by junk.
    book = openpyxl.Workbook()
    for cells in [["entry", "rep", "yield"], ["G1", 1, 4.2], ["G2", 1, 3.9], ["G1", 2, 4.4],
                  ["G2", 2, 4.0]]:
        book.active.append(cells)
    buffer = io.BytesIO()
    book.save(buffer)
    with zipfile.ZipFile(io.BytesIO(buffer.getvalue())) as archive:
        parts = {info.filename: archive.read(info) for info in archive.infolist()}
    options = {"decimal_comma": False, "traits": None, "trait": "yield", "entry": None,
               "sheet": None}
    for name in parts:
        for change in (None, b"<junk/>", b"\xff\xfe"):
            out = io.BytesIO()
            with zipfile.ZipFile(out, "w") as archive:
                for other, content in parts.items():
                    if other != name:
                        archive.writestr(other, content)
                    elif change is not None:
                        archive.writestr(other, change)
            read_both(tmp_path / "parts.xlsx", out.getvalue(), "part", options)
    assert COUNTS["part files"] >= 3 * len(parts)
