"""Trial layouts before sowing: entries randomized to plots, numbered in field order.

Three designs: randomized complete blocks (``rcbd``: every replicate a complete block, entries in
random order within it), completely randomized (``crd``: all plots in one random order) and
resolvable incomplete blocks (``alpha``: each replicate split into blocks of ``k`` plots).

The alpha designs are alpha(0, 1) designs where one can be found, else alpha(0, 1, 2), built
from a generating array developed cyclically (Patterson & Williams 1976, Biometrika 63:83-92).
The array is searched for the highest efficiency factor, and that factor is reported beside the
upper bound for resolvable designs of the same size. The search depends only on the number of
entries, the block size and the replicates: the seed randomizes, it never changes the design's
quality.

Randomization uses only ``numpy.random.default_rng(seed).permutation``, which draws integers
without floating point, so a seed gives the same layout on every machine. numpy promises the
same stream only within one of its versions: a test pins an exact layout, so a change would show,
and the trial file records the numpy version that drew the layout.

Plots are numbered in field order, replicate by replicate: ``rep * 100 + k`` while a replicate has
at most 99 plots (101, 102, ...), else ``rep * 1000 + k`` (and so on). With the field's rows and
columns given, the plots fill the field replicate by replicate along the rows, row 1 first, each
row left to right (or, serpentine, every other row right to left, so that consecutive plots are
neighbours in the field).

Examples
--------
>>> layout = make_layout([f"E{i}" for i in range(1, 10)], design="alpha", reps=2, block_size=3,
...                      seed=7)
>>> layout.to_frame().groupby("rep")["entry"].nunique().tolist()
[9, 9]
>>> round(layout.efficiency.factor, 4), round(layout.efficiency.upper_bound, 4)
(0.6667, 0.6667)
"""

from __future__ import annotations

import csv
import io
import itertools
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from trialdesk.core.errors import TrialInputError
from trialdesk.core.trialfile import DESIGNS, TrialFile

__all__ = [
    "Concurrence",
    "Efficiency",
    "EntryList",
    "Layout",
    "LayoutPlot",
    "LayoutSettingError",
    "alpha_array",
    "alpha_blocks",
    "canonical_efficiency_factors",
    "efficiency_factor",
    "efficiency_upper_bound",
    "make_layout",
    "numbered_entries",
    "read_entry_list",
    "write_layout",
]

_ZERO = 1e-9  # an efficiency factor this small is zero: the design is disconnected
_CHECK_RTOL = 1e-9  # two computations of one efficiency factor agree to rounding error
_EXHAUSTIVE = 4096  # generating arrays tried one by one when there are at most this many
_STARTS = 6  # starting arrays of the exchange search (the first is i * j mod s) ...
_BUDGET = 10_000_000  # ... while the work of scoring arrays (_exchange) stays below this
_PASSES = 20  # at most this many passes of the exchange search from one start
_SEED_LIMIT = 2**63  # a seed is kept in the trial file as a 64-bit signed integer
_ZIP_MAGIC = b"PK\x03\x04"
_CODE_COLUMNS = ("entry", "code")


class LayoutSettingError(TrialInputError):
    """A layout setting that cannot be used.

    Attributes
    ----------
    setting : str
        The setting at fault, as :func:`make_layout` names it (``"block_size"``, ``"rows"``,
        ...), so a caller can point at its own field or option.
    """

    def __init__(self, message: str, *, setting: str) -> None:
        self.setting = setting
        super().__init__(message)


@dataclass(frozen=True, slots=True, kw_only=True)
class LayoutPlot:
    """One plot of a layout: its label, where it lies and what is sown in it."""

    plot: str
    rep: int | None
    incomplete_block: int | None
    row: int | None
    column: int | None
    entry: str
    is_check: bool


@dataclass(frozen=True, slots=True, kw_only=True)
class Efficiency:
    """The efficiency factor of an incomplete-block design and the most it could be.

    ``factor`` is the harmonic mean of the canonical efficiency factors; ``upper_bound`` the
    bound for resolvable designs of this size (:func:`efficiency_upper_bound`).
    """

    factor: float
    upper_bound: float


@dataclass(frozen=True, slots=True, kw_only=True)
class Concurrence:
    """How often pairs of entries share a block.

    ``maximum`` is the most blocks any pair shares; ``counts`` holds (blocks shared, pairs) for
    every number of blocks shared, fewest first.
    """

    maximum: int
    counts: tuple[tuple[int, int], ...]


@dataclass(frozen=True, slots=True, kw_only=True)
class EntryList:
    """Entry codes read from a file, in its order, and their names where given."""

    codes: tuple[str, ...]
    names: tuple[tuple[str, str], ...]

    def name_map(self) -> dict[str, str]:
        """The names by entry code."""
        return dict(self.names)


@dataclass(frozen=True, slots=True, kw_only=True)
class Layout:
    """A randomized field layout, and the settings it was made with.

    ``plots`` are in field order. ``entries`` lists every entry (the checks included) in the
    order given; ``generating_array`` is the alpha design's array (``k`` rows, ``r`` columns),
    None for the other designs. ``efficiency`` is given for alpha designs only; ``concurrence``
    counts shared blocks (incomplete blocks in an alpha design, replicates in an RCBD) and is
    None for a completely randomized design.
    """

    design: str
    seed: int
    reps: int
    block_size: int | None
    rows: int | None
    columns: int | None
    serpentine: bool
    entries: tuple[str, ...]
    checks: tuple[str, ...]
    plots: tuple[LayoutPlot, ...]
    efficiency: Efficiency | None
    concurrence: Concurrence | None
    generating_array: tuple[tuple[int, ...], ...] | None

    def to_frame(self) -> pd.DataFrame:
        """The plots in field order: ``plot``, ``rep``, ``incomplete_block``, ``row``,
        ``column``, ``entry`` and ``is_check`` (positions Int64, ``<NA>`` where not known)."""
        def whole(name: str) -> pd.arrays.IntegerArray:
            return pd.array([getattr(p, name) for p in self.plots], dtype="Int64")

        return pd.DataFrame({
            "plot": pd.Series([p.plot for p in self.plots], dtype="str"),
            "rep": whole("rep"),
            "incomplete_block": whole("incomplete_block"),
            "row": whole("row"),
            "column": whole("column"),
            "entry": pd.Series([p.entry for p in self.plots], dtype="str"),
            "is_check": np.array([p.is_check for p in self.plots], dtype=bool),
        })

    def text(self) -> str:
        """The summary the command line prints."""
        entries = f"{len(self.entries)} entries ({len(self.checks)} checks)"
        if self.design == "alpha":
            blocks = len(self.entries) // self.block_size
            lines = [f"Alpha design: {entries} in {self.reps} replicates, each of {blocks} "
                     f"incomplete blocks of {self.block_size} plots: {len(self.plots)} plots."]
        elif self.design == "rcbd":
            lines = [f"Randomized complete blocks: {entries} in {self.reps} replicates: "
                     f"{len(self.plots)} plots."]
        else:
            lines = [f"Completely randomized: {entries}, {self.reps} plots each: "
                     f"{len(self.plots)} plots."]
        lines.append(f"Plots {_plot_ranges(self.plots)}.")
        if self.rows is not None:
            order = "" if self.design == "crd" else " replicate by replicate"
            lines.append(f"Field of {self.rows} rows x {self.columns} columns, filled{order} "
                         "along the rows"
                         + (", serpentine." if self.serpentine else ", each row left to right."))
        if self.efficiency is not None:
            factor, bound = self.efficiency.factor, self.efficiency.upper_bound
            lines.append(f"Efficiency factor {factor:.4f}; the upper bound for this size is "
                         f"{bound:.4f} ({100 * factor / bound:.1f}% of it).")
        if self.concurrence is not None:
            lines.append(_concurrence_text(self.concurrence, self.design))
        lines.append(f"Seed {self.seed}.")
        return "\n".join(lines)


def numbered_entries(count: int) -> tuple[str, ...]:
    """Entry codes ``E001``, ``E002``, ... for ``count`` entries (more digits above 999).

    >>> numbered_entries(3)
    ('E001', 'E002', 'E003')
    """
    if isinstance(count, bool) or not isinstance(count, int) or count < 1:
        raise LayoutSettingError(f"the number of entries must be a whole number of 1 or more, "
                                 f"not {count!r}", setting="entries")
    width = max(3, len(str(count)))
    return tuple(f"E{i:0{width}d}" for i in range(1, count + 1))


def read_entry_list(path: str | os.PathLike[str]) -> EntryList:
    """Read entry codes from a text file: one code a line, or a CSV with a column of codes.

    A file whose first line names a column ``entry`` or ``code`` (any case) is read as a table:
    that column holds the codes, and a column ``name``, if there is one, their names. Any other
    file holds one code a line. Blank lines are skipped.

    Raises
    ------
    TrialInputError
        When the file cannot be read, a code is empty or appears twice (naming the row).
    """
    from trialdesk.core.fieldbook import _decode, _read_bytes, _sniff_delimiter

    source = os.fsdecode(os.fspath(path))
    data = _read_bytes(source)
    if data.startswith(_ZIP_MAGIC):
        raise TrialInputError("an entry list is read from a CSV or text file: save the sheet as "
                              "CSV", file=source)
    text = _decode(data, source)
    try:
        rows = list(csv.reader(io.StringIO(text, newline=""), delimiter=_sniff_delimiter(text)))
    except csv.Error as exc:
        raise TrialInputError(f"the file cannot be read as CSV ({exc})", file=source) from None
    header = [cell.strip().lower() for cell in rows[0]] if rows else []
    code_at = next((header.index(c) for c in _CODE_COLUMNS if c in header), None)
    name_at = header.index("name") if "name" in header else None
    if code_at is None and max((len(r) for r in rows), default=0) > 1:
        raise TrialInputError("the entry list has several columns but none named entry or "
                              "code", file=source, row=1)
    first = 0 if code_at is None else 1
    codes: list[str] = []
    names: list[tuple[str, str]] = []
    seen: dict[str, int] = {}
    for number, cells in enumerate(rows[first:], start=first + 1):
        if not any(cell.strip() for cell in cells):
            continue
        code = _cell(cells, 0 if code_at is None else code_at)
        column = None if code_at is None else rows[0][code_at].strip()
        if not code:
            raise TrialInputError("the entry code is empty", file=source, row=number,
                                  column=column)
        if code in seen:
            raise TrialInputError(f"the entry {code!r} appears twice (first on row "
                                  f"{seen[code]})", file=source, row=number, column=column)
        seen[code] = number
        codes.append(code)
        name = _cell(cells, name_at) if name_at is not None else ""
        if name:
            names.append((code, name))
    if not codes:
        raise TrialInputError("the entry list holds no entry codes", file=source)
    return EntryList(codes=tuple(codes), names=tuple(names))


def _cell(cells: list[str], index: int) -> str:
    return cells[index].strip() if index < len(cells) else ""


# -- making a layout ------------------------------------------------------------------------------


def make_layout(
    entries: Sequence[str],
    *,
    checks: Sequence[str] = (),
    design: str,
    reps: int,
    block_size: int | None = None,
    rows: int | None = None,
    columns: int | None = None,
    serpentine: bool = False,
    seed: int,
) -> Layout:
    """Randomize entries to plots and number the plots in field order.

    Parameters
    ----------
    entries : sequence of str
        Entry codes. Checks not among them are added after them.
    checks : sequence of str
        The check entries (each sown once per replicate, like any entry).
    design : {"rcbd", "crd", "alpha"}
        Randomized complete blocks, completely randomized, or resolvable incomplete blocks.
    reps : int
        Replicates, 2 or more (in a completely randomized design: plots of each entry).
    block_size : int, optional
        Plots per incomplete block (alpha only); it must divide the number of entries.
    rows, columns : int, optional
        The field's rows and columns, given together; rows x columns must hold all plots.
    serpentine : bool
        Turn every other field row back (needs rows and columns).
    seed : int
        Seed of the randomization, 0 or more: the same seed gives the same layout.

    Returns
    -------
    Layout

    Raises
    ------
    LayoutSettingError
        When a setting cannot be used; ``setting`` names it.
    TrialInputError
        When the design built fails one of its checks (every entry once per replicate, each
        plot once, blocks of ``k`` plots, pairs sharing at most two blocks, the efficiency
        factor within its bound); this does not happen unless the program is wrong.
    """
    codes, check_codes = _treatments(entries, checks)
    _check_settings(design, reps, block_size, rows, columns, serpentine, seed, len(codes))
    reps, seed, serpentine = int(reps), int(seed), bool(serpentine)
    block_size, rows, columns = (None if x is None else int(x) for x in (block_size, rows, columns))
    rng = np.random.default_rng(seed)
    array = None
    if design == "alpha":
        array = alpha_array(len(codes), block_size, reps)
        sequence = _alpha_sequence(codes, array, rng)
    elif design == "rcbd":
        sequence = [(rep, None, codes[i]) for rep in range(1, reps + 1)
                    for i in rng.permutation(len(codes))]
    else:
        sequence = [(None, None, codes[i % len(codes)])
                    for i in rng.permutation(len(codes) * reps)]
    plots = _place(sequence, set(check_codes), rows, columns, serpentine)
    _check_plots(plots, codes, design, reps, block_size)
    concurrence = None if design == "crd" else _concurrence(plots, codes)
    efficiency = None
    if array is not None:
        efficiency = _alpha_efficiency(plots, codes, array, reps)
        if concurrence.maximum > 2:
            raise TrialInputError("design construction failed: a pair of entries shares "
                                  f"{concurrence.maximum} incomplete blocks")
    return Layout(
        design=design, seed=seed, reps=reps, block_size=block_size, rows=rows,
        columns=columns, serpentine=serpentine, entries=codes, checks=check_codes,
        plots=tuple(plots), efficiency=efficiency, concurrence=concurrence,
        generating_array=None if array is None else tuple(map(tuple, array.tolist())),
    )


def _treatments(entries: Sequence[str], checks: Sequence[str]
                ) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """All entry codes (the checks added after the others) and the checks, each checked."""
    if isinstance(entries, str) or isinstance(checks, str):
        raise LayoutSettingError("give the entries and the checks as lists of codes",
                                 setting="entries" if isinstance(entries, str) else "checks")
    for setting, codes in (("entries", entries), ("checks", checks)):
        seen: set[str] = set()
        for code in codes:
            if not isinstance(code, str) or not code.strip():
                raise LayoutSettingError(f"an entry code must be non-empty text, not {code!r}",
                                         setting=setting)
            if code in seen:
                raise LayoutSettingError(f"the entry {code!r} is given twice", setting=setting)
            seen.add(code)
    given = set(entries)
    codes = (*entries, *(c for c in checks if c not in given))
    if len(codes) < 2:
        raise LayoutSettingError("a trial needs at least 2 entries", setting="entries")
    return codes, tuple(checks)


def _check_settings(design: str, reps: int, block_size: int | None, rows: int | None,
                    columns: int | None, serpentine: bool, seed: int, t: int) -> None:
    if design not in DESIGNS:
        raise LayoutSettingError(f"the design is one of {', '.join(DESIGNS)}, not {design!r}",
                                 setting="design")
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or not (
            0 <= seed < _SEED_LIMIT):
        raise LayoutSettingError(f"the seed must be a whole number from 0 to {_SEED_LIMIT - 1}, "
                                 f"not {seed!r}", setting="seed")
    _whole(reps, "the number of replicates", "reps", low=2)
    if design == "alpha":
        if block_size is None:
            raise LayoutSettingError("an alpha design needs a block size", setting="block_size")
        _whole(block_size, "the block size", "block_size", low=2)
        if block_size >= t:
            raise LayoutSettingError(f"a block size of {block_size} leaves one block per "
                                     f"replicate for {t} entries; choose a smaller block, or "
                                     "randomized complete blocks", setting="block_size")
        if t % block_size:
            raise LayoutSettingError(_not_dividing(t, block_size), setting="block_size")
    elif block_size is not None:
        raise LayoutSettingError("a block size is for alpha designs only; leave it out",
                                 setting="block_size")
    if (rows is None) != (columns is None):
        raise LayoutSettingError("give the field's rows and columns together",
                                 setting="columns" if columns is None else "rows")
    if rows is not None:
        _whole(rows, "the number of field rows", "rows", low=1)
        _whole(columns, "the number of field columns", "columns", low=1)
        if rows * columns < t * reps:
            raise LayoutSettingError(f"a field of {rows} rows x {columns} columns has "
                                     f"{rows * columns} places, fewer than the {t * reps} plots",
                                     setting="rows")
    if not isinstance(serpentine, bool | np.bool_):
        raise LayoutSettingError(f"serpentine is True or False, not {serpentine!r}",
                                 setting="serpentine")
    if serpentine and rows is None:
        raise LayoutSettingError("serpentine numbering needs the field's rows and columns",
                                 setting="serpentine")


def _whole(value: object, what: str, setting: str, *, low: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < low:
        raise LayoutSettingError(f"{what} must be a whole number of {low} or more, not "
                                 f"{value!r}", setting=setting)


def _not_dividing(t: int, k: int) -> str:
    """Why a block size cannot be used, and what could be."""
    sizes = [d for d in range(2, t // 2 + 1) if t % d == 0]
    extra = -t % k
    advice = (f"block sizes that divide {t}: {', '.join(map(str, sizes))}; or "
              if sizes else "")
    return (f"a block size of {k} does not divide the {t} entries (checks "
            f"included): an alpha design here has blocks of one size, entries = blocks x block "
            f"size; {advice}add {extra} entries to make {t + extra}")


def _alpha_sequence(codes: tuple[str, ...], array: np.ndarray, rng: np.random.Generator
                    ) -> list[tuple[int, int, str]]:
    """Plots of an alpha design in field order: (replicate, incomplete block, entry).

    Entries are randomized to the design's treatment numbers, then in each replicate the blocks,
    then the plots within each block (Patterson & Williams 1976, Biometrika 63:83-92).
    """
    k, reps = array.shape
    s = len(codes) // k
    blocks = alpha_blocks(array, s)
    label = rng.permutation(len(codes))  # treatment number n is sown with entry codes[label[n]]
    sequence = []
    for rep in range(reps):
        for position, block in enumerate(rng.permutation(s), start=1):
            sequence.extend((rep + 1, position, codes[label[blocks[rep, block, p]]])
                            for p in rng.permutation(k))
    return sequence


def _place(sequence: list[tuple[int | None, int | None, str]], checks: set[str],
           rows: int | None, columns: int | None, serpentine: bool) -> list[LayoutPlot]:
    """Number the plots in field order and put them in the field, replicate by replicate."""
    per_group: dict[int | None, int] = {}
    for rep, _block, _entry in sequence:
        per_group[rep] = per_group.get(rep, 0) + 1
    step = 10 ** max(2, len(str(max(per_group.values()))))  # 101..199, or 1001..1999, ...
    counters = dict.fromkeys(per_group, 0)
    plots = []
    for position, (rep, block, entry) in enumerate(sequence):
        counters[rep] += 1
        row = column = None
        if rows is not None:
            row, across = divmod(position, columns)
            if serpentine and row % 2 == 1:
                across = columns - 1 - across
            row, column = row + 1, across + 1
        plots.append(LayoutPlot(plot=str((rep or 1) * step + counters[rep]), rep=rep,
                                incomplete_block=block, row=row, column=column, entry=entry,
                                is_check=entry in checks))
    return plots


def _check_plots(plots: list[LayoutPlot], codes: tuple[str, ...], design: str, reps: int,
                 block_size: int | None) -> None:
    """Every entry once per replicate (RCBD, alpha) or ``reps`` times (CRD), each plot once,
    and incomplete blocks of ``block_size`` plots."""
    def failed(what: str) -> TrialInputError:
        return TrialInputError(f"design construction failed: {what}")

    labels = [p.plot for p in plots]
    if len(set(labels)) != len(labels):
        raise failed("a plot number is used twice")
    if design == "crd":
        counts = pd.Series([p.entry for p in plots]).value_counts()
        if len(counts) != len(codes) or (counts != reps).any():
            raise failed(f"an entry does not have {reps} plots")
        return
    for rep in range(1, reps + 1):
        sown = sorted(p.entry for p in plots if p.rep == rep)
        if sown != sorted(codes):
            raise failed(f"replicate {rep} does not hold every entry once")
    if design == "alpha":
        sizes = pd.Series([(p.rep, p.incomplete_block) for p in plots]).value_counts()
        if len(sizes) != reps * len(codes) // block_size or (sizes != block_size).any():
            raise failed(f"an incomplete block does not have {block_size} plots")


# -- alpha designs --------------------------------------------------------------------------------


def alpha_blocks(array: np.ndarray, s: int) -> np.ndarray:
    """The blocks of the alpha design made from a generating array, before randomization.

    Parameters
    ----------
    array : ndarray of int, shape (k, r)
        The generating array, entries in 0 .. s - 1.
    s : int
        Blocks per replicate.

    Returns
    -------
    ndarray of int, shape (r, s, k)
        ``blocks[j, l]`` holds the treatment numbers (0 .. s k - 1) of block ``l`` of replicate
        ``j``: treatment ``i s + (alpha[i, j] + l) mod s`` for each row ``i`` of the array
        (Patterson & Williams 1976, Biometrika 63:83-92: cyclic development mod s).
    """
    array = np.asarray(array, dtype=np.int64)
    k = array.shape[0]
    shifts = np.arange(s)
    return (np.arange(k)[None, None, :] * s
            + (array.T[:, None, :] + shifts[None, :, None]) % s)


def alpha_array(t: int, k: int, r: int) -> np.ndarray:
    """The generating array of the alpha design for ``t`` entries in blocks of ``k``, ``r``
    replicates: the one found with the fewest shared blocks per pair, then the highest
    efficiency factor.

    The array has ``k`` rows and ``r`` columns of numbers mod ``s = t / k``, its first row and
    column zero (Patterson & Williams 1976, Biometrika 63:83-92). Two entries from rows ``i`` and
    ``i'`` share as many blocks as there are replicates ``j`` with the same difference
    ``alpha[i, j] - alpha[i', j]`` mod s, so alpha(0, 1) designs (no pair together twice) are
    preferred. When there are at most a few thousand arrays, every one is tried; otherwise an
    exchange search changes one number at a time, from ``alpha[i, j] = i j mod s`` and from a
    few arrays drawn by a generator seeded with (t, k, r).

    Raises
    ------
    LayoutSettingError
        (``block_size``) When no array lets every pair of entries share at most two blocks, or
        every array found gives a disconnected design.
    """
    s = t // k
    free = (k - 1) * (r - 1)
    if s**free <= _EXHAUSTIVE:
        array, concurrence, factor = _best_of_all(s, k, r)
    else:
        rng = np.random.default_rng([t, k, r])
        found, spent = [], 0
        for start in range(_STARTS):
            if spent >= _BUDGET:
                break
            if start == 0:
                array = np.outer(np.arange(k), np.arange(r)) % s
            else:
                array = rng.integers(0, s, size=(k, r))
                array[0, :] = array[:, 0] = 0
            *result, work = _exchange(array, s)
            found.append(result)
            spent += work
        array, concurrence, factor = max(found, key=lambda best: (-best[1], best[2]))
    if concurrence > 2 or factor <= 0:
        raise LayoutSettingError(
            f"no alpha design was found for {t} entries in blocks of {k} with {r} replicates in "
            "which every pair of entries shares at most two blocks and all entries are "
            "compared; choose a smaller block size (more blocks per replicate)",
            setting="block_size")
    return array


def _best_of_all(s: int, k: int, r: int) -> tuple[np.ndarray, int, float]:
    """The best of every generating array with first row and column zero."""
    free = (k - 1) * (r - 1)
    cells = np.array(list(itertools.product(range(s), repeat=free)), dtype=np.int64)
    arrays = np.zeros((len(cells), k, r), dtype=np.int64)
    arrays[:, 1:, 1:] = cells.reshape(len(cells), k - 1, r - 1)
    concurrence, factor = _array_scores(arrays, s)
    best = int(np.lexsort((-factor, concurrence))[0])
    return arrays[best], int(concurrence[best]), float(factor[best])


def _exchange(start: np.ndarray, s: int) -> tuple[np.ndarray, int, float, int]:
    """Improve an array one number at a time, trying every value of each free cell in turn.

    Returns the array, its largest pair concurrence and efficiency factor, and the work done:
    the numbers scored, each array's k r cells times its s / 2 frequencies and k rows."""
    best = start.copy()
    k, r = best.shape
    concurrence, factor = (float(x[0]) for x in _array_scores(best[None], s))
    work = 0
    for _ in range(_PASSES):
        improved = False
        for i, j in itertools.product(range(1, k), range(1, r)):
            trials = np.repeat(best[None], s, axis=0)
            trials[:, i, j] = np.arange(s)
            shared, factors = _array_scores(trials, s)
            work += s * k * r * (s // 2 + k)
            pick = int(np.lexsort((-factors, shared))[0])
            if (shared[pick], -factors[pick]) < (concurrence, -factor - _ZERO):
                best = trials[pick]
                concurrence, factor = float(shared[pick]), float(factors[pick])
                improved = True
        if not improved:
            break
    return best, int(concurrence), factor, work


def _array_scores(arrays: np.ndarray, s: int) -> tuple[np.ndarray, np.ndarray]:
    """For each generating array (shape (m, k, r)): the most blocks a pair of entries shares,
    and the efficiency factor (0 for a disconnected design)."""
    m, k, r = arrays.shape
    t = s * k
    # Rows i, i' share a block in replicate j for the pairs whose difference is that of column j
    # (Patterson & Williams 1976, Biometrika 63:83-92).
    differences = (arrays[:, :, None, :] - arrays[:, None, :, :]) % s
    repeats = (differences[..., :, None] == differences[..., None, :]).sum(axis=-1).max(axis=-1)
    upper = np.triu_indices(k, 1)
    concurrence = repeats[:, upper[0], upper[1]].max(axis=1)
    # N N' is block-circulant over Z_s: at frequency w it is A A^H, A[i, j] = exp(2 pi i w
    # alpha[i, j] / s), so the canonical efficiency factors are 1 - mu / (r k) for the
    # eigenvalues mu of A A^H, w = 1 .. s - 1; at w = 0 they are 0 (the mean) and 1 (k - 1
    # times) (John & Williams 1995, Cyclic and Computer Generated Designs, 2nd ed., from
    # memory; checked against the full information matrix in the tests). Frequencies
    # w and s - w give conjugate matrices, with the same eigenvalues: w up to s / 2 suffice.
    roots = np.exp(2j * np.pi * np.arange(s) / s)
    half = np.arange(1, s // 2 + 1)
    weight = np.where(2 * half == s, 1.0, 2.0)
    if r <= k:  # A^H A, r x r, has the same non-zero eigenvalues as A A^H
        between = arrays[:, :, None, :] - arrays[:, :, :, None]  # alpha[i, b] - alpha[i, a]
        gram = roots[(half[:, None, None, None] * between[:, None]) % s].sum(axis=2)
    else:
        gram = roots[(half[:, None, None, None] * differences[:, None]) % s].sum(axis=-1)
    factors = 1.0 - np.linalg.eigvalsh(gram) / (r * k)
    ones = (k - 1) + (s - 1) * (k - min(k, r))  # efficiency factors equal to 1
    connected = (factors > _ZERO).all(axis=(1, 2))
    inverse = ones + (weight[:, None] / np.where(factors > _ZERO, factors, 1.0)).sum(axis=(1, 2))
    # The efficiency factor is the harmonic mean of the canonical efficiency factors
    # (John & Williams 1995, Cyclic and Computer Generated Designs, 2nd ed., from
    # memory).
    factor = np.where(connected, (t - 1) / inverse, 0.0)
    return concurrence, factor


def canonical_efficiency_factors(blocks: Sequence[Sequence[int]], t: int) -> np.ndarray:
    """The canonical efficiency factors of an equireplicate design with blocks of one size.

    Parameters
    ----------
    blocks : sequence of sequences of int
        Each block's treatment numbers (0 .. t - 1), no treatment twice in a block.
    t : int
        Number of treatments.

    Returns
    -------
    ndarray
        The t - 1 eigenvalues of ``C / r`` other than the one for the overall mean, ascending:
        ``C = r I - N N' / k`` (John & Williams 1995, Cyclic and Computer Generated Designs,
        2nd ed., from memory). A zero means the design is disconnected.
    """
    blocks = np.asarray(blocks, dtype=np.int64)
    n_blocks, k = blocks.shape
    r = n_blocks * k // t
    incidence = np.zeros((t, n_blocks))
    incidence[blocks, np.arange(n_blocks)[:, None]] = 1.0
    information = r * np.eye(t) - incidence @ incidence.T / k  # C = r I - N N'/k
    roots = np.linalg.eigvalsh(information / r)
    return np.clip(roots[1:], 0.0, None)  # the smallest is the overall mean's 0


def efficiency_factor(factors: np.ndarray) -> float:
    """The efficiency factor: the harmonic mean of canonical efficiency factors, 0 when one is 0.

    ``E = (t - 1) / sum(1 / e_i)`` (John & Williams 1995, Cyclic and Computer Generated Designs,
    2nd ed., from memory).
    """
    factors = np.asarray(factors, dtype=float)
    if (factors <= _ZERO).any():
        return 0.0
    return float(len(factors) / np.sum(1.0 / factors))


def efficiency_upper_bound(t: int, k: int, r: int) -> float:
    """The upper bound of the efficiency factor of a resolvable design: ``t`` entries, blocks of
    ``k``, ``r`` replicates (``s = t / k`` blocks in each).

    ``E <= (t - 1)(r - 1) / ((t - 1)(r - 1) + r (s - 1))`` (Patterson & Williams 1976,
    Biometrika 63:83-92, from memory) holds while ``r (s - 1) <= t - 1``; it is reached by
    square lattices with two or three replicates. The efficiency factors sum to ``t - s`` and
    all but ``r (s - 1)`` of them are 1, so the harmonic mean is largest when those are equal,
    which gives that bound; when ``r (s - 1) > t - 1`` all may be equal, and the bound is then
    ``(t - s) / (t - 1)``, the efficiency factor of a balanced incomplete block design.

    >>> efficiency_upper_bound(9, 3, 2)  # the simple 3 x 3 lattice: (k + 1) / (k + 3)
    0.6666666666666666
    """
    s = t // k
    if r * (s - 1) <= t - 1:
        # Patterson & Williams 1976, Biometrika 63:83-92 (from memory).
        return (t - 1) * (r - 1) / ((t - 1) * (r - 1) + r * (s - 1))
    return (t - s) / (t - 1)  # all t - 1 efficiency factors equal, summing to t - s


def _alpha_efficiency(plots: list[LayoutPlot], codes: tuple[str, ...], array: np.ndarray,
                      reps: int) -> Efficiency:
    """The laid-out design's efficiency factor, checked against the array's and the bound."""
    t, k = len(codes), array.shape[0]
    factor = efficiency_factor(canonical_efficiency_factors(_blocks_of(plots, codes), t))
    from_array = float(_array_scores(array[None], t // k)[1][0])
    bound = efficiency_upper_bound(t, k, reps)
    if not np.isclose(factor, from_array, rtol=_CHECK_RTOL, atol=0.0):
        raise TrialInputError(f"design construction failed: the efficiency factor is {factor} "
                              f"from the plots but {from_array} from the generating array")
    if not 0.0 < factor <= bound * (1 + _CHECK_RTOL):
        raise TrialInputError(f"design construction failed: the efficiency factor {factor} is "
                              f"not within (0, {bound}]")
    return Efficiency(factor=factor, upper_bound=bound)


def _blocks_of(plots: list[LayoutPlot], codes: tuple[str, ...]) -> list[list[int]]:
    """Each block's entries as numbers: the incomplete blocks, else the replicates."""
    number = {code: i for i, code in enumerate(codes)}
    blocks: dict[tuple[int | None, int | None], list[int]] = {}
    for p in plots:
        blocks.setdefault((p.rep, p.incomplete_block), []).append(number[p.entry])
    return list(blocks.values())


def _concurrence(plots: list[LayoutPlot], codes: tuple[str, ...]) -> Concurrence:
    t = len(codes)
    blocks = _blocks_of(plots, codes)
    incidence = np.zeros((t, len(blocks)))
    for b, members in enumerate(blocks):
        incidence[members, b] = 1
    shared = (incidence @ incidence.T)[np.triu_indices(t, 1)]
    values, counts = np.unique(shared, return_counts=True)
    return Concurrence(maximum=int(values[-1]),
                       counts=tuple(zip(values.tolist(), counts.tolist(), strict=True)))


# -- text -----------------------------------------------------------------------------------------


def _plot_ranges(plots: Sequence[LayoutPlot]) -> str:
    ranges: dict[int | None, list[str]] = {}
    for p in plots:
        ranges.setdefault(p.rep, []).append(p.plot)
    return ", ".join(f"{min(labels, key=int)}-{max(labels, key=int)}"
                     for labels in ranges.values())


def _times(n: int) -> str:
    return {0: "never", 1: "once", 2: "twice"}.get(n, f"{n} times")


def _concurrence_text(concurrence: Concurrence, design: str) -> str:
    if design == "rcbd":
        return "Every replicate holds every entry once."
    counts = ", ".join(f"{_times(n)} {pairs}" for n, pairs in concurrence.counts)
    return (f"Pairs of entries sharing an incomplete block: {counts} (at most "
            f"{_times(concurrence.maximum)}).")


# -- writing --------------------------------------------------------------------------------------


def write_layout(
    layout: Layout,
    path: str | os.PathLike[str],
    *,
    facts: Mapping[str, object] | None = None,
    traits: Sequence[str] = ("grain_yield",),
    names: Mapping[str, str] | None = None,
) -> Path:
    """Write a layout as a new trial file, its plots waiting for values.

    Parameters
    ----------
    layout : Layout
        The layout.
    path : str or path-like
        The new trial file (``.trial``); an existing file is never written over.
    facts : mapping, optional
        Trial facts (the trial's ``name`` defaults to the file name). The design and the seed
        (``layout_seed``) are set from the layout.
    traits : sequence of str
        The traits to record, in order (one name alone is taken as a list of one).
    names : mapping, optional
        Entry names by code.

    Returns
    -------
    pathlib.Path
        The trial file. All the layout's settings (replicates, block size, field rows and
        columns, serpentine, generating array, efficiency factor) are saved in it as the
        settings named ``layout``; checks are marked among the entries.

    Raises
    ------
    TrialInputError
        When the file exists, a fact contradicts the layout, or a trait name is not acceptable.
    """
    target = Path(path)
    if os.path.lexists(target):
        raise TrialInputError("the file exists already; a layout is never written over a file: "
                              "choose a new name", file=str(target))
    facts = dict(facts or {})
    for key, value in (("design", layout.design), ("layout_seed", layout.seed)):
        if facts.get(key) not in (None, value):
            raise TrialInputError(f"the fact '{key}' is {facts[key]!r} but the layout's is "
                                  f"{value!r}", file=str(target))
        facts[key] = value
    name = facts.pop("name", None) or target.stem
    names = dict(names or {})
    checks = set(layout.checks)
    entries = pd.DataFrame({
        "code": list(layout.entries),
        "name": [names.get(code) for code in layout.entries],
        "role": ["check" if code in checks else "test" for code in layout.entries],
    })
    frame = layout.to_frame()
    plots = pd.DataFrame({
        "plot": frame["plot"].to_numpy(),
        "block": [None if pd.isna(x) else str(x) for x in frame["rep"]],
        "incomplete_block": [None if pd.isna(x) else str(x) for x in frame["incomplete_block"]],
        "row": frame["row"],
        "column": frame["column"],
        "entry": frame["entry"].to_numpy(),
    })
    trait_names = [traits] if isinstance(traits, str) else list(traits)
    values = pd.DataFrame(np.nan, index=plots["plot"].to_numpy(), columns=trait_names)
    trial = TrialFile.create(target, name=name, facts=facts)
    try:
        with trial:
            trial.save_settings(_settings_record(layout), name="layout")
            if layout.checks:  # keep the checks in the order they were named
                trial.save_settings({"checks": list(layout.checks)})
            trial.load_plots(entries=entries, plots=plots,
                             traits=pd.DataFrame({"name": trait_names}, dtype=object),
                             values=values)
    except BaseException:
        for suffix in ("", "-wal", "-shm", ".lock"):
            Path(f"{target}{suffix}").unlink(missing_ok=True)
        raise
    return target


def _settings_record(layout: Layout) -> dict[str, object]:
    """What the trial file keeps of how its layout was made."""
    efficiency = layout.efficiency
    return {
        "design": layout.design,
        "seed": layout.seed,
        "reps": layout.reps,
        "block_size": layout.block_size,
        "rows": layout.rows,
        "columns": layout.columns,
        "serpentine": layout.serpentine,
        "generating_array": (None if layout.generating_array is None
                             else [list(row) for row in layout.generating_array]),
        "efficiency_factor": None if efficiency is None else efficiency.factor,
        "efficiency_upper_bound": None if efficiency is None else efficiency.upper_bound,
        "randomized_with": f"numpy {np.__version__}",
    }
