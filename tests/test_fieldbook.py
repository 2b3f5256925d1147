"""Tests of the field-book reader and the design checks run before an analysis."""

from __future__ import annotations

import csv
import datetime as dt
import hashlib
import io
import os
import zipfile
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from openpyxl.chart import BarChart, Reference

from trialdesk.core.errors import InputWarning, TrialInputError
from trialdesk.core.fieldbook import FieldBook, check_design, read_fieldbook

DATA = Path(__file__).parent / "data" / "fieldbooks"

# A small invented RCBD field book: 3 entries in 2 blocks.
ROWS = [
    ["entry", "block", "plot", "yield", "height"],
    ["G1", "1", "101", "4.2", "95"],
    ["G2", "1", "102", "3.9", "101"],
    ["G3", "1", "103", "4.5", "99"],
    ["G1", "2", "201", "4.4", "97"],
    ["G2", "2", "202", "NA", "100"],
    ["G3", "2", "203", "4.7", "98"],
]


def write_csv(folder: Path, rows: list[list[str]], *, name: str = "trial.csv",
              delimiter: str = ",", encoding: str = "utf-8") -> Path:
    buffer = io.StringIO(newline="")
    csv.writer(buffer, delimiter=delimiter, lineterminator="\r\n").writerows(rows)
    path = folder / name
    path.write_bytes(buffer.getvalue().encode(encoding))
    return path


def write_text(folder: Path, text: str, *, name: str = "trial.csv",
               encoding: str = "utf-8") -> Path:
    path = folder / name
    path.write_bytes(text.encode(encoding))
    return path


def write_xlsx(folder: Path, sheets: dict[str, list[list[object]]], *,
               name: str = "trial.xlsx", first_row: int = 1) -> Path:
    book = openpyxl.Workbook()
    book.remove(book.active)
    for title, rows in sheets.items():
        sheet = book.create_sheet(title)
        for r, cells in enumerate(rows, start=first_row):
            for c, value in enumerate(cells, start=1):
                sheet.cell(row=r, column=c, value=value)
    path = folder / name
    book.save(path)
    return path


def raised(call, *args, **kwargs) -> str:
    """The message of the TrialInputError that the call raises."""
    with pytest.raises(TrialInputError) as info:
        call(*args, **kwargs)
    return str(info.value)


# --- CSV: separators, encodings, numbers ---------------------------------------------------------


@pytest.mark.parametrize("delimiter", [",", ";", "\t"], ids=["comma", "semicolon", "tab"])
def test_every_separator_gives_the_same_book(tmp_path: Path, delimiter: str) -> None:
    book = read_fieldbook(write_csv(tmp_path, ROWS, delimiter=delimiter))
    assert book.traits == ("yield", "height")
    assert book.roles == {"entry": "entry", "block": "block", "plot": "plot", "row": None,
                          "column": None}
    assert book.plots["entry"].tolist() == ["G1", "G2", "G3", "G1", "G2", "G3"]
    assert book.plots["block"].tolist() == ["1", "1", "1", "2", "2", "2"]
    assert book.plots["plot"].tolist() == ["101", "102", "103", "201", "202", "203"]
    assert book.plots["source_row"].tolist() == [2, 3, 4, 5, 6, 7]
    assert_allclose(book.values["yield"], [4.2, 3.9, 4.5, 4.4, np.nan, 4.7], rtol=0)  # exact
    assert book.values.dtypes.tolist() == [np.float64, np.float64]
    assert book.values.index.equals(book.plots.index)
    assert book.sheet is None
    assert book.warnings == ()


def test_result_is_a_frozen_record_of_the_file(tmp_path: Path) -> None:
    path = write_csv(tmp_path, ROWS)
    book = read_fieldbook(str(path))
    assert isinstance(book, FieldBook)
    assert book.source == str(path)
    assert book.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert book.plots["row"].dtype == "Int64" and book.plots["column"].dtype == "Int64"
    assert book.plots["row"].isna().all()
    with pytest.raises(AttributeError):
        book.traits = ()  # type: ignore[misc]


@pytest.mark.parametrize(
    "encoding", ["utf-8", "utf-8-sig", "latin-1", "cp1252", "utf-16"],
    ids=["UTF-8", "UTF-8 with BOM", "Latin-1", "Windows-1252", "UTF-16 with BOM"],
)
def test_encodings(tmp_path: Path, encoding: str) -> None:
    rows = [["Sorte", "Wdh", "rendement é"], ["Bélé", "I", "3.5"], ["Übel", "I", "4"],
            ["Bélé", "II", "3.7"], ["Übel", "II", "4.1"]]
    book = read_fieldbook(write_csv(tmp_path, rows, encoding=encoding),
                          entry="Sorte", block="Wdh")
    assert book.traits == ("rendement é",)  # the byte-order mark is not part of the first name
    assert book.roles["entry"] == "Sorte"
    assert book.plots["entry"].tolist() == ["Bélé", "Übel", "Bélé", "Übel"]
    assert book.plots["block"].tolist() == ["I", "I", "II", "II"]
    assert_allclose(book.values["rendement é"], [3.5, 4.0, 3.7, 4.1], rtol=0)  # exact


def test_windows_1252_characters_outside_latin_1(tmp_path: Path) -> None:
    path = write_text(tmp_path, "entry,note,yield\nA–1,x,1\nB,y,2\n", encoding="cp1252")
    assert read_fieldbook(path).plots["entry"].tolist() == ["A–1", "B"]  # en dash, byte 0x96


def test_decimal_comma_when_asked(tmp_path: Path) -> None:
    path = write_text(tmp_path, "entry;rep;yield\nA;1;4,25\nB;1;-0,5\nA;2;,75\nB;2;3\n")
    book = read_fieldbook(path, decimal_comma=True)
    assert_allclose(book.values["yield"], [4.25, -0.5, 0.75, 3.0], rtol=0)  # exact


def test_decimal_comma_refused_unless_asked(tmp_path: Path) -> None:
    path = write_text(tmp_path, "entry;rep;yield\nA;1;4.5\nB;1;4,25\n")
    message = raised(read_fieldbook, path)
    assert message.startswith(f"{path}, row 3, column 'yield': '4,25'")
    assert "decimal_comma=True" in message


def test_decimal_point_refused_with_decimal_comma(tmp_path: Path) -> None:
    path = write_text(tmp_path, "entry;rep;yield\nA;1;4,5\nB;1;4.250\n")
    message = raised(read_fieldbook, path, decimal_comma=True)
    assert message.startswith(f"{path}, row 3, column 'yield': '4.250' has a decimal point")


@pytest.mark.parametrize("marker", ["", "NA", "na", ".", "-", "*", "   ", " NA "])
def test_missing_markers(tmp_path: Path, marker: str) -> None:
    path = write_csv(tmp_path, [["entry", "yield"], ["A", "1.5"], ["B", marker], ["C", "2"]])
    assert_allclose(read_fieldbook(path).values["yield"], [1.5, np.nan, 2.0], rtol=0)  # exact


def test_a_column_of_only_missing_values_is_no_trait_unless_named(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "yield", "lodging"], ["A", "1", "NA"], ["B", "2", ""]])
    assert read_fieldbook(path).traits == ("yield",)
    named = read_fieldbook(path, traits=["lodging", "yield"])
    assert named.traits == ("yield", "lodging")  # file order, not the order asked for
    assert named.values["lodging"].isna().all()


def test_text_columns_are_not_traits(tmp_path: Path) -> None:
    rows = [["entry", "note", "yield"], ["A", "lodged", "1"], ["B", "", "2"], ["C", "ok", "3"]]
    assert read_fieldbook(write_csv(tmp_path, rows)).traits == ("yield",)


@pytest.mark.parametrize(
    "names",
    [["yield", "class", "lambda"], ["Ertrag (t/ha)", "plant height", "rendement é"],
     [" Yield ", "1000-grain weight", "日数"]],
    ids=["python keywords", "spaces and accents", "surrounding spaces, digits, CJK"],
)
def test_any_column_name_is_a_trait(tmp_path: Path, names: list[str]) -> None:
    rows = [["entry", *names], ["A", "1", "2", "3"], ["B", "4", "5", "6"]]
    expected = tuple(name.strip() for name in names)
    book = read_fieldbook(write_csv(tmp_path, rows))
    assert book.traits == expected
    assert book.values[expected[0]].tolist() == [1.0, 4.0]
    assert read_fieldbook(write_csv(tmp_path, rows), traits=[expected[2]]).traits == expected[2:]


def test_blank_lines_count_as_spreadsheet_rows(tmp_path: Path) -> None:
    path = write_text(tmp_path, "entry,yield\nA,1\n\nB,2\n,\nC,3\n")
    assert read_fieldbook(path).plots["source_row"].tolist() == [2, 4, 6]


def test_multiline_quoted_cell_is_one_row(tmp_path: Path) -> None:
    path = write_text(tmp_path, 'entry,note,yield\nA,"two\nlines",1\nB,x,oops\n')
    assert raised(read_fieldbook, path).startswith(f"{path}, row 3, column 'yield': 'oops'")


def test_short_rows_are_padded_and_trailing_separators_ignored(tmp_path: Path) -> None:
    path = write_text(tmp_path, "entry,yield,height,\nA,1,,\nB,2\n")
    book = read_fieldbook(path)
    assert book.traits == ("yield",)
    assert book.values["yield"].tolist() == [1.0, 2.0]


# --- roles ---------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("header", "roles"),
    [
        (["Entry", "Block", "Plot", "Row", "Column"],
         {"entry": "Entry", "block": "Block", "plot": "Plot", "row": "Row", "column": "Column"}),
        ([" VARIETY ", "Rep", "Plot No", "row", "Col"],
         {"entry": "VARIETY", "block": "Rep", "plot": "Plot No", "row": "row", "column": "Col"}),
        (["Genotype", "Replicate", "plot_number", "ROW", "Range"],
         {"entry": "Genotype", "block": "Replicate", "plot": "plot_number", "row": "ROW",
          "column": "Range"}),
        (["cultivar", "replication", "Plot number", "Row", "column"],
         {"entry": "cultivar", "block": "replication", "plot": "Plot number", "row": "Row",
          "column": "column"}),
        (["line", "block", "plot", "row", "col"],
         {"entry": "line", "block": "block", "plot": "plot", "row": "row", "column": "col"}),
        (["Entry code", "rep", "plot", "row", "col"],
         {"entry": "Entry code", "block": "rep", "plot": "plot", "row": "row", "column": "col"}),
        (["treatment", "rep", "plot", "row", "col"],
         {"entry": "treatment", "block": "rep", "plot": "plot", "row": "row", "column": "col"}),
    ],
    ids=["title case", "upper case and spaces", "underscore", "lower case", "line", "entry code",
         "treatment"],
)
def test_roles_found_by_usual_names(tmp_path: Path, header: list[str],
                                    roles: dict[str, str]) -> None:
    rows = [[*header, "yield"], ["A", "1", "1", "1", "1", "3.0"], ["B", "1", "2", "1", "2", "4"],
            ["A", "2", "3", "2", "1", "3.5"], ["B", "2", "4", "2", "2", "4.5"]]
    book = read_fieldbook(write_csv(tmp_path, rows))
    assert book.roles == roles
    assert book.traits == ("yield",)
    assert book.plots["row"].tolist() == [1, 1, 2, 2]
    assert book.plots["column"].tolist() == [1, 2, 1, 2]


def test_roles_given_by_the_caller(tmp_path: Path) -> None:
    rows = [["Name", "Wdh", "Parzelle", "Reihe", "Spalte", "yield", "entry"],
            ["A", "I", "7", "1", "1", "3", "9"], ["B", "I", "8", "1", "2", "4", "9"]]
    book = read_fieldbook(write_csv(tmp_path, rows), entry="name", block="Wdh", plot="Parzelle",
                          row="Reihe", column="Spalte")
    assert book.roles == {"entry": "Name", "block": "Wdh", "plot": "Parzelle", "row": "Reihe",
                          "column": "Spalte"}
    # "entry" is a usual name for a role, so it is not taken for a trait.
    assert book.traits == ("yield",)
    assert book.plots["plot"].tolist() == ["7", "8"]


def test_plot_numbers_generated_when_absent(tmp_path: Path) -> None:
    rows = [["entry", "yield"], ["A", "1"], ["B", "2"], ["C", "3"]]
    book = read_fieldbook(write_csv(tmp_path, rows))
    assert book.plots["plot"].tolist() == ["1", "2", "3"]
    assert book.roles["plot"] is None and book.roles["block"] is None
    assert book.plots["block"].tolist() == [None, None, None]


def test_entry_codes_stripped_otherwise_as_typed(tmp_path: Path) -> None:
    rows = [["entry", "rep", "yield"], ["  G-12 ", " II", "1"], ["g 7", "I ", "2"]]
    book = read_fieldbook(write_csv(tmp_path, rows))
    assert book.plots["entry"].tolist() == ["G-12", "g 7"]
    assert book.plots["block"].tolist() == ["II", "I"]


# --- errors --------------------------------------------------------------------------------------


def test_missing_file(tmp_path: Path) -> None:
    path = tmp_path / "nowhere.csv"
    assert raised(read_fieldbook, path) == f"{path}: there is no such file"


def test_folder_is_not_a_file(tmp_path: Path) -> None:
    assert "folder" in raised(read_fieldbook, tmp_path)


@pytest.mark.parametrize("path", [None, 42, ["a.csv"]], ids=["None", "number", "list"])
def test_not_a_path(path: object) -> None:
    assert "is not a file path" in raised(read_fieldbook, path)


@pytest.mark.parametrize(("name", "reason"), [("x" * 300 + ".csv", "name too long"),
                                              ("a\x00b.csv", "null")],
                         ids=["name too long", "null character"])
def test_path_the_system_refuses(tmp_path: Path, name: str, reason: str) -> None:
    message = raised(read_fieldbook, str(tmp_path) + os.sep + name)
    assert "the file cannot be read (" in message and reason in message.lower()


def test_csv_starting_like_a_zip_signature(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["PK", "entry", "yield"], ["1", "A", "2"]])
    assert read_fieldbook(path).traits == ("PK", "yield")


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0, reason="root reads any file")
def test_unreadable_file(tmp_path: Path) -> None:
    path = write_csv(tmp_path, ROWS)
    path.chmod(0)
    assert "permission denied" in raised(read_fieldbook, path)


@pytest.mark.parametrize("content", [b"", b"  \r\n\r\n", b"\xef\xbb\xbf", b",,,\n,,,\n"],
                         ids=["no bytes", "blank lines", "only a byte-order mark", "empty cells"])
def test_empty_file(tmp_path: Path, content: bytes) -> None:
    path = tmp_path / "trial.csv"
    path.write_bytes(content)
    message = raised(read_fieldbook, path)
    assert message.startswith(f"{path}: the file is empty")


def test_header_only(tmp_path: Path) -> None:
    path = write_text(tmp_path, "entry,block,yield\n\n")
    assert raised(read_fieldbook, path) == (
        f"{path}: the file has a header (row 1) but no plot rows"
    )


def test_binary_file_is_neither_csv_nor_xlsx(tmp_path: Path) -> None:
    path = tmp_path / "photo.png"
    path.write_bytes(b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR" + bytes(range(256)))
    assert "neither a CSV text file nor an Excel workbook" in raised(read_fieldbook, path)


def test_old_excel_format(tmp_path: Path) -> None:
    path = tmp_path / "trial.xls"
    path.write_bytes(b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(512))
    assert ".xls" in raised(read_fieldbook, path)


def test_text_named_like_a_workbook(tmp_path: Path) -> None:
    path = write_text(tmp_path, "entry,yield\nA,1\n", name="trial.xlsx")
    assert raised(read_fieldbook, path) == (
        f"{path}: the workbook is damaged: it is not a valid .xlsx file"
    )


def test_named_column_that_does_not_exist(tmp_path: Path) -> None:
    path = write_csv(tmp_path, ROWS)
    message = raised(read_fieldbook, path, block="replicate")
    assert message.startswith(f"{path}, column 'replicate': there is no such column")
    assert "'entry', 'block', 'plot', 'yield', 'height'" in message
    assert "column 'weight'" in raised(read_fieldbook, path, traits=["weight"])


def test_no_entry_column(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["name", "yield"], ["A", "1"]])
    message = raised(read_fieldbook, path)
    assert message.startswith(f"{path}: no entry column found")
    assert "'entry', 'variety', 'genotype', 'line', 'cultivar', 'entry code' or 'treatment'" in (
        message)
    assert "the columns are: 'name', 'yield'" in message


@pytest.mark.parametrize("second", ["yield", "Yield", " yield "])
def test_duplicate_column_names(tmp_path: Path, second: str) -> None:
    path = write_csv(tmp_path, [["entry", "yield", second], ["A", "1", "2"]])
    assert raised(read_fieldbook, path) == (
        f"{path}, column '{second.strip()}': two columns have the same name "
        "(columns 2 (B) and 3 (C)); give each column its own name"
    )


def test_values_in_a_column_without_a_name(tmp_path: Path) -> None:
    path = write_text(tmp_path, "entry,yield\nA,1\nB,4,25\n")
    message = raised(read_fieldbook, path)
    assert message.startswith(f"{path}, row 3: column 3 (C) has a value ('25') but no name")
    assert "decimal comma" in message


@pytest.mark.parametrize("value", ["4.2t", "n.a.", "1e400", "4 .2", "inf", "nan"])
def test_value_that_is_not_a_number(tmp_path: Path, value: str) -> None:
    rows = [["entry", "yield"], ["A", "1"], ["B", "2"], ["C", value]]
    message = raised(read_fieldbook, write_csv(tmp_path, rows))
    assert message.startswith(f"{tmp_path / 'trial.csv'}, row 4, column 'yield': '{value}' is not")


def test_empty_entry_code(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "yield"], ["A", "1"], ["  ", "2"]])
    assert raised(read_fieldbook, path) == (
        f"{path}, row 3, column 'entry': no entry code in this plot row"
    )


def test_empty_block_label(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "rep", "yield"], ["A", "1", "1"], ["B", "NA", "2"]])
    assert raised(read_fieldbook, path).startswith(f"{path}, row 3, column 'rep': no block")


def test_duplicate_plot_numbers(tmp_path: Path) -> None:
    rows = [["entry", "plot", "yield"], ["A", "101", "1"], ["B", "102", "2"], ["C", "101", "3"]]
    path = write_csv(tmp_path, rows)
    assert raised(read_fieldbook, path) == (
        f"{path}, row 4, plot 101, column 'plot': plot number '101' appears twice "
        "(rows 2 and 4); each plot has its own number"
    )


def test_field_position_must_be_whole(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "row", "yield"], ["A", "1", "1"], ["B", "1.5", "2"]])
    assert raised(read_fieldbook, path).startswith(
        f"{path}, row 3, column 'row': '1.5' is not a whole number"
    )


def test_role_column_cannot_be_a_trait(tmp_path: Path) -> None:
    message = raised(read_fieldbook, write_csv(tmp_path, ROWS), traits=["block"])
    assert "column 'block': this column is the block column" in message


def test_one_column_cannot_have_two_roles(tmp_path: Path) -> None:
    message = raised(read_fieldbook, write_csv(tmp_path, ROWS), entry="plot", plot="plot")
    assert "column 'plot': the same column was given as the entry and the plot column" in message


def test_no_trait_column(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "block", "note"], ["A", "1", "x"]])
    assert raised(read_fieldbook, path).startswith(f"{path}: no trait column found")
    assert "no trait was chosen" in raised(read_fieldbook, path, traits=[])


def test_sheet_asked_of_a_csv_file(tmp_path: Path) -> None:
    message = raised(read_fieldbook, write_csv(tmp_path, ROWS), sheet="Plots")
    assert "sheet 'Plots' was asked for, but this is a CSV file" in message


# --- warnings ------------------------------------------------------------------------------------


def warnings_about(book: FieldBook, text: str) -> list[InputWarning]:
    return [w for w in book.warnings if text in w.message]


def test_negative_values_warned(tmp_path: Path) -> None:
    rows = [["entry", "yield"], ["A", "1"], ["B", "-2"], ["C", "3"]]
    book = read_fieldbook(write_csv(tmp_path, rows))
    (warning,) = warnings_about(book, "negative")
    assert str(warning) == (
        f"{tmp_path / 'trial.csv'}, row 3, column 'yield': 1 value negative: -2 (row 3); "
        "check the sign, or whether the trait can be negative"
    )


def test_value_ten_times_the_median_warned(tmp_path: Path) -> None:
    # 42 among values near 4.2: the decimal point slipped (rule of thumb: common practice).
    values = ["4.1", "4.3", "42", "3.9", "4.4", "4.0"]
    rows = [["entry", "yield"], *[[f"G{i}", v] for i, v in enumerate(values)]]
    book = read_fieldbook(write_csv(tmp_path, rows))
    (warning,) = warnings_about(book, "far from the rest")
    assert warning.column == "yield" and warning.row == 4
    assert "42 (row 4)" in warning.message


def test_value_beyond_robust_z_warned(tmp_path: Path) -> None:
    # 130 is less than ten times the median (100) but far beyond a robust z of 6: the median
    # absolute deviation is 1, scaled to about 1.48 (common practice).
    values = ["100", "101", "99", "100", "102", "98", "130"]
    rows = [["entry", "height"], *[[f"G{i}", v] for i, v in enumerate(values)]]
    (warning,) = warnings_about(read_fieldbook(write_csv(tmp_path, rows)), "far from the rest")
    assert warning.row == 8 and "130 (row 8)" in warning.message


def test_ordinary_values_not_warned(tmp_path: Path) -> None:
    rng = np.random.default_rng(7)
    values = [f"{v:.2f}" for v in rng.normal(5.0, 0.5, size=60)]
    rows = [["entry", "yield"], *[[f"G{i}", v] for i, v in enumerate(values)]]
    assert read_fieldbook(write_csv(tmp_path, rows)).warnings == ()


def test_entry_codes_differing_in_case_or_spaces_warned(tmp_path: Path) -> None:
    rows = [["entry", "yield"], ["G-12", "1"], ["H 1", "2"], ["g-12 ", "3"], ["H1", "4"]]
    book = read_fieldbook(write_csv(tmp_path, rows))
    found = warnings_about(book, "differ only in case or spaces")
    where = f"{tmp_path / 'trial.csv'}, row"
    assert [str(w) for w in found] == [
        f"{where} 4, column 'entry': entry codes that differ only in case or spaces ('G-12' "
        + "first in row 2, 'g-12' first in row 4) are treated as different entries; correct "
        + "them if they are one entry",
        f"{where} 5, column 'entry': entry codes that differ only in case or spaces ('H 1' "
        + "first in row 3, 'H1' first in row 5) are treated as different entries; correct them "
        + "if they are one entry",
    ]
    assert book.plots["entry"].nunique() == 4


def test_two_columns_fitting_one_role_warned(tmp_path: Path) -> None:
    rows = [["Variety", "Entry", "Block", "Rep", "yield"], ["Alpha", "1", "1", "1", "3"],
            ["Beta", "2", "1", "1", "4"]]
    book = read_fieldbook(write_csv(tmp_path, rows))
    assert book.roles["entry"] == "Entry" and book.roles["block"] == "Block"
    assert book.traits == ("yield",)  # neither 'Rep' nor 'Variety' is taken for a trait
    (warning,) = warnings_about(book, "as the block column")
    assert str(warning) == (
        f"{tmp_path / 'trial.csv'}, column 'Block': used 'Block' as the block column; 'Rep' "
        "could also be it"
    )


# --- workbooks -----------------------------------------------------------------------------------


def test_workbook_first_sheet(tmp_path: Path) -> None:
    rows = [["Entry", "Rep", "Plot", "Ertrag (t/ha)", "yield"], ["G1", 1, 101, 4.25, None],
            ["G2", 1.0, 102.0, "NA", 3], [17, 2, 201, 3.5, "4,5"]]
    path = write_xlsx(tmp_path, {"Plots": rows, "Notes": [["nothing"]]})
    book = read_fieldbook(path, decimal_comma=True)
    assert book.sheet == "Plots"
    assert book.plots["entry"].tolist() == ["G1", "G2", "17"]
    assert book.plots["block"].tolist() == ["1", "1", "2"]  # 1.0 reads as a spreadsheet shows it
    assert book.plots["plot"].tolist() == ["101", "102", "201"]
    assert book.plots["source_row"].tolist() == [2, 3, 4]
    assert_allclose(book.values["Ertrag (t/ha)"], [4.25, np.nan, 3.5], rtol=0)  # exact
    assert_allclose(book.values["yield"], [np.nan, 3.0, 4.5], rtol=0)  # exact


def test_workbook_named_sheet_and_its_own_row_numbers(tmp_path: Path) -> None:
    sheets = {"Notes": [["written by hand"]],
              "Plots 2024": [["entry", "yield"], ["A", 1], [None, None], ["B", "x"]]}
    path = write_xlsx(tmp_path, sheets, first_row=3)
    message = raised(read_fieldbook, path, sheet="Plots 2024")
    # Header in sheet row 3, so the plots are rows 4, (5 left blank), 6.
    assert message.startswith(f"{path}, row 6, column 'yield': 'x' is not a number")


def test_workbook_wrong_sheet_lists_the_sheets(tmp_path: Path) -> None:
    path = write_xlsx(tmp_path, {"Plots": ROWS, "Site 2": ROWS})
    assert raised(read_fieldbook, path, sheet="plots") == (
        f"{path}: there is no sheet 'plots'; the sheets are: 'Plots', 'Site 2'"
    )


def _minimal_workbook(sheet_xml: str) -> bytes:
    """An .xlsx package written part by part, so that cells can carry a stored formula result.

    openpyxl writes formulas without their results (it does not compute them), so a workbook
    whose formula cells hold a cached value, as a spreadsheet program saves them, is built from
    its XML here.
    """
    main = "http://schemas.openxmlformats.org/spreadsheetml/2006/main"
    rel = "http://schemas.openxmlformats.org/officeDocument/2006/relationships"
    package = "http://schemas.openxmlformats.org/package/2006/relationships"
    parts = {
        "[Content_Types].xml": (
            '<?xml version="1.0" encoding="UTF-8"?>'
            '<Types xmlns="http://schemas.openxmlformats.org/package/2006/content-types">'
            '<Default Extension="rels" '
            'ContentType="application/vnd.openxmlformats-package.relationships+xml"/>'
            '<Default Extension="xml" ContentType="application/xml"/>'
            '<Override PartName="/xl/workbook.xml" ContentType="application/'
            'vnd.openxmlformats-officedocument.spreadsheetml.sheet.main+xml"/>'
            '<Override PartName="/xl/worksheets/sheet1.xml" ContentType="application/'
            'vnd.openxmlformats-officedocument.spreadsheetml.worksheet+xml"/></Types>'
        ),
        "_rels/.rels": (
            f'<Relationships xmlns="{package}"><Relationship Id="rId1" '
            f'Type="{rel}/officeDocument" Target="xl/workbook.xml"/></Relationships>'
        ),
        "xl/workbook.xml": (
            f'<workbook xmlns="{main}" xmlns:r="{rel}"><sheets>'
            '<sheet name="Plots" sheetId="1" r:id="rId1"/></sheets></workbook>'
        ),
        "xl/_rels/workbook.xml.rels": (
            f'<Relationships xmlns="{package}"><Relationship Id="rId1" '
            f'Type="{rel}/worksheet" Target="worksheets/sheet1.xml"/></Relationships>'
        ),
        "xl/worksheets/sheet1.xml": sheet_xml.replace("MAIN", main),
    }
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as archive:
        for name, text in parts.items():
            archive.writestr(name, text)
    return buffer.getvalue()


def _text_cell(ref: str, text: str) -> str:
    return f'<c r="{ref}" t="inlineStr"><is><t>{text}</t></is></c>'


FORMULA_SHEET = (
    '<worksheet xmlns="MAIN"><sheetData>'
    f'<row r="1">{_text_cell("A1", "entry")}{_text_cell("B1", "weight")}'
    f'{_text_cell("C1", "yield")}</row>'
    f'<row r="2">{_text_cell("A2", "G1")}<c r="B2"><v>2.1</v></c>'
    '<c r="C2"><f>B2*2</f><v>4.2</v></c></row>'
    f'<row r="3">{_text_cell("A3", "G2")}<c r="B3"><v>1.8</v></c>'
    '<c r="C3"><f>B3*2</f><v>3.6</v></c></row>'
    '</sheetData></worksheet>'
)


def test_workbook_formula_read_as_its_stored_result(tmp_path: Path) -> None:
    path = tmp_path / "formulas.xlsx"
    path.write_bytes(_minimal_workbook(FORMULA_SHEET))
    book = read_fieldbook(path)
    assert book.traits == ("weight", "yield")
    assert_allclose(book.values["yield"], [4.2, 3.6], rtol=0)  # the stored results, exactly


def test_workbook_formula_without_a_stored_result_warned(tmp_path: Path) -> None:
    # openpyxl saves "=B2*2" without a result, as any program that does not compute formulas.
    path = write_xlsx(tmp_path, {"Plots": [["entry", "weight", "yield"], ["G1", 2.1, "=B2*2"],
                                           ["G2", 1.8, 3.6]]})
    book = read_fieldbook(path)
    assert_allclose(book.values["yield"], [np.nan, 3.6], rtol=0)  # exact
    (warning,) = warnings_about(book, "formula")
    assert str(warning) == (
        f"{path}, row 2: 1 formula cell(s) have no stored result and are read as empty (C2); "
        "open the workbook in a spreadsheet program and save it again"
    )


def test_workbook_cells_of_every_type(tmp_path: Path) -> None:
    rows = [["entry", "yield", "sown"], [dt.date(2024, 4, 1), 2.5, dt.datetime(2024, 4, 2)],
            [True, 2, None]]
    path = write_xlsx(tmp_path, {"Plots": rows})
    book = read_fieldbook(path)
    assert book.plots["entry"].tolist() == ["2024-04-01T00:00:00", "TRUE"]
    assert book.traits == ("yield",)
    message = raised(read_fieldbook, path, traits=["sown"])
    assert message.startswith(f"{path}, row 2, column 'sown': '2024-04-02T00:00:00' is not a")


@pytest.mark.parametrize("number", ["1" + "0" * 400, "1e400"], ids=["integer", "exponent"])
def test_workbook_number_too_large(tmp_path: Path, number: str) -> None:
    sheet = FORMULA_SHEET.replace("<v>1.8</v>", f"<v>{number}</v>")
    path = tmp_path / "large.xlsx"
    path.write_bytes(_minimal_workbook(sheet))
    assert raised(read_fieldbook, path).startswith(f"{path}, row 3, column 'weight': '")


def test_damaged_workbook_truncated(tmp_path: Path) -> None:
    whole = write_xlsx(tmp_path, {"Plots": ROWS}).read_bytes()
    path = tmp_path / "cut.xlsx"
    path.write_bytes(whole[: len(whole) // 2])
    assert raised(read_fieldbook, path).startswith(f"{path}: the workbook is damaged")


def test_damaged_workbook_bad_sheet_xml(tmp_path: Path) -> None:
    path = tmp_path / "bad.xlsx"
    path.write_bytes(_minimal_workbook('<worksheet xmlns="MAIN"><sheetData><row><c r="A1">'))
    assert raised(read_fieldbook, path).startswith(f"{path}: the workbook is damaged")


def test_workbook_with_xml_entities_refused(tmp_path: Path) -> None:
    # Entity definitions are how an XML "billion laughs" attack starts; the parser refuses them.
    sheet = ('<?xml version="1.0"?><!DOCTYPE w [<!ENTITY a "aaaaaaaaaa">'
             '<!ENTITY b "&a;&a;&a;&a;&a;&a;&a;&a;">]>' + FORMULA_SHEET.replace("G1", "&b;"))
    path = tmp_path / "entities.xlsx"
    path.write_bytes(_minimal_workbook(sheet))
    assert raised(read_fieldbook, path).startswith(f"{path}: the workbook is damaged")


def test_zip_that_is_not_a_workbook(tmp_path: Path) -> None:
    path = tmp_path / "trial.xlsx"
    with zipfile.ZipFile(path, "w") as archive:
        archive.writestr("trial.csv", "entry,yield\nA,1\n")
    assert raised(read_fieldbook, path) == (
        f"{path}: this is a zip archive but not an Excel workbook; save the field book as .xlsx "
        "or CSV"
    )


def test_workbook_that_would_unpack_to_gigabytes_refused(tmp_path: Path) -> None:
    # A real workbook whose central directory claims one member unpacks to 3.75 GiB (the size a
    # decompression bomb declares); the claimed sizes are checked before anything is unpacked.
    data = bytearray(write_xlsx(tmp_path, {"Plots": ROWS}).read_bytes())
    header = data.index(b"PK\x01\x02")  # first central-directory entry
    data[header + 24: header + 28] = (0xF000_0000).to_bytes(4, "little")  # uncompressed size
    path = tmp_path / "bomb.xlsx"
    path.write_bytes(bytes(data))
    message = raised(read_fieldbook, path)
    assert message.startswith(f"{path}: the workbook would unpack to 3,840 MB")


def test_workbook_chart_sheet(tmp_path: Path) -> None:
    book = openpyxl.Workbook()
    book.active.append(["entry", "yield"])
    book.active.append(["A", 1])
    chart = BarChart()
    chart.add_data(Reference(book.active, min_col=2, min_row=1, max_row=2), titles_from_data=True)
    book.create_chartsheet("Chart").add_chart(chart)
    path = tmp_path / "chart.xlsx"
    book.save(path)
    assert read_fieldbook(path).traits == ("yield",)
    assert "is a chart" in raised(read_fieldbook, path, sheet="Chart")


@pytest.mark.parametrize("kind", ["csv", "xlsx"])
def test_file_never_modified(tmp_path: Path, kind: str) -> None:
    path = write_csv(tmp_path, ROWS) if kind == "csv" else write_xlsx(tmp_path, {"P": ROWS})
    os.utime(path, ns=(1_000_000_000_000_000_000, 1_000_000_000_000_000_000))
    before, stat = path.read_bytes(), path.stat()
    read_fieldbook(path)
    with pytest.raises(TrialInputError):
        read_fieldbook(path, traits=["weight"])
    after = path.stat()
    assert path.read_bytes() == before
    assert after.st_mtime_ns == stat.st_mtime_ns and after.st_size == stat.st_size


# --- design checks -------------------------------------------------------------------------------


@pytest.fixture
def rcbd(tmp_path: Path) -> FieldBook:
    return read_fieldbook(write_csv(tmp_path, ROWS))


def test_design_checks_pass(rcbd: FieldBook) -> None:
    check_design(rcbd, design="rcbd", traits=["yield", "height"], checks=["G1"])
    check_design(rcbd, design="CRD", traits="yield")


def test_rcbd_needs_a_block_column(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "yield"], ["A", "1"], ["B", "2"], ["A", "3"]])
    message = raised(check_design, read_fieldbook(path), design="rcbd", traits=["yield"])
    assert message.startswith(f"{path}: an RCBD needs a block (replicate) column")
    assert "'block', 'rep', 'replicate' or 'replication'" in message


def test_rcbd_needs_two_blocks(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "rep", "yield"], ["A", "1", "1"], ["B", "1", "2"]])
    assert raised(check_design, read_fieldbook(path), design="rcbd", traits=["yield"]) == (
        f"{path}, column 'rep': an RCBD needs at least two blocks, and the file has one ('1')"
    )


def test_rcbd_entry_twice_in_a_block(tmp_path: Path) -> None:
    rows = [*ROWS, ["G2", "2", "204", "4.0", "99"]]
    path = write_csv(tmp_path, rows)
    assert raised(check_design, read_fieldbook(path), design="rcbd", traits=["yield"]) == (
        f"{path}, row 8, column 'entry': entry 'G2' appears twice in block '2' (rows 6 and 8); "
        "in an RCBD each entry has one plot per block"
    )


def test_entry_without_data_for_a_trait(tmp_path: Path) -> None:
    rows = [row[:] for row in ROWS]
    rows[2][3] = "."  # G2 in block 1; G2 in block 2 is already missing
    path = write_csv(tmp_path, rows)
    book = read_fieldbook(path)
    check_design(book, design="rcbd", traits=["height"])
    assert raised(check_design, book, design="rcbd", traits=["height", "yield"]) == (
        f"{path}, column 'yield': entry 'G2' has no data for trait 'yield'; fill in the values, "
        "or leave the trait out"
    )


def test_check_not_in_the_trial(rcbd: FieldBook) -> None:
    message = raised(check_design, rcbd, design="rcbd", traits=["yield"], checks=["g1 "])
    assert message == (
        f"{rcbd.source}, column 'entry': check 'g1 ' is not an entry of this trial; "
        "close matches: 'G1'"
    )
    message = raised(check_design, rcbd, design="rcbd", traits=["yield"], checks=["Zorro"])
    assert message.endswith("the entries are: 'G1', 'G2', 'G3'")


def test_crd_without_replication(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "yield"], ["A", "1"], ["B", "2"], ["C", "3"]])
    message = raised(check_design, read_fieldbook(path), design="crd", traits=["yield"])
    assert message.startswith(
        f"{path}, column 'yield': no entry has more than one plot with data for trait 'yield'"
    )


def test_rcbd_without_error_degrees_of_freedom(tmp_path: Path) -> None:
    rows = [["entry", "rep", "yield"], ["A", "1", "1"], ["B", "1", "2"], ["A", "2", "1.5"],
            ["B", "2", "NA"]]
    path = write_csv(tmp_path, rows)
    message = raised(check_design, read_fieldbook(path), design="rcbd", traits=["yield"])
    assert message.startswith(f"{path}, column 'yield': trait 'yield' has too few plots")


def test_single_entry(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "yield"], ["A", "1"], ["A", "2"]])
    assert "needs at least two" in raised(check_design, read_fieldbook(path), design="crd",
                                          traits=["yield"])


def test_unknown_design_or_trait(rcbd: FieldBook) -> None:
    assert "unknown design 'alpha'" in raised(check_design, rcbd, design="alpha", traits=["yield"])
    assert raised(check_design, rcbd, design="crd", traits=["weight"]) == (
        f"{rcbd.source}, column 'weight': not a trait of this field book; the traits are: "
        "'yield', 'height'"
    )
    assert "no trait was chosen" in raised(check_design, rcbd, design="crd", traits=[])


# --- an outside reference ------------------------------------------------------------------------


def test_plantgrowth_group_means() -> None:
    # R datasets PlantGrowth (Dobson 1983), kept in tests/data/fieldbooks: a CRD, 3 groups x 10.
    path = DATA / "plantgrowth.csv"
    book = read_fieldbook(path, entry="group")
    check_design(book, design="crd", traits=["weight"], checks=["ctrl"])
    assert book.traits == ("weight",) and book.roles["plot"] == "plot"
    ours = book.values["weight"].groupby(book.plots["entry"]).mean()
    reference = pd.read_csv(path).groupby("group")["weight"].mean()
    # Same decimal texts parsed by two readers; means may differ only by summation order.
    assert_allclose(ours.to_numpy(), reference.to_numpy(), rtol=1e-12)
    assert list(ours.index) == list(reference.index)
    # Group means as R prints them for this dataset (5.032, 4.661, 5.526; quoted from memory,
    # confirmed above by pandas); they are exact to three decimals, hence atol=5e-4.
    assert_allclose(ours.to_numpy(), [5.032, 4.661, 5.526], atol=5e-4, rtol=0)


# --- nothing but a FieldBook or a TrialInputError, whatever the input -----------------------------

_WORDS = st.text(st.characters(exclude_categories=("Cs", "Cc")), max_size=8)
_JUNK = st.one_of(
    st.sampled_from(["", "NA", "na", ".", "-", "*", "  ", "4,25", "-1", "1e400", "4.2t", '"',
                     '"a,b"', "x\ny", "\t", ";", ",", "\x00", "\x0c", "é", "\ufeff", "9" * 30,
                     "1.5", "I", "II"]),
    st.floats().map(repr),
    _WORDS,
)
_NUMBERS = st.one_of(
    st.floats(-5, 200, allow_nan=False).map(lambda v: f"{v:.2f}"),
    st.integers(-3, 300).map(str),
)
# What each column of a plausible field book holds, mostly good values and now and then junk.
_GOOD = {
    "entry": st.sampled_from(["G1", "G2", "G3", "g1 ", "Check A", "17"]),
    "rep": st.sampled_from(["1", "2", "3", "I", "II"]),
    "row": st.integers(1, 4).map(str),
    "col": st.integers(1, 4).map(str),
}
_OTHER_NAMES = ["yield", "height", "Ertrag (t/ha)", "class", "note", "block", ""]
_JUNK_SHARE = 0.02  # how often a cell of a plausible field book is junk


@st.composite
def broken_csv(draw: st.DrawFn) -> bytes:
    """Field books from plausible to hopeless, then mis-encoded, cut short or spliced with bytes."""
    # Hypothesis favours boundary values, so how often each kind of damage happens is drawn
    # from a seeded random generator instead.
    rng = draw(st.randoms(use_true_random=True))
    if rng.random() < 0.8:
        roles = draw(st.lists(st.sampled_from(["rep", "plot", "row", "col"]), unique=True))
        others = draw(st.lists(st.sampled_from(_OTHER_NAMES), min_size=1, max_size=4,
                               unique=rng.random() < 0.9))
        header = draw(st.permutations(["entry", *roles, *others]))
    else:
        header = draw(st.lists(st.one_of(st.sampled_from([*_OTHER_NAMES, "Yield"]), _WORDS),
                               max_size=6))
    body = []
    for number in range(rng.randint(0, 10) if rng.random() < 0.1 else 6):
        cells = [
            draw(_JUNK) if rng.random() < _JUNK_SHARE
            else str(101 + number) if name == "plot"
            else draw(_GOOD.get(name, _NUMBERS))
            for name in header
        ]
        if rng.random() < 0.01:
            cells = cells[: draw(st.integers(0, len(cells)))] + draw(st.lists(_JUNK, max_size=2))
        body.append(cells)
    delimiter = rng.choice([",", ";", "\t", ",", ";", "\t", ",", "|"])
    if delimiter != "," and rng.random() < 0.5:
        body = [[cell.replace(".", ",") for cell in cells] for cells in body]  # decimal commas
    if rng.random() < 0.5:
        buffer = io.StringIO(newline="")
        csv.writer(buffer, delimiter=delimiter).writerows([header, *body])
        text = buffer.getvalue()
    else:
        text = "\n".join(delimiter.join(cells) for cells in [header, *body])
    encoding = rng.choice(["utf-8", "utf-8", "utf-8-sig", "latin-1", "cp1252", "utf-16"])
    data = text.encode(encoding, errors="replace")
    damage = rng.choice(["none"] * 5 + ["cut", "splice", "both"])
    cut = rng.randint(0, len(data))
    if damage in ("splice", "both"):
        data = data[:cut] + draw(st.binary(min_size=1, max_size=6)) + data[cut:]
    if damage in ("cut", "both"):
        data = data[:cut]
    return data


@pytest.fixture(scope="module")
def fuzz_folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("fuzz")


def _read_or_refuse(path: Path, **options: object) -> FieldBook | None:
    try:
        book = read_fieldbook(path, **options)
    except TrialInputError as error:
        assert str(error)
        return None
    assert book.values.index.equals(book.plots.index)
    assert book.traits == tuple(book.values.columns)
    assert all(dtype == np.float64 for dtype in book.values.dtypes)
    assert all(isinstance(e, str) and e == e.strip() and e for e in book.plots["entry"])
    return book


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=broken_csv(), decimal_comma=st.booleans(), design=st.sampled_from(["rcbd", "crd"]),
       name=st.none() | st.sampled_from(["yield", "Yield", "entry", "G1", "x"]))
def test_broken_csv_never_escapes_as_another_error(fuzz_folder: Path, data: bytes,
                                                   decimal_comma: bool, design: str,
                                                   name: str | None) -> None:
    path = fuzz_folder / "fuzz.csv"
    path.write_bytes(data)
    book = _read_or_refuse(path, decimal_comma=decimal_comma, traits=None if name is None
                           else [name])
    if book is not None:
        try:
            check_design(book, design=design, traits=book.traits, checks=[name or "x"])
        except TrialInputError as error:
            assert str(error)


def test_damaged_workbooks_never_escape_as_another_error(tmp_path: Path) -> None:
    whole = write_xlsx(tmp_path, {"Plots": ROWS}).read_bytes()
    rng = np.random.default_rng(2024)
    path = tmp_path / "damaged.xlsx"
    damaged = [whole[:cut] for cut in range(0, len(whole), max(1, len(whole) // 40))]
    for _ in range(60):
        flipped = bytearray(whole)
        for where in rng.integers(0, len(whole), size=4):
            flipped[where] = int(rng.integers(0, 256))
        damaged.append(bytes(flipped))
    for data in damaged:
        path.write_bytes(data)
        _read_or_refuse(path)


_WORKBOOK_CELLS = st.one_of(
    st.none(), st.booleans(), st.integers(-10**12, 10**12), _WORDS,
    st.floats(allow_nan=False, allow_infinity=False),
    st.datetimes(min_value=dt.datetime(1901, 1, 1), max_value=dt.datetime(2100, 1, 1)),
    st.sampled_from(["entry", "rep", "plot", "yield", "NA", "4,25", "=1/0", "=A1"]),
)


@settings(max_examples=40, deadline=None)
@given(rows=st.lists(st.lists(_WORKBOOK_CELLS, max_size=5), max_size=6),
       header=st.permutations(["entry", "rep", "plot", "yield", "height"]))
def test_workbook_cells_never_escape_as_another_error(fuzz_folder: Path,
                                                      rows: list[list[object]],
                                                      header: list[str]) -> None:
    path = write_xlsx(fuzz_folder, {"Plots": [header, *rows]}, name="fuzz.xlsx")
    book = _read_or_refuse(path)
    if book is not None:
        try:
            check_design(book, design="rcbd", traits=book.traits)
        except TrialInputError as error:
            assert str(error)


def test_merged_cells_take_their_top_left_value_with_a_warning(tmp_path):
    # A replicate number merged down its plots (a common way to lay out a sheet) means that
    # replicate in every merged cell; the reader fills it in and says so.
    book = openpyxl.Workbook()
    sheet = book.active
    sheet.append(["rep", "entry", "yield"])
    for rep in (1, 2):
        for entry, value in (("A", 5.0), ("B", 6.0), ("C", 5.5)):
            sheet.append([rep, entry, value + rep / 10])
    sheet["A3"] = None
    sheet["A4"] = None
    sheet.merge_cells("A2:A4")
    sheet.merge_cells("A5:A7")
    path = tmp_path / "merged.xlsx"
    book.save(path)
    read = read_fieldbook(path)
    assert list(read.plots["block"]) == ["1", "1", "1", "2", "2", "2"]
    assert any("merged cells (A2:A4, A5:A7)" in str(w) for w in read.warnings)
