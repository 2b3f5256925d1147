"""Checks on what the user typed or imported: cell texts, trait values and plot labels.

One set of rules serves the field-book readers, as they import a file, and the desktop grid, on
every edit: what a cell's text means (:func:`parse_cell`), whether a value is possible or
suspicious (:func:`check_value`), and the whole-trial checks on plot numbers and entry codes
(:func:`check_plots`, built on :func:`repeated_plots`, :func:`repeated_in_blocks` and
:func:`similar_entry_codes`, which the readers use too).

An *error* is something that cannot be used as typed; a *warning* is kept but worth a second look.
"""

from __future__ import annotations

import datetime as dt
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from trialdesk.core.errors import TrialInputError

__all__ = [
    "KINDS",
    "MISSING_MARKERS",
    "cell_text",
    "check_plots",
    "check_value",
    "design_kind",
    "is_missing_text",
    "looks_like_number",
    "parse_cell",
    "parse_cells",
    "plain_numbers",
    "Problem",
    "quote_cell",
    "Repeat",
    "repeated_in_blocks",
    "repeated_plots",
    "same_code_key",
    "similar_entry_codes",
    "SimilarCodes",
]

#: Cell texts read as a missing value, compared after stripping spaces and case-insensitively.
MISSING_MARKERS = frozenset({"", "na", ".", "-", "*"})

#: What a trait measures, as far as the checks care: None for anything without a rule of its own.
KINDS = ("weight", "moisture", None)

# Grain moisture readings outside this range are unusual at harvest and worth re-checking (common
# practice; the range is from memory, not from a published table).
MOISTURE_USUAL_PCT = (5.0, 40.0)

_DOT_NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_COMMA_NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:,[0-9]*)?|,[0-9]+)(?:[eE][+-]?[0-9]+)?")
_SHOWN_CHARS = 40
_PLAIN_CHARS = 24  # plain numbers are recognised up to this length; longer texts take the rules
_DESIGNS = ("rcbd", "crd")


@dataclass(frozen=True, slots=True, kw_only=True)
class Problem:
    """One thing wrong or suspicious, and where it is.

    Attributes
    ----------
    severity : {"error", "warning"}
        "error": the value or label cannot be used as typed; "warning": suspicious, but kept.
    message : str
        For the user: what is wrong and what to check.
    plot : str or None
        The plot it concerns, where known.
    trait : str or None
        The trait it concerns, for a value.
    row : int or None
        The spreadsheet row, where known (the row of the field book the plot was read from).
    """

    severity: str
    message: str
    plot: str | None
    trait: str | None
    row: int | None


@dataclass(frozen=True, slots=True, kw_only=True)
class Repeat:
    """A plot number, or an entry in a block, seen again.

    Attributes
    ----------
    position : int
        Position (0-based) of the repeat in the sequences checked.
    label : str
        The plot number, or the entry code, that repeats.
    row : int or None
        Spreadsheet row of the repeat, where known.
    message : str
        For the user, naming where it was seen first.
    """

    position: int
    label: str
    row: int | None
    message: str


@dataclass(frozen=True, slots=True, kw_only=True)
class SimilarCodes:
    """Entry codes that differ only in case or spaces ("G-12", "g-12"): likely one entry.

    Attributes
    ----------
    codes : tuple of str
        The spellings, in the order they first appear.
    rows : tuple of int or None
        Spreadsheet row where each spelling first appears, where known.
    row : int or None
        Where to look: the first row of the second spelling.
    message : str
        For the user.
    """

    codes: tuple[str, ...]
    rows: tuple[int | None, ...]
    row: int | None
    message: str


# --- one cell -----------------------------------------------------------------------------------


def is_missing_text(text: str) -> bool:
    """True for an empty cell and for the missing-value markers NA, ., - and * (any case)."""
    return text.strip().casefold() in MISSING_MARKERS


def looks_like_number(text: str) -> bool:
    """True when the text, stripped, is a number with a decimal point or a decimal comma."""
    text = text.strip()
    return bool(_DOT_NUMBER.fullmatch(text) or _COMMA_NUMBER.fullmatch(text))


def cell_text(cell: object) -> str:
    """A cell's text as a spreadsheet shows it: 1.0 is "1", True is "TRUE", dates in ISO form."""
    if isinstance(cell, bool):
        return "TRUE" if cell else "FALSE"
    if isinstance(cell, float) and math.isfinite(cell) and cell.is_integer():
        return str(int(cell))
    if isinstance(cell, dt.datetime | dt.date | dt.time):
        return cell.isoformat()
    return str(cell)


def quote_cell(text: str) -> str:
    """A cell's text as messages quote it: in single quotes, cut short after 40 characters."""
    return f"'{text[:_SHOWN_CHARS]}...'" if len(text) > _SHOWN_CHARS else f"'{text}'"


def parse_cell(text: str, *, decimal_comma: bool = False) -> float | None:
    """The value of what was typed in a trait cell; None for a missing value.

    Parameters
    ----------
    text : str
        The cell as typed. Surrounding spaces do not matter.
    decimal_comma : bool, default False
        Read "4,25" as 4.25. Then a number written with a decimal point is refused, since where
        decimals are written with a comma "4.250" may mean four thousand two hundred and fifty.

    Returns
    -------
    float or None
        None for an empty cell and for the missing markers ``NA``, ``.``, ``-`` and ``*`` (in any
        case); otherwise the number, at full precision.

    Raises
    ------
    TrialInputError
        The text is not a number written the expected way, or is too large to use; the message
        quotes the text and says what to do. It names no place: the caller adds the plot, row or
        column.

    Examples
    --------
    >>> parse_cell(" 4.25 "), parse_cell("NA"), parse_cell("4,25", decimal_comma=True)
    (4.25, None, 4.25)
    >>> parse_cell("4.2t")
    Traceback (most recent call last):
    ...
    trialdesk.core.errors.TrialInputError: '4.2t' is not a number (a trait value is a number, or \
empty, NA, ., - or * when missing)
    """
    if not isinstance(text, str):
        raise TrialInputError(f"a cell is read from its text, not from {type(text).__name__}")
    stripped = text.strip()
    if stripped.casefold() in MISSING_MARKERS:
        return None
    value = _text_number(stripped, bool(decimal_comma))
    if not math.isfinite(value):
        raise TrialInputError(f"{quote_cell(text)} is not a usable number")
    return value


def _text_number(text: str, decimal_comma: bool) -> float:
    if decimal_comma:
        if _COMMA_NUMBER.fullmatch(text):
            return float(text.replace(",", "."))
        if _DOT_NUMBER.fullmatch(text):
            raise TrialInputError(
                f"'{text}' has a decimal point, but the file is read with a decimal comma; "
                "write every number the same way"
            )
    else:
        if _DOT_NUMBER.fullmatch(text):
            return float(text)
        if _COMMA_NUMBER.fullmatch(text):
            raise TrialInputError(
                f"'{text}' is not a number with a decimal point; if this file writes decimals "
                "with a comma, read it with the decimal comma option (decimal_comma=True)"
            )
    raise TrialInputError(
        f"'{text}' is not a number (a trait value is a number, or empty, NA, ., - or * when "
        "missing)"
    )


def plain_numbers(texts: Sequence[str]) -> np.ndarray:
    """Which texts are plain numbers, found for all at once.

    A plain number is digits with at most one decimal point or comma and an optional leading
    sign, nothing else (no spaces, no exponent), up to 24 characters: "4.25", "-0,5", "17". Such
    a text is never missing and looks like a number, and :func:`parse_cell` reads it as Python's
    ``float`` reads it (with the comma made a point), so the rules need not run on it one by one.

    Examples
    --------
    >>> plain_numbers(["4.25", " 4.25", "-0,5", "1e3", ".", "NA", "17"]).tolist()
    [True, False, True, False, False, False, True]
    """
    texts = _objects(texts)
    plain = np.zeros(len(texts), dtype=bool)
    lengths = np.fromiter((len(t) if isinstance(t, str) else 0 for t in texts), dtype=np.intp,
                          count=len(texts))  # anything but text is not a plain number
    short = np.flatnonzero((lengths > 0) & (lengths <= _PLAIN_CHARS))
    if not len(short):
        return plain
    width = int(lengths[short].max())
    chars = texts[short].astype(f"<U{width}").view(np.uint32).reshape(len(short), width)
    place = np.arange(width)
    inside = place < lengths[short][:, None]  # a NUL inside a text is a character, not padding
    digits = (chars >= ord("0")) & (chars <= ord("9"))
    separators = (chars == ord(".")) | (chars == ord(","))
    sign = ((chars == ord("+")) | (chars == ord("-"))) & (place == 0)
    allowed = (digits | separators | sign | ~inside).all(axis=1)
    plain[short] = allowed & (separators.sum(axis=1) <= 1) & digits.any(axis=1)
    return plain


def parse_cells(texts: Sequence[str], *, decimal_comma: bool = False,
                plain: np.ndarray | None = None) -> tuple[np.ndarray, dict[int, str]]:
    """:func:`parse_cell` for many cells at once.

    Parameters
    ----------
    texts : sequence of str
        The cells as typed.
    decimal_comma : bool, default False
        As for :func:`parse_cell`.
    plain : numpy.ndarray, optional
        ``plain_numbers(texts)``, when the caller has it already.

    Returns
    -------
    values : numpy.ndarray
        float64, one per text; NaN for a missing value and for a text that was refused.
    refused : dict
        Position of each refused text -> the message :func:`parse_cell` gives for it.

    Examples
    --------
    >>> values, refused = parse_cells(["4.25", "NA", "4,25", "x"])
    >>> values.tolist(), sorted(refused)
    ([4.25, nan, nan, nan], [2, 3])
    """
    cells = _objects(texts)
    decimal_comma = bool(decimal_comma)
    plain = plain_numbers(cells) if plain is None else plain
    # A plain number with the other convention's separator is refused: parse_cell says why.
    other = "." if decimal_comma else ","
    fast = np.flatnonzero(plain)
    fast = fast[~np.fromiter((other in text for text in cells[fast]), dtype=bool,
                             count=len(fast))]
    quick = cells[fast]
    if decimal_comma:
        quick = [text.replace(",", ".") for text in quick]
    values = np.full(len(cells), np.nan)
    values[fast] = np.fromiter(map(float, quick), dtype=np.float64, count=len(quick))
    slow = np.ones(len(cells), dtype=bool)
    slow[fast] = False
    refused: dict[int, str] = {}
    for k in np.flatnonzero(slow):
        try:
            value = parse_cell(cells[k], decimal_comma=decimal_comma)
        except TrialInputError as exc:
            refused[int(k)] = exc.message
            continue
        values[k] = np.nan if value is None else value
    return values, refused


# --- one value ----------------------------------------------------------------------------------


def check_value(
    value: float | None,
    *,
    trait: str,
    low: float | None = None,
    high: float | None = None,
    kind: str | None = None,
    plot: str | None = None,
) -> list[Problem]:
    """What is wrong or suspicious about one trait value.

    Parameters
    ----------
    value : float or None
        The value; None or NaN is a missing value, which is never a problem.
    trait : str
        The trait's name, for the message.
    low, high : float, optional
        The range the trait's values are expected in; a value outside it is a warning.
    kind : {"weight", "moisture", None}
        "weight": a negative value is an error. "moisture" (percent): a value below 0 or from 100
        up is an error, one outside 5-40 % a warning (common practice). None: a negative value is
        a warning. A range (``low``, ``high``) replaces these warnings; the errors stand.
    plot : str, optional
        The plot, copied into each problem.

    Returns
    -------
    list of Problem
        Errors first; empty when the value is fine.

    Raises
    ------
    TrialInputError
        For an unknown kind, or a range whose low end is above its high end.

    Examples
    --------
    >>> [p.message for p in check_value(-2.0, trait="plot weight", kind="weight")]
    ['-2 is negative; a weight cannot be negative']
    >>> [p.severity for p in check_value(12.5, trait="yield", low=0, high=10)]
    ['warning']
    """
    limits = _limits(trait, low, high, kind)
    if value is not None and (isinstance(value, bool) or not isinstance(value, int | float)):
        raise TrialInputError(f"the value of trait '{trait}' must be a number, not {value!r}",
                              column=trait)
    array = np.array([np.nan if value is None else value], dtype=np.float64)
    return [
        Problem(severity=severity, message=message, plot=plot, trait=trait, row=None)
        for _, severity, message in _value_problems(array, trait, limits)
    ]


@dataclass(frozen=True, slots=True)
class _Limits:
    low: float | None
    high: float | None
    kind: str | None


def _limits(trait: object, low: object, high: object, kind: object) -> _Limits:
    if not isinstance(trait, str):
        raise TrialInputError(f"a trait is named by text, not by {trait!r}")
    if kind not in KINDS:
        raise TrialInputError(
            f"unknown kind {kind!r} for trait '{trait}'; use 'weight', 'moisture' or none",
            column=trait,
        )
    low_value, high_value = _limit(low, "low", trait), _limit(high, "high", trait)
    if low_value is not None and high_value is not None and low_value > high_value:
        raise TrialInputError(
            f"the range of trait '{trait}' runs from {low_value:g} down to {high_value:g}; "
            "give the lower end first",
            column=trait,
        )
    return _Limits(low_value, high_value, kind)


def _limit(limit: object, end: str, trait: str) -> float | None:
    if _absent(limit):
        return None
    try:
        value = float(limit)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        value = math.nan
    if isinstance(limit, bool) or not math.isfinite(value):
        raise TrialInputError(
            f"the {end} end of the range of trait '{trait}' is {limit!r}, not a number",
            column=trait,
        )
    return value


def _value_problems(values: np.ndarray, trait: str, limits: _Limits
                    ) -> list[tuple[int, str, str]]:
    """(position, severity, message) for each problem in a trait column, errors first.

    A range set for the trait replaces the built-in warnings (negative values; moisture outside
    the usual range): it is the user's own rule for what is suspicious. Errors always stand.
    """
    found = [(i, "error", f"{values[i]:g} is not a usable number")
             for i in np.flatnonzero(np.isinf(values))]
    usable = np.isfinite(values)
    if limits.kind == "weight":
        negative = usable & (values < 0)
        found += [(i, "error", f"{values[i]:g} is negative; a weight cannot be negative")
                  for i in np.flatnonzero(negative)]
        usable &= ~negative
    elif limits.kind == "moisture":
        impossible = usable & ((values < 0) | (values >= 100))
        found += [(i, "error", f"moisture {values[i]:g} % is impossible: a moisture reading is "
                   "a percentage from 0 up to (not including) 100")
                  for i in np.flatnonzero(impossible)]
        usable &= ~impossible
    if limits.low is not None or limits.high is not None:
        found += _range_problems(values, trait, limits, usable)
    elif limits.kind == "moisture":
        usual_low, usual_high = MOISTURE_USUAL_PCT
        unusual = usable & ((values < usual_low) | (values > usual_high))
        found += [(i, "warning", f"moisture {values[i]:g} % is outside {usual_low:g}-"
                   f"{usual_high:g} %, the usual range at harvest (common practice); check the "
                   "reading")
                  for i in np.flatnonzero(unusual)]
    elif limits.kind is None:
        found += [(i, "warning", f"{values[i]:g} is negative; check the sign, or whether the "
                   "trait can be negative")
                  for i in np.flatnonzero(usable & (values < 0))]
    found.sort(key=lambda problem: (problem[1] != "error", problem[0]))
    return [(int(i), severity, message) for i, severity, message in found]


def _range_problems(values: np.ndarray, trait: str, limits: _Limits, usable: np.ndarray
                    ) -> list[tuple[int, str, str]]:
    low, high = limits.low, limits.high
    if low is not None and high is not None:
        outside = (values < low) | (values > high)
        advice = f"is outside the range set for trait '{trait}' ({low:g} to {high:g})"
    elif low is not None:
        outside = values < low
        advice = f"is below the lowest value set for trait '{trait}' ({low:g})"
    else:
        outside = values > high
        advice = f"is above the highest value set for trait '{trait}' ({high:g})"
    return [(i, "warning", f"{values[i]:g} {advice}; check it against the field book")
            for i in np.flatnonzero(usable & outside)]


# --- plot labels --------------------------------------------------------------------------------


def repeated_plots(plots: Sequence[str], rows: Sequence[int | None] | None = None
                   ) -> list[Repeat]:
    """Every plot number seen again, in order, with the row where it was seen first.

    Parameters
    ----------
    plots : sequence of str
        Plot numbers, in file (or grid) order.
    rows : sequence of int, optional
        The spreadsheet row of each plot; the messages name rows only when they are given.

    Examples
    --------
    >>> [r.message for r in repeated_plots(["101", "102", "101"], rows=[2, 3, 4])]
    ["plot number '101' appears twice (rows 2 and 4); each plot has its own number"]
    """
    return [
        Repeat(position=k, label=label, row=row, message=(
            f"plot number '{label}' appears {'twice' if count == 1 else 'again'}"
            f"{_seen_in_rows(first_row, row)}; each plot has its own number"
        ))
        for k, label, count, first_row, row in _repeats([plots], rows)
    ]


def repeated_in_blocks(entries: Sequence[str], blocks: Sequence[str],
                       rows: Sequence[int | None] | None = None) -> list[Repeat]:
    """Every entry seen again in a block it already has a plot in (an error in an RCBD).

    Parameters
    ----------
    entries, blocks : sequence of str
        Entry code and block label of each plot, in file (or grid) order.
    rows : sequence of int, optional
        The spreadsheet row of each plot; the messages name rows only when they are given.
    """
    return [
        Repeat(position=k, label=entry, row=row, message=(
            f"entry '{entry}' appears {'twice' if count == 1 else 'again'} in block "
            f"'{block}'{_seen_in_rows(first_row, row)}; in an RCBD each entry has one plot per "
            "block"
        ))
        for k, (entry, block), count, first_row, row in _repeats([entries, blocks], rows)
    ]


def _repeats(keys: list[Sequence[str]], rows: Sequence[int | None] | None
             ) -> list[tuple[int, object, int, int | None, int | None]]:
    """(position, key, how many times seen before, first row, row) for each repeat."""
    columns = [_objects(key) for key in keys]
    distinct = set(columns[0]) if len(columns) == 1 else set(zip(*columns, strict=True))
    if len(distinct) == len(columns[0]):  # the usual case, found fast
        return []
    frame = pd.DataFrame({f"k{i}": column for i, column in enumerate(columns)})
    names = list(frame.columns)
    groups = frame.groupby(names, sort=False, dropna=False)
    seen_before = groups.cumcount().to_numpy()
    first_position = groups.ngroup().to_numpy()
    first_of_group = np.flatnonzero(seen_before == 0)
    first = first_of_group[first_position]
    listed = _rows(rows, len(frame))
    found = []
    for k in np.flatnonzero(seen_before > 0):
        key = tuple(frame.iat[k, j] for j in range(len(names)))
        found.append((int(k), key[0] if len(key) == 1 else key, int(seen_before[k]),
                      _row(listed[first[k]]), _row(listed[k])))
    return found


def _objects(items: Sequence[object]) -> np.ndarray:
    """The items as a numpy array of Python objects (strings are never split)."""
    return np.fromiter(items, dtype=object, count=len(items))


def _rows(rows: Sequence[int | None] | None, count: int) -> np.ndarray:
    return np.full(count, None, dtype=object) if rows is None else _objects(rows)


def _absent(cell: object) -> bool:
    """None, and the missing values of a pandas table (NaN, NA, NaT)."""
    if cell is None or cell is pd.NA or cell is pd.NaT:
        return True
    return isinstance(cell, float | np.floating) and bool(np.isnan(cell))


def _row(row: object) -> int | None:
    return None if _absent(row) else int(row)  # type: ignore[call-overload]


def _seen_in_rows(first: int | None, again: int | None) -> str:
    return "" if first is None or again is None else f" (rows {first} and {again})"


def same_code_key(code: str) -> str:
    """The entry code without case and spaces: codes with the same key are likely one entry."""
    return re.sub(r"\s+", "", code.casefold())


def similar_entry_codes(entries: Sequence[str], rows: Sequence[int | None] | None = None
                        ) -> list[SimilarCodes]:
    """Entry codes that differ only in case or spaces, grouped, in order of first appearance.

    Parameters
    ----------
    entries : sequence of str
        The entry code of each plot, in file (or grid) order.
    rows : sequence of int, optional
        The spreadsheet row of each plot; the messages name rows only when they are given.

    Examples
    --------
    >>> [s.codes for s in similar_entry_codes(["G-12", "H1", "g-12 ", "G-12"])]
    [('G-12', 'g-12 ')]
    """
    codes = _objects(entries)
    _, first = np.unique(pd.factorize(codes)[0], return_index=True)
    listed = _rows(rows, len(codes))
    spellings: dict[str, list[tuple[str, int | None]]] = {}
    for k in first:
        code = codes[k]
        spellings.setdefault(same_code_key(code), []).append(
            (code, _row(listed[k])))
    found = []
    for group in spellings.values():
        if len(group) < 2:
            continue
        if all(row is not None for _, row in group):
            shown = ", ".join(f"'{code}' first in row {row}" for code, row in group)
        else:
            shown = ", ".join(f"'{code}'" for code, _ in group)
        found.append(SimilarCodes(
            codes=tuple(code for code, _ in group),
            rows=tuple(row for _, row in group),
            row=group[1][1],
            message=f"entry codes that differ only in case or spaces ({shown}) are treated as "
            "different entries; correct them if they are one entry",
        ))
    return found


# --- the whole trial ----------------------------------------------------------------------------


def check_plots(plots: pd.DataFrame, values: pd.DataFrame, traits: pd.DataFrame, *,
                design: str) -> list[Problem]:
    """Every problem in a trial's plots and values, as the grid shows them.

    Parameters
    ----------
    plots : pandas.DataFrame
        One row per plot, columns ``plot``, ``entry`` and ``block`` (``block`` may be missing in
        a CRD), and optionally ``source_row`` (the spreadsheet row each plot was read from).
    values : pandas.DataFrame
        Same index as ``plots``; one numeric column per trait, NaN (or None) for a missing value.
    traits : pandas.DataFrame
        One row per trait with limits: column ``name``, and optionally ``low``, ``high`` and
        ``kind`` (see :func:`check_value`); None or NaN for no limit. A trait of ``values`` not
        listed here is checked without limits.
    design : {"rcbd", "crd", "alpha"}
        In an RCBD an entry may have only one plot per block.

    Returns
    -------
    list of Problem
        In this order: plots without a plot number, entry code or (in an RCBD) block; plot
        numbers seen twice; entries twice in one block (RCBD); entry codes that differ only in
        case or spaces (warnings); then, trait by trait, each value's problems
        (:func:`check_value`).

    Raises
    ------
    TrialInputError
        When the tables themselves do not fit together: a missing column, values not aligned
        with the plots, a trait listed twice or not among the values, an unknown design or kind.

    Examples
    --------
    >>> plots = pd.DataFrame({"plot": ["1", "2", "3", "4"], "block": ["1", "1", "2", "2"],
    ...                       "entry": ["A", "B", "A", "a"]})
    >>> values = pd.DataFrame({"yield": [4.1, -0.5, 4.3, 3.9]})
    >>> traits = pd.DataFrame({"name": ["yield"], "low": [0.0], "high": [12.0]})
    >>> for p in check_plots(plots, values, traits, design="rcbd"):
    ...     print(p.severity, p.plot, p.message)
    warning None entry codes that differ only in case or spaces ('A', 'a') are treated as \
different entries; correct them if they are one entry
    warning 2 -0.5 is outside the range set for trait 'yield' (0 to 12); check it against the \
field book
    """
    # An alpha design's replicates are complete blocks: its plots are checked as an RCBD's.
    alpha = isinstance(design, str) and design.strip().casefold() == "alpha"
    kind = "rcbd" if alpha else design_kind(design)
    labels = _plot_labels(plots, blocked=kind == "rcbd")
    rows = _source_rows(plots)
    found = _missing_labels(labels, rows)
    plot_of = labels["plot"]
    present = labels.notna().all(axis=1).to_numpy()
    kept = labels[present]
    kept_rows = [rows[k] for k in np.flatnonzero(present)]
    kept_plots = [plot_of.iat[k] for k in np.flatnonzero(present)]
    found += [Problem(severity="error", message=r.message, plot=r.label, trait=None, row=r.row)
              for r in repeated_plots(kept["plot"].tolist(), kept_rows)]
    if kind == "rcbd":
        found += [
            Problem(severity="error", message=r.message, plot=kept_plots[r.position],
                    trait=None, row=r.row)
            for r in repeated_in_blocks(kept["entry"].tolist(), kept["block"].tolist(),
                                        kept_rows)
        ]
    found += [Problem(severity="warning", message=s.message, plot=None, trait=None, row=s.row)
              for s in similar_entry_codes(kept["entry"].tolist(), kept_rows)]
    for trait, limits in _trait_limits(traits, values).items():
        column = _numeric_column(values, trait, plots)
        found += [
            Problem(severity=severity, message=message, plot=plot_of.iat[k], trait=trait,
                    row=rows[k])
            for k, severity, message in _value_problems(column, trait, limits)
        ]
    return found


def design_kind(design: object) -> str:
    """'rcbd' or 'crd', however the design was written ("RCBD", " crd ").

    Raises
    ------
    TrialInputError
        For any other design.
    """
    kind = design.strip().casefold() if isinstance(design, str) else None
    if kind not in _DESIGNS:
        raise TrialInputError(
            f"unknown design {design!r}; use 'rcbd' (blocks) or 'crd' (no blocks)"
        )
    return kind


def _plot_labels(plots: object, *, blocked: bool) -> pd.DataFrame:
    """The label columns as text (None where missing), whatever types the grid holds."""
    if not isinstance(plots, pd.DataFrame):
        raise TrialInputError("the plots must be a table (a pandas DataFrame)")
    needed = ["plot", "entry", "block"] if blocked else ["plot", "entry"]
    absent = [name for name in needed if name not in plots.columns]
    if absent:
        raise TrialInputError(
            f"the plots table has no column {', '.join(repr(a) for a in absent)}",
            column=absent[0],
        )
    return pd.DataFrame({
        name: pd.Series([_label_text(cell) for cell in plots[name]], index=plots.index,
                        dtype=object)
        for name in needed
    })


def _label_text(cell: object) -> str | None:
    if _absent(cell):
        return None
    text = cell_text(cell).strip()
    return None if is_missing_text(text) else text


def _source_rows(plots: pd.DataFrame) -> list[int | None]:
    if "source_row" not in plots.columns:
        return [None] * len(plots)
    return [_row(row) for row in plots["source_row"]]


def _missing_labels(labels: pd.DataFrame, rows: list[int | None]) -> list[Problem]:
    what = {"plot": "no plot number", "entry": "no entry code", "block": "no block (replicate) "
            "label"}
    found = []
    for k in np.flatnonzero(labels.isna().any(axis=1).to_numpy()):
        plot = labels["plot"].iat[k]
        for name in labels.columns:
            if labels[name].iat[k] is None:
                place = f"plot {plot}" if plot is not None else f"the plot in position {k + 1}"
                found.append(Problem(severity="error", message=f"{what[name]} for {place}",
                                     plot=plot, trait=None, row=rows[k]))
    return found


def _trait_limits(traits: object, values: object) -> dict[str, _Limits]:
    if not isinstance(traits, pd.DataFrame) or "name" not in traits.columns:
        raise TrialInputError("the traits must be a table (a pandas DataFrame) with a column "
                              "'name'")
    if not isinstance(values, pd.DataFrame):
        raise TrialInputError("the values must be a table (a pandas DataFrame)")
    listed: dict[str, _Limits] = {}
    for _, trait in traits.iterrows():
        name = trait["name"]
        if name in listed:
            raise TrialInputError(f"trait '{name}' is listed twice", column=str(name))
        if name not in values.columns:
            raise TrialInputError(f"trait '{name}' has no column of values", column=str(name))
        kind = trait.get("kind")
        listed[name] = _limits(name, trait.get("low"), trait.get("high"),
                               None if kind is None or pd.isna(kind) else kind)
    for name in values.columns:
        listed.setdefault(name, _limits(str(name), None, None, None))
    return {name: listed[name] for name in values.columns}


def _numeric_column(values: pd.DataFrame, trait: str, plots: pd.DataFrame) -> np.ndarray:
    if not values.index.equals(plots.index):
        raise TrialInputError("the values are not aligned with the plots (different index)")
    column = values[trait]
    try:
        return column.astype(np.float64).to_numpy()
    except (TypeError, ValueError) as exc:
        raise TrialInputError(f"the values of trait '{trait}' are not all numbers",
                              column=str(trait)) from exc
