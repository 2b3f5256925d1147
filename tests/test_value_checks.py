"""Tests of the checks on cell texts, trait values and plot labels shared by readers and grid."""

from __future__ import annotations

import csv
import io
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.test_fieldbook import raised
from trialdesk.core.errors import TrialInputError
from trialdesk.core.fieldbook import check_design, read_fieldbook
from trialdesk.core.value_checks import (
    Problem,
    check_plots,
    check_value,
    is_missing_text,
    looks_like_number,
    parse_cell,
    parse_cells,
    plain_numbers,
    repeated_in_blocks,
    repeated_plots,
    similar_entry_codes,
)

# --- parse_cell ----------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "expected"),
    [("4.25", 4.25), (" 4.25 ", 4.25), ("-0.5", -0.5), ("+3", 3.0), (".75", 0.75), ("4.", 4.0),
     ("1e3", 1000.0), ("2.5E-1", 0.25), ("17", 17.0)],
)
def test_parse_cell_numbers(text: str, expected: float) -> None:
    assert parse_cell(text) == expected  # exact: the same decimal text Python's float reads


@pytest.mark.parametrize("text", ["", "   ", "NA", "na", "Na", ".", "-", "*", " NA "])
def test_parse_cell_missing(text: str) -> None:
    assert parse_cell(text) is None
    assert parse_cell(text, decimal_comma=True) is None


def test_parse_cell_decimal_comma() -> None:
    assert parse_cell("4,25", decimal_comma=True) == 4.25
    assert parse_cell(",5", decimal_comma=True) == 0.5
    assert parse_cell("12", decimal_comma=True) == 12.0


@pytest.mark.parametrize(
    ("text", "decimal_comma", "says"),
    [
        ("4,25", False, "'4,25' is not a number with a decimal point; if this file writes "
                        "decimals with a comma, read it with the decimal comma option"),
        ("4.25", True, "'4.25' has a decimal point, but the file is read with a decimal comma"),
        ("4.2t", False, "'4.2t' is not a number (a trait value is a number, or empty, NA, ., - "
                        "or * when missing)"),
        ("inf", False, "'inf' is not a number"),
        ("1e400", False, "'1e400' is not a usable number"),
        ("n.a.", False, "'n.a.' is not a number"),
        ("1 000", False, "'1 000' is not a number"),
    ],
    ids=["comma, read with a point", "point, read with a comma", "letter", "infinity",
         "overflow", "n.a.", "thousands space"],
)
def test_parse_cell_refuses(text: str, decimal_comma: bool, says: str) -> None:
    assert raised(parse_cell, text, decimal_comma=decimal_comma).startswith(says)


def test_parse_cell_quotes_long_texts_cut_short() -> None:
    message = raised(parse_cell, "9" * 400)
    assert message == f"'{'9' * 40}...' is not a usable number"


def test_parse_cell_wants_text() -> None:
    assert "not from float" in raised(parse_cell, 4.25)


_CELL_TEXT = st.one_of(
    st.sampled_from(["", "NA", " na ", ".", "-", "*", "4,25", "4.25", "-0", "1e400", "+.5",
                     "1.", ",5", "4.2t", "1e", "--1", "١٢", "1_000", "0x10", "inf", "nan"]),
    st.floats(allow_nan=False).map(repr),
    st.text(st.sampled_from("0123456789.,+-eE NA*\u00a0\t"), max_size=8),
    st.text(st.characters(exclude_categories=("Cs", "Cc")), max_size=6),
)


@settings(max_examples=200, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(text=_CELL_TEXT, decimal_comma=st.booleans())
def test_the_reader_and_the_grid_read_a_cell_alike(tmp_path: Path, text: str,
                                                   decimal_comma: bool) -> None:
    # One set of rules: a value typed in the grid and the same text in a field book give the
    # same number, or the same message.
    buffer = io.StringIO(newline="")
    csv.writer(buffer, delimiter="\t", quoting=csv.QUOTE_ALL).writerows(
        [["entry", "value"], ["A", "1"], ["B", text]])
    path = tmp_path / "one.csv"
    path.write_text(buffer.getvalue(), encoding="utf-8")
    try:
        expected = parse_cell(text, decimal_comma=decimal_comma)
    except TrialInputError as error:
        assert raised(read_fieldbook, path, traits=["value"],
                          decimal_comma=decimal_comma) == (
            f"{path}, row 3, column 'value': {error.message}")
        return
    read = read_fieldbook(path, traits=["value"], decimal_comma=decimal_comma).values["value"]
    if expected is None:
        assert math.isnan(read.iloc[1])
    else:
        assert read.iloc[1] == expected  # the same float, exactly


_NUMBER_LIKE = st.one_of(
    st.text(st.sampled_from("0123456789.,+-eE \t\x00\u00a0٣"), max_size=30),
    st.floats(allow_nan=False).map(repr),
    st.decimals(allow_nan=False, allow_infinity=False).map(str),
    _CELL_TEXT,
)


@settings(max_examples=300, deadline=None)
@given(texts=st.lists(_NUMBER_LIKE, max_size=40), decimal_comma=st.booleans())
def test_many_cells_read_as_one_by_one(texts: list[str], decimal_comma: bool) -> None:
    # parse_cells takes a short cut for plain numbers; it must agree with parse_cell exactly.
    values, refused = parse_cells(texts, decimal_comma=decimal_comma)
    for k, text in enumerate(texts):
        try:
            expected = parse_cell(text, decimal_comma=decimal_comma)
        except TrialInputError as error:
            assert refused[k] == error.message and math.isnan(values[k])
            continue
        assert k not in refused
        if expected is None:
            assert math.isnan(values[k])
        else:
            assert values[k] == expected and math.copysign(1, values[k]) == math.copysign(
                1, expected)  # the same float, down to the sign of zero
    for text, plain in zip(texts, plain_numbers(texts), strict=True):
        if plain:
            assert looks_like_number(text) and not is_missing_text(text)
            assert text == text.strip()


def test_plain_numbers() -> None:
    texts = ["4.25", "-0,5", "+.5", "1.", "17", "9" * 24, "9" * 25, " 4", "4 ", "1e3", "1.5.2",
             "1,5.2", "+-1", "1-", ".", "-", "", "NA", "٣", "1\x002", "４"]
    assert plain_numbers(texts).tolist() == [True] * 6 + [False] * 15
    assert plain_numbers([]).tolist() == []


# --- check_value ---------------------------------------------------------------------------------


def severities_and_messages(problems: list[Problem]) -> list[tuple[str, str]]:
    return [(p.severity, p.message) for p in problems]


@pytest.mark.parametrize("value", [None, math.nan])
def test_missing_value_is_never_a_problem(value: float | None) -> None:
    for kind in ("weight", "moisture", None):
        assert check_value(value, trait="t", kind=kind, low=0, high=1) == []


def test_weight() -> None:
    assert check_value(2.5, trait="plot weight", kind="weight") == []
    (problem,) = check_value(-2.0, trait="plot weight", kind="weight", plot="101")
    assert problem == Problem(severity="error", message="-2 is negative; a weight cannot be "
                              "negative", plot="101", trait="plot weight", row=None)


@pytest.mark.parametrize(
    ("value", "expected"),
    [
        (5.0, []),
        (40.0, []),
        (18.0, []),
        (4.5, [("warning", "moisture 4.5 % is outside 5-40 %, the usual range at harvest "
                           "(common practice); check the reading")]),
        (41.0, [("warning", "moisture 41 % is outside 5-40 %, the usual range at harvest "
                            "(common practice); check the reading")]),
        (-1.0, [("error", "moisture -1 % is impossible: a moisture reading is a percentage from "
                          "0 up to (not including) 100")]),
        (100.0, [("error", "moisture 100 % is impossible: a moisture reading is a percentage "
                           "from 0 up to (not including) 100")]),
    ],
    ids=["low end", "high end", "ordinary", "too dry", "too wet", "negative", "all water"],
)
def test_moisture(value: float, expected: list[tuple[str, str]]) -> None:
    # The usual range 5-40 % is common practice.
    assert severities_and_messages(check_value(value, trait="moisture", kind="moisture")) == (
        expected)


def test_plain_trait_negative_is_a_warning() -> None:
    assert severities_and_messages(check_value(-0.5, trait="yield")) == [
        ("warning", "-0.5 is negative; check the sign, or whether the trait can be negative")]
    assert check_value(0.0, trait="yield") == []


@pytest.mark.parametrize(
    ("low", "high", "value", "message"),
    [
        (0, 12, 12.5, "12.5 is outside the range set for trait 'yield' (0 to 12); check it "
                      "against the field book"),
        (0, 12, -0.5, "-0.5 is outside the range set for trait 'yield' (0 to 12); check it "
                      "against the field book"),
        (2, None, 1.0, "1 is below the lowest value set for trait 'yield' (2); check it against "
                       "the field book"),
        (None, 12, 13.0, "13 is above the highest value set for trait 'yield' (12); check it "
                         "against the field book"),
    ],
    ids=["above", "below (replaces the negative warning)", "below a low end", "above a high end"],
)
def test_range(low: float | None, high: float | None, value: float, message: str) -> None:
    assert severities_and_messages(check_value(value, trait="yield", low=low, high=high)) == [
        ("warning", message)]
    assert check_value((low if low is not None else high), trait="yield", low=low,
                       high=high) == []  # the ends are inside


def test_range_with_a_kind_keeps_the_errors() -> None:
    found = check_value(-1.0, trait="plot weight", kind="weight", low=0.5, high=9)
    assert severities_and_messages(found) == [
        ("error", "-1 is negative; a weight cannot be negative")]
    found = check_value(45.0, trait="moisture", kind="moisture", low=10, high=30)
    assert [p.message for p in found] == [
        "45 is outside the range set for trait 'moisture' (10 to 30); check it against the "
        "field book"]


def test_infinity_is_an_error() -> None:
    (problem,) = check_value(math.inf, trait="yield")
    assert problem.severity == "error" and problem.message == "inf is not a usable number"


@pytest.mark.parametrize(
    ("arguments", "says"),
    [({"kind": "length"}, "unknown kind 'length'"),
     ({"low": 5, "high": 1}, "runs from 5 down to 1"),
     ({"low": "a"}, "low end of the range of trait 'yield' is 'a', not a number"),
     ({"high": math.inf}, "high end of the range"),
     ({"value": "4.2"}, "must be a number, not '4.2'")],
    ids=["unknown kind", "reversed range", "text limit", "infinite limit", "text value"],
)
def test_check_value_refuses(arguments: dict, says: str) -> None:
    call = {"value": 1.0, "trait": "yield", **arguments}
    assert says in raised(check_value, **call)


# --- labels --------------------------------------------------------------------------------------


def test_repeated_plots() -> None:
    found = repeated_plots(["101", "102", "101", "101"], rows=[2, 3, 4, 5])
    assert [(r.position, r.label, r.row) for r in found] == [(2, "101", 4), (3, "101", 5)]
    assert [r.message for r in found] == [
        "plot number '101' appears twice (rows 2 and 4); each plot has its own number",
        "plot number '101' appears again (rows 2 and 5); each plot has its own number",
    ]
    assert repeated_plots(["1", "2"]) == []
    (unknown_rows,) = repeated_plots(["1", "1"])
    assert unknown_rows.message == "plot number '1' appears twice; each plot has its own number"


def test_repeated_in_blocks() -> None:
    found = repeated_in_blocks(["A", "B", "A", "A"], ["1", "1", "2", "1"], rows=[2, 3, 4, 5])
    assert [(r.position, r.label, r.row, r.message) for r in found] == [
        (3, "A", 5, "entry 'A' appears twice in block '1' (rows 2 and 5); in an RCBD each entry "
                    "has one plot per block")]


def test_similar_entry_codes() -> None:
    (found,) = similar_entry_codes(["G-12", "H1", "g-12", "G-12", "G -12"], rows=[2, 3, 4, 5, 6])
    assert found.codes == ("G-12", "g-12", "G -12") and found.rows == (2, 4, 6)
    assert found.row == 4
    assert found.message == (
        "entry codes that differ only in case or spaces ('G-12' first in row 2, 'g-12' first "
        "in row 4, 'G -12' first in row 6) are treated as different entries; correct them if "
        "they are one entry")
    assert similar_entry_codes(["A", "B", "A"]) == []


# --- check_plots ---------------------------------------------------------------------------------


def small_trial() -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    plots = pd.DataFrame({
        "plot": ["101", "102", "103", "201", "202", "203"],
        "block": ["1", "1", "1", "2", "2", "2"],
        "entry": ["G1", "G2", "G3", "G1", "G2", "G3"],
        "source_row": [2, 3, 4, 5, 6, 7],
    })
    values = pd.DataFrame({
        "weight": [5.4, 5.1, 5.9, 5.6, np.nan, 5.8],
        "moisture": [18.0, 17.5, 19.0, 18.2, 17.9, 18.4],
    })
    traits = pd.DataFrame({"name": ["weight", "moisture"], "low": [None, None],
                           "high": [None, None], "kind": ["weight", "moisture"]})
    return plots, values, traits


def test_clean_trial_has_no_problems() -> None:
    assert check_plots(*small_trial(), design="rcbd") == []


def test_every_kind_of_problem_in_order() -> None:
    plots, values, traits = small_trial()
    plots.loc[4, "plot"] = "101"       # plot number twice
    plots.loc[5, "entry"] = "G1"       # G1 twice in block 2
    plots.loc[2, "entry"] = "g2 "      # like G2
    values.loc[1, "weight"] = -5.1     # impossible weight
    values.loc[3, "moisture"] = 45.0   # unusual moisture
    found = check_plots(plots, values, traits, design="RCBD")
    assert [(p.severity, p.plot, p.trait, p.row) for p in found] == [
        ("error", "101", None, 6),
        ("error", "203", None, 7),
        ("warning", None, None, 4),
        ("error", "102", "weight", 3),
        ("warning", "201", "moisture", 5),
    ]
    assert found[0].message == ("plot number '101' appears twice (rows 2 and 6); each plot has "
                                "its own number")
    assert found[1].message == ("entry 'G1' appears twice in block '2' (rows 5 and 7); in an "
                                "RCBD each entry has one plot per block")
    assert found[2].message.startswith("entry codes that differ only in case or spaces ('G2' "
                                       "first in row 3, 'g2' first in row 4)")


def test_crd_does_not_look_at_blocks() -> None:
    plots, values, traits = small_trial()
    plots = plots.drop(columns="block")
    plots.loc[5, "entry"] = "G1"
    assert check_plots(plots, values, traits, design="crd") == []


def test_grid_without_rows_and_with_numbers_as_labels() -> None:
    plots = pd.DataFrame({"plot": [1.0, 2.0, 2.0, None], "block": [1, 1, 2, 2],
                          "entry": ["A", "B", "A", "B"]})
    values = pd.DataFrame({"yield": [4.0, 41.0, 4.2, 4.1]})
    traits = pd.DataFrame({"name": ["yield"], "high": [12.0]})
    found = check_plots(plots, values, traits, design="rcbd")
    assert [(p.severity, p.plot, p.row, p.message) for p in found] == [
        ("error", None, None, "no plot number for the plot in position 4"),
        ("error", "2", None, "plot number '2' appears twice; each plot has its own number"),
        ("warning", "2", None, "41 is above the highest value set for trait 'yield' (12); "
                               "check it against the field book"),
    ]


def test_value_problems_match_check_value_cell_by_cell() -> None:
    rng = np.random.default_rng(11)
    weights = np.round(rng.normal(3.0, 3.0, 300), 1)
    weights[rng.integers(0, 300, 20)] = np.nan
    plots = pd.DataFrame({"plot": [str(i) for i in range(300)], "entry": ["A", "B", "C"] * 100})
    traits = pd.DataFrame({"name": ["w"], "low": [0.5], "high": [7.0], "kind": ["weight"]})
    found = check_plots(plots, pd.DataFrame({"w": weights}), traits, design="crd")
    one_by_one = [p for i, w in enumerate(weights)
                  for p in check_value(w, trait="w", low=0.5, high=7.0, kind="weight",
                                       plot=str(i))]
    def key(problem: Problem) -> tuple[bool, int, str]:
        return problem.severity != "error", int(problem.plot), problem.message

    assert sorted(found, key=key) == sorted(one_by_one, key=key)
    assert len(found) > 20  # the invented weights do have problems


def test_same_messages_as_the_field_book_reader(tmp_path: Path) -> None:
    path = tmp_path / "trial.csv"
    path.write_text("entry,rep,plot,yield\nA,1,1,4\nB,1,2,4\nA,2,3,4\nA,2,4,4\nb,2,5,4\n",
                    encoding="utf-8")
    book = read_fieldbook(path)
    with pytest.raises(TrialInputError) as info:
        check_design(book, design="rcbd", traits=["yield"])
    found = check_plots(book.plots, book.values, pd.DataFrame({"name": ["yield"]}),
                        design="rcbd")
    assert found[0].message == info.value.message
    assert found[1].message == book.warnings[0].message


@pytest.mark.parametrize(
    ("change", "says"),
    [
        (lambda p, v, t: (p.drop(columns="entry"), v, t), "no column 'entry'"),
        (lambda p, v, t: (p, v.set_axis(range(10, 16)), t), "not aligned"),
        (lambda p, v, t: (p, v, pd.DataFrame({"name": ["weight", "weight"]})), "listed twice"),
        (lambda p, v, t: (p, v, pd.DataFrame({"name": ["height"]})), "no column of values"),
        (lambda p, v, t: (p, v.assign(weight=["x"] * 6), t), "not all numbers"),
        (lambda p, v, t: (p, v, t.assign(kind=["weight", "volume"])), "unknown kind 'volume'"),
    ],
    ids=["no entry column", "values not aligned", "trait twice", "trait without values",
         "text values", "unknown kind"],
)
def test_check_plots_refuses_tables_that_do_not_fit(change, says: str) -> None:
    plots, values, traits = change(*small_trial())
    assert says in raised(check_plots, plots, values, traits, design="rcbd")


def test_check_plots_unknown_design() -> None:
    assert "unknown design 'latin'" in raised(check_plots, *small_trial(), design="latin")
    # An alpha design's replicates are complete blocks: its plots are checked as an RCBD's.
    assert check_plots(*small_trial(), design="alpha") == check_plots(*small_trial(),
                                                                     design="rcbd")
