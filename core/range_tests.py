"""Mean separation by the studentized range: Tukey's HSD and the step-down range tests.

Tukey's HSD (Tukey 1953) compares every pair of entries with the distribution of the range of
all k means, which holds the experiment-wise error rate at alpha. Kramer (1956, Biometrics
12:307-310) extended it to unequal replication by using each pair's own standard error of the
difference; the same holds for blocked designs and least-squares means, since only the standard
error of each difference and the residual degrees of freedom enter.

The step-down tests order the means and test a pair spanning p ordered means against the range
distribution for p means: Student-Newman-Keuls (Newman 1939, Biometrika 31:20-30; Keuls 1952,
Euphytica 1:112-122) at level alpha for every p, Duncan's multiple range test (Duncan 1955,
Biometrics 11:1-42) at the protection level 1 - (1 - alpha)^(p - 1). A pair is declared
different only if it is significant and every range containing it was declared different.

Both use :mod:`trialdesk.core.studentized_range` for the distribution.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from trialdesk.core.errors import TrialInputError
from trialdesk.core.studentized_range import check_alpha, range_quantile, range_sf

_METHODS = ("snk", "duncan")
_SQRT2 = float(np.sqrt(2.0))


def _check_se(se: np.ndarray) -> None:
    if not np.all(np.isfinite(se)) or np.any(se <= 0.0):
        raise TrialInputError(
            "Every standard error of a difference must be a positive number; check that the "
            "trait has a residual variance (more than one replicate of some entry)."
        )


def tukey_kramer(
    difference: ArrayLike, se: ArrayLike, k: int, df: float, alpha: float
) -> tuple[np.ndarray, np.ndarray]:
    """Tukey's HSD / Tukey-Kramer adjusted p-values and simultaneous interval half-widths.

    Parameters
    ----------
    difference : array_like
        mean_a - mean_b for each pair.
    se : array_like
        Standard error of each difference (from the trial's residual mean square), broadcast
        against ``difference``.
    k : int
        Number of entries in the family (at least 2).
    df : float
        Residual degrees of freedom.
    alpha : float
        Experiment-wise significance level for the intervals.

    Returns
    -------
    p_adjusted : ndarray
        P(Q >= q) with q = |difference| / se * sqrt(2) (Tukey 1953; Kramer 1956).
    half_width : ndarray
        q_alpha(k, df) / sqrt(2) * se, so that difference +- half_width are simultaneous
        intervals at confidence 1 - alpha.

    Examples
    --------
    >>> p, hw = tukey_kramer([2.0, 0.5], [0.6, 0.6], k=4, df=12, alpha=0.05)
    >>> [round(float(v), 4) for v in p], [round(float(v), 4) for v in hw]
    ([0.0265, 0.8377], [1.7813, 1.7813])
    """
    difference, se = np.broadcast_arrays(
        np.asarray(difference, dtype=float), np.asarray(se, dtype=float)
    )
    _check_se(se)
    alpha = check_alpha(alpha)
    # Kramer (1956): q = |d| / sqrt(s^2 / 2 (1/n_a + 1/n_b)), that is |d| / SED * sqrt(2).
    q = np.abs(difference) / se * _SQRT2
    p_adjusted = range_sf(q, k, df)
    half_width = range_quantile(alpha, k, df) / _SQRT2 * se
    return p_adjusted, half_width


def _step_p(q: np.ndarray, span: int, df: float, method: str) -> np.ndarray:
    """The level at which a pair spanning ``span`` ordered means would just be significant."""
    p = range_sf(q, span, df)
    if method == "snk":
        return p
    # Duncan (1955): protection level 1 - (1 - alpha)^(p-1), so a pair is significant at
    # alpha exactly when 1 - (1 - P)^(1/(p-1)) <= alpha.
    with np.errstate(divide="ignore"):
        return -np.expm1(np.log1p(-p) / (span - 1))


def step_down_range(
    means: ArrayLike, se: np.ndarray, df: float, alpha: float, method: str
) -> tuple[np.ndarray, np.ndarray]:
    """Student-Newman-Keuls or Duncan's multiple range test.

    Parameters
    ----------
    means : array_like
        The t entry means.
    se : ndarray
        t x t matrix of standard errors of the differences (diagonal ignored).
    df : float
        Residual degrees of freedom.
    alpha : float
        Significance level of each step (SNK) or the nominal level of Duncan's test.
    method : {"snk", "duncan"}
        The procedure.

    Returns
    -------
    p_adjusted : ndarray
        t x t symmetric, NaN on the diagonal: the pair's own step p-value made monotone, at
        least the largest adjusted p of any range containing the pair.
    different : ndarray
        t x t symmetric booleans, False on the diagonal: ``p_adjusted <= alpha``.

    Notes
    -----
    A pair spanning p ordered means is tested with q = |difference| / se * sqrt(2) against the
    studentized range for p means and df; its step p-value is P(Q_p >= q) for SNK and
    1 - (1 - P(Q_p >= q))^(1/(p-1)) for Duncan. With unequal standard errors the order is that
    of the means.

    Examples
    --------
    >>> se = np.full((3, 3), 1.0)
    >>> p, diff = step_down_range([10.0, 10.5, 14.0], se, 20, 0.05, "snk")
    >>> diff.astype(int)
    array([[0, 0, 1],
           [0, 0, 1],
           [1, 1, 0]])
    """
    means = np.asarray(means, dtype=float)
    se = np.asarray(se, dtype=float)
    if method not in _METHODS:
        raise TrialInputError(
            f"The range test must be one of {', '.join(_METHODS)} (got {method!r})."
        )
    t = means.size
    if means.ndim != 1 or t < 2 or not np.all(np.isfinite(means)):
        raise TrialInputError("A range test needs the means of at least two entries.")
    if se.shape != (t, t):
        raise TrialInputError(f"The standard errors must form a {t} x {t} matrix.")
    off = ~np.eye(t, dtype=bool)
    _check_se(se[off])
    alpha = check_alpha(alpha)

    order = np.argsort(means, kind="stable")
    ranked = means[order]
    ranked_se = se[np.ix_(order, order)]
    adjusted = np.full((t, t), np.nan)  # by rank, upper triangle: adjusted[a, b] for a < b
    for span in range(t, 1, -1):
        a = np.arange(t - span + 1)
        b = a + span - 1
        q = (ranked[b] - ranked[a]) / ranked_se[a, b] * _SQRT2
        step = _step_p(q, span, df, method)
        if span < t:  # coherence: no pair inside a range that was not declared different
            left = adjusted[np.maximum(a - 1, 0), b]
            right = adjusted[a, np.minimum(b + 1, t - 1)]
            step = np.fmax(step, np.where(a > 0, left, np.nan))
            step = np.fmax(step, np.where(b < t - 1, right, np.nan))
        adjusted[a, b] = step

    p_adjusted = np.full((t, t), np.nan)
    rows, cols = np.triu_indices(t, 1)
    p_adjusted[order[rows], order[cols]] = adjusted[rows, cols]
    p_adjusted[order[cols], order[rows]] = adjusted[rows, cols]
    different = np.zeros((t, t), dtype=bool)
    different[off] = p_adjusted[off] <= alpha
    return p_adjusted, different
