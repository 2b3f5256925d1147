"""Grouping letters: a compact letter display of which entries a method declared different.

Entries that share a letter were not declared different; entries with no letter in common were. The
letters come from the insert-and-absorb algorithm followed by a sweep that removes redundant letters
(Piepho 2004, J. Comput. Graph. Stat. 13:456-466). Work is done on boolean numpy arrays whose rows
are letters and whose columns are entries, best mean first.
"""

from __future__ import annotations

import string

import numpy as np
from numpy.typing import ArrayLike

from trialdesk.core.errors import TrialInputError

__all__ = ["grouping_letters"]

_SYMBOLS = string.ascii_lowercase + string.ascii_uppercase


def grouping_letters(
    means: ArrayLike, different: np.ndarray, *, higher_is_better: bool = True
) -> list[str]:
    """Grouping letters for ``t`` entries from the pairs a method declared different.

    Parameters
    ----------
    means : array_like
        The ``t`` entry means, in any order; the result is in the same order. NaN marks an entry
        whose mean could not be estimated: it gets ``""`` and its row and column of ``different``
        are ignored.
    different : numpy.ndarray
        ``t`` x ``t`` boolean, symmetric: True where the method declared the pair different. The
        diagonal is ignored. Any symmetric pattern is accepted, including non-transitive ones
        (A like B, B like C, A unlike C).
    higher_is_better : bool, default True
        True when the highest mean is best (yield), False when the lowest is (lodging, disease).

    Returns
    -------
    list of str
        One string per entry. Two entries share a letter exactly when they were not declared
        different. The best entry gets ``"a"``, and letters run in order of the best mean in each
        group. Each string lists its letters in the order of the letter sequence (``"abc"``).

    Raises
    ------
    TrialInputError
        If ``means`` is not one-dimensional, or ``different`` is not a square boolean table with one
        row per entry, or is not symmetric.

    Notes
    -----
    Letter sequence: ``a`` .. ``z``, then ``A`` .. ``Z``, then ``a1`` .. ``z1``, ``A1`` .. ``Z1``,
    ``a2`` and so on. Every letter is one Latin letter followed by an optional cycle number, so a
    string such as ``"Za1b1"`` reads back unambiguously as ``Z``, ``a1``, ``b1``.

    Entries are ranked best first (ties keep the order given). Insert-and-absorb starts from one
    letter shared by all entries; for each entry in rank order, every letter held by that entry and
    by any entry declared different from it is split in two: one copy without the entry, one without
    those partners. A new letter contained in another letter is absorbed (dropped) at once. The
    letters left are the maximal groups of entries with no declared difference among them. The sweep
    then visits the letters in display order and takes each one away from every entry that keeps
    another letter and shares some other letter with every holder of this one. Afterwards no single
    letter can be removed from any entry without breaking the display. The result depends only on
    the means and the pattern, so it is reproducible.

    References
    ----------
    Piepho, H.-P. (2004). An algorithm for a letter-based representation of all-pairwise
    comparisons. J. Comput. Graph. Stat. 13:456-466.

    Examples
    --------
    Entry 1 is unlike entry 3; entry 2 is like both:

    >>> different = np.array([[False, False, True], [False, False, False], [True, False, False]])
    >>> grouping_letters([5.1, 4.6, 4.0], different)
    ['a', 'ab', 'b']
    """
    mean, declared = _validated(means, different)
    estimable = np.flatnonzero(~np.isnan(mean))
    letters = [""] * mean.size
    if estimable.size == 0:
        return letters
    score = -mean[estimable] if higher_is_better else mean[estimable]
    ranked = estimable[np.argsort(score, kind="stable")]  # best first; ties keep the order given
    pattern = declared[np.ix_(ranked, ranked)]
    np.fill_diagonal(pattern, False)
    groups = _in_letter_order(_sweep(_in_letter_order(_insert_and_absorb(pattern))))
    for rank, entry in enumerate(ranked):
        letters[entry] = "".join(_symbol(k) for k in np.flatnonzero(groups[:, rank]))
    return letters


def _validated(means: ArrayLike, different: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    mean = np.asarray(means, dtype=float)
    if mean.ndim != 1:
        raise TrialInputError("Entry means must be a single list, one mean per entry.")
    declared = np.asarray(different)
    t = mean.size
    if declared.shape != (t, t):
        raise TrialInputError(
            f"The table of declared differences must have one row and one column per entry "
            f"({t} x {t}), not {' x '.join(map(str, declared.shape))}."
        )
    if declared.dtype != bool:
        raise TrialInputError("The table of declared differences must hold True/False values.")
    if not np.array_equal(declared, declared.T):
        raise TrialInputError(
            "The table of declared differences is not symmetric: entry pair (i, j) and pair (j, i) "
            "must agree."
        )
    return mean, declared


def _insert_and_absorb(pattern: np.ndarray) -> np.ndarray:
    """Letters (rows) over entries (columns, best first): the maximal groups with no difference."""
    t = pattern.shape[0]
    groups = np.ones((1, t), dtype=bool)
    for entry in range(t):
        partners = pattern[entry]
        # Piepho (2004): a letter holding both members of a declared difference is split.
        # Splitting on all of one entry's partners at once gives the same letters after absorption
        # as splitting pair by pair.
        split = groups[:, entry] & (groups & partners).any(axis=1)
        if not split.any():
            continue
        without_entry = groups[split]
        without_entry[:, entry] = False
        without_partners = groups[split] & ~partners
        groups = _absorb(groups[~split], np.vstack([without_entry, without_partners]))
    return groups


def _absorb(kept: np.ndarray, new: np.ndarray) -> np.ndarray:
    """``kept`` plus those ``new`` letters not contained in another letter (duplicates kept once).

    ``kept`` letters are never contained in a new one: each new letter is part of a letter that
    was not contained in any kept letter.
    """
    candidates = np.vstack([kept, new])
    # missing[a, b]: how many entries of new letter a are not in candidate b; 0 means a is inside b
    missing = new.astype(np.float32) @ (~candidates).T.astype(np.float32)
    sizes = candidates.sum(axis=1)
    own = np.arange(kept.shape[0], candidates.shape[0])
    position = np.arange(candidates.shape[0])
    larger = sizes[None, :] > sizes[own, None]
    equal_and_earlier = (sizes[None, :] == sizes[own, None]) & (position[None, :] < own[:, None])
    absorbed = ((missing == 0) & (larger | equal_and_earlier)).any(axis=1)
    return np.vstack([kept, new[~absorbed]])


def _sweep(groups: np.ndarray) -> np.ndarray:
    """Take away each letter an entry does not need (Piepho 2004), one letter at a time in order."""
    groups = groups.copy()
    # shared[i, j]: number of letters entries i and j have in common; shared[i, i]: letters of i
    weights = groups.astype(np.float32)
    shared = (weights.T @ weights).astype(np.int32)
    for letter in range(groups.shape[0]):
        holders = np.flatnonzero(groups[letter])
        # shared - 1 over the holders counts the letters other than this one that two holders have
        # in common. An entry may drop this letter when it keeps another and shares another with
        # every holder. Dropping one entry leaves the other holders' counts unchanged, so all can
        # be decided at once.
        keeps = shared[np.ix_(holders, holders)].min(axis=1) < 2
        dropped, kept = holders[~keeps], holders[keeps]
        groups[letter, dropped] = False
        shared[np.ix_(dropped, holders)] -= 1
        shared[np.ix_(kept, dropped)] -= 1
    return groups[groups.any(axis=1)]


def _in_letter_order(groups: np.ndarray) -> np.ndarray:
    """Letters sorted by their best entry, then their next best and so on (all distinct)."""
    # np.lexsort takes its last key as the primary one: rank 0 (the best entry) goes last.
    order = np.lexsort(~groups.T[::-1])
    return groups[order]


def _symbol(k: int) -> str:
    """The ``k``-th letter (from 0): a..z, A..Z, then a1..Z1, a2..Z2 and so on."""
    cycle, position = divmod(int(k), len(_SYMBOLS))
    return _SYMBOLS[position] + (str(cycle) if cycle else "")
