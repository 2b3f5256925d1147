"""Tests of the wide field-book reader: entries as rows, one column per replicate, one trait."""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from tests.test_fieldbook import raised, write_csv, write_xlsx
from trialdesk.core.fieldbook import FieldBook, check_design, read_fieldbook
from trialdesk.core.wide_fieldbook import read_wide_fieldbook

DATA = Path(__file__).parent / "data"


@pytest.mark.parametrize(
    "header",
    [["entry", "rep1", "rep2", "rep3"], ["Variety", "I", "II", "III"], ["Entry", "R1", "R2", "R3"],
     ["Genotype", "Block 1", "Block 2", "Block 3"]],
    ids=["entry, rep1..", "Variety, I..", "Entry, R1..", "Genotype, Block 1.."],
)
def test_layouts(tmp_path: Path, header: list[str]) -> None:
    rows = [header, ["G1", "4.2", "4.4", "4.1"], ["G2", "3.9", "NA", "4.0"],
            ["G3", "4.5", "4.7", "4.6"]]
    book = read_wide_fieldbook(write_csv(tmp_path, rows), trait="yield")
    reps = header[1:]
    assert isinstance(book, FieldBook)
    assert book.traits == ("yield",) and list(book.values.columns) == ["yield"]
    assert book.roles == {"entry": header[0], "block": ", ".join(reps), "plot": None,
                          "row": None, "column": None}
    assert book.plots["entry"].tolist() == ["G1", "G2", "G3"] * 3
    assert book.plots["block"].tolist() == [r for r in reps for _ in range(3)]
    assert book.plots["plot"].tolist() == [f"{r}-{row}" for r in reps for row in (2, 3, 4)]
    assert book.plots["source_row"].tolist() == [2, 3, 4] * 3
    assert book.plots["row"].isna().all() and book.plots["row"].dtype == "Int64"
    assert book.plots["column"].isna().all() and book.plots["column"].dtype == "Int64"
    assert_allclose(book.values["yield"], [4.2, 3.9, 4.5, 4.4, np.nan, 4.7, 4.1, 4.0, 4.6],
                    rtol=0)  # exact: the same decimal texts
    assert book.values.index.equals(book.plots.index)
    assert book.warnings == ()
    check_design(book, design="rcbd", traits=["yield"])


def test_same_plots_as_the_long_layout(tmp_path: Path) -> None:
    wide = read_wide_fieldbook(write_csv(tmp_path, [
        ["Variety", "I", "II"], ["Alpha", "4.1", "4.3"], ["Beta", "3.8", "."]]), trait="yield")
    long = read_fieldbook(write_csv(tmp_path, [
        ["Variety", "Rep", "yield"], ["Alpha", "I", "4.1"], ["Beta", "I", "3.8"],
        ["Alpha", "II", "4.3"], ["Beta", "II", "."]], name="long.csv"))
    for column in ("entry", "block"):
        assert wide.plots[column].tolist() == long.plots[column].tolist()
    assert_allclose(wide.values["yield"], long.values["yield"], rtol=0)  # exact
    assert wide.plots["entry"].dtype == long.plots["entry"].dtype
    assert wide.plots["block"].dtype == long.plots["block"].dtype


def test_immer_barley_table_against_pandas(tmp_path: Path) -> None:
    # MASS immer (Immer, Hayes & Powers 1934; extract in tests/data): five barley varieties at
    # six locations, 1931 yields laid out wide as a two-way table (locations as columns). The
    # reference is pandas reading the long original.
    immer = pd.read_csv(DATA / "immer.csv")
    table = immer.pivot(index="Var", columns="Loc", values="Y1")
    path = tmp_path / "immer_wide.csv"
    table.reset_index().to_csv(path, index=False)
    book = read_wide_fieldbook(path, trait="Y1", entry="Var")
    check_design(book, design="rcbd", traits=["Y1"])
    assert len(book.plots) == len(immer) == 30
    ours = pd.DataFrame({"Var": book.plots["entry"], "Loc": book.plots["block"],
                         "Y1": book.values["Y1"]}).sort_values(["Var", "Loc"])
    reference = immer[["Var", "Loc", "Y1"]].sort_values(["Var", "Loc"])
    assert ours[["Var", "Loc"]].values.tolist() == reference[["Var", "Loc"]].values.tolist()
    # Same decimal texts, written by pandas and read back: equal to the last bit (rtol=0).
    assert_allclose(ours["Y1"].to_numpy(), reference["Y1"].to_numpy(), rtol=0)
    means = book.values["Y1"].groupby(book.plots["entry"]).mean()
    # Means may differ from pandas' only in summation order: rtol=1e-12.
    assert_allclose(means.to_numpy(), immer.groupby("Var")["Y1"].mean().to_numpy(), rtol=1e-12)


def test_workbook_header_and_rows(tmp_path: Path) -> None:
    path = write_xlsx(tmp_path, {"Yield": [["Entry", "R1", "R2"], ["G1", 4.25, "4,5"],
                                           [17, None, 3]]}, first_row=2)
    book = read_wide_fieldbook(path, trait="yield", decimal_comma=True, sheet="Yield")
    assert book.sheet == "Yield"
    assert book.plots["entry"].tolist() == ["G1", "17", "G1", "17"]
    assert book.plots["source_row"].tolist() == [3, 4, 3, 4]
    assert_allclose(book.values["yield"], [4.25, np.nan, 4.5, 3.0], rtol=0)  # exact


def test_separators_and_encodings(tmp_path: Path) -> None:
    rows = [["Sorte", "Wdh 1", "Wdh 2"], ["Bélé", "3,5", "3,7"], ["Übel", "4", "4,1"]]
    path = write_csv(tmp_path, rows, delimiter=";", encoding="cp1252")
    book = read_wide_fieldbook(path, trait="Ertrag", entry="Sorte", decimal_comma=True)
    assert book.plots["entry"].tolist() == ["Bélé", "Übel", "Bélé", "Übel"]
    assert_allclose(book.values["Ertrag"], [3.5, 4.0, 3.7, 4.1], rtol=0)  # exact


def test_an_empty_replicate_column_is_all_missing(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "rep1", "rep2"], ["A", "1", ""], ["B", "2", "NA"]])
    assert read_wide_fieldbook(path, trait="y").values["y"].isna().tolist() == [
        False, False, True, True]


# --- messages name the file, the row and the column ----------------------------------------------


def test_value_that_is_not_a_number(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "I", "II"], ["A", "4.1", "4.2"], ["B", "3.9", "4.2t"]])
    assert raised(read_wide_fieldbook, path, trait="yield").startswith(
        f"{path}, row 3, column 'II': '4.2t' is not a number")


def test_decimal_comma_hint(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "I", "II"], ["A", "4,1", "4,2"]], delimiter=";")
    message = raised(read_wide_fieldbook, path, trait="yield")
    assert message.startswith(f"{path}, row 2, column 'I': '4,1'")
    assert "decimal_comma=True" in message


def test_text_column_among_the_replicates(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "I", "II", "note"], ["A", "4.1", "4.2", "lodged"],
                                ["B", "3.9", "4.0", ""]])
    message = raised(read_wide_fieldbook, path, trait="yield")
    assert message.startswith(
        f"{path}, row 2, column 'note': 'lodged' is not a number, and this column holds text; "
        "in the wide layout every column other than the entry column is a replicate of trait "
        "'yield'")


def test_two_entry_like_columns(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["Entry", "Variety", "I"], ["1", "Alpha", "4"],
                                ["2", "Beta", "5"]])
    message = raised(read_wide_fieldbook, path, trait="yield")
    assert message.startswith(f"{path}, row 2, column 'Variety': 'Alpha' is not a number")
    assert "name the entry column" in message
    # Named, the entry column is 'Variety', and 'Entry' (numbers) is then read as a replicate.
    book = read_wide_fieldbook(path, trait="yield", entry="Variety")
    assert book.plots["block"].unique().tolist() == ["Entry", "I"]


def test_empty_entry_code(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "I", "II"], ["A", "4", "4"], ["", "3", "5"]])
    assert raised(read_wide_fieldbook, path, trait="yield") == (
        f"{path}, row 3, column 'entry': no entry code in this row")


def test_no_replicate_column(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", ""], ["A", ""], ["B", ""]])
    assert raised(read_wide_fieldbook, path, trait="yield").startswith(
        f"{path}: there is no replicate column: the only column is the entry column 'entry'")


def test_no_entry_column(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["name", "I"], ["A", "1"]])
    assert raised(read_wide_fieldbook, path, trait="yield").startswith(
        f"{path}: no entry column found")
    assert raised(read_wide_fieldbook, path, trait="yield", entry="Sorte").startswith(
        f"{path}, column 'Sorte': there is no such column")


@pytest.mark.parametrize("trait", [None, "", "  ", 3, ["yield"]])
def test_trait_must_be_named(tmp_path: Path, trait: object) -> None:
    path = write_csv(tmp_path, [["entry", "I"], ["A", "1"]])
    assert raised(read_wide_fieldbook, path, trait=trait).startswith(
        f"{path}: name the trait the replicate columns hold")


def test_file_problems_as_the_long_reader_reports_them(tmp_path: Path) -> None:
    missing = tmp_path / "nowhere.csv"
    assert raised(read_wide_fieldbook, missing, trait="y") == f"{missing}: there is no such file"
    path = write_csv(tmp_path, [["entry", "I", "I"], ["A", "1", "2"]])
    assert "two columns have the same name" in raised(read_wide_fieldbook, path, trait="y")
    assert "sheet 'S' was asked for" in raised(read_wide_fieldbook, path, trait="y", sheet="S")


def test_entry_twice_is_named_by_rows_in_the_design_check(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "I", "II"], ["A", "4", "4"], ["B", "3", "5"],
                                ["A", "4.5", "4.4"]])
    book = read_wide_fieldbook(path, trait="yield")
    assert raised(check_design, book, design="rcbd", traits=["yield"]) == (
        f"{path}, row 4, column 'entry': entry 'A' appears twice in block 'I' (rows 2 and 4); "
        "in an RCBD each entry has one plot per block")


def test_warnings_name_the_replicate_column(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "I", "II"], ["A", "4", "-0.1"], ["B", "3", "5"],
                                ["b", "4", "4"]])
    book = read_wide_fieldbook(path, trait="yield")
    negative, similar = book.warnings
    assert str(negative) == (
        f"{path}, row 2, column 'II': 1 value negative: -0.1 (row 2, column 'II'); check the "
        "sign, or whether the trait can be negative")
    assert str(similar).startswith(
        f"{path}, row 4, column 'entry': entry codes that differ only in case or spaces ('B' "
        "first in row 3, 'b' first in row 4)")


def test_checksum_and_source(tmp_path: Path) -> None:
    path = write_csv(tmp_path, [["entry", "I", "II"], ["A", "4", "4"]])
    book = read_wide_fieldbook(str(path), trait="yield")
    assert book.source == str(path)
    assert book.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert book.sheet is None
