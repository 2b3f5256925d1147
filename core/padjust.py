"""Adjusting p-values for many comparisons, and the error rates that go with them.

Comparing every pair of ``t`` entries makes ``m = t(t - 1)/2`` tests; at a per-pair level ``alpha``
the chance of at least one false difference grows quickly with ``m``. The functions here adjust raw
p-values so that the family as a whole keeps the chosen level (Bonferroni, Sidak, Holm) or, for
screening many entries, so that the expected share of false differences among those declared keeps
it (Benjamini-Hochberg).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from trialdesk.core.errors import TrialInputError

__all__ = ["adjust_pvalues", "familywise_error", "per_comparison_level"]

ADJUST_METHODS = ("bonferroni", "sidak", "holm", "bh")
LEVEL_METHODS = (*ADJUST_METHODS, "none")


def adjust_pvalues(p: ArrayLike, method: str) -> np.ndarray:
    """Adjust raw p-values for the number of comparisons made.

    Parameters
    ----------
    p : array_like
        Raw p-values in [0, 1], any shape. NaN marks a comparison that could not be made: it is
        passed through as NaN and not counted among the ``m`` comparisons.
    method : {"bonferroni", "sidak", "holm", "bh"}
        ``"bonferroni"`` and ``"sidak"`` (single-step) and ``"holm"`` (step-down) control the
        family-wise error rate; ``"bh"`` (Benjamini-Hochberg step-up) controls the false discovery
        rate, not the family-wise rate, and suits screening many entries.

    Returns
    -------
    numpy.ndarray
        Adjusted p-values, float, same shape as ``p``, clipped to [0, 1]. A comparison is declared
        significant at level ``alpha`` when its adjusted p-value is at most ``alpha``.

    Raises
    ------
    TrialInputError
        If ``method`` is not one of the four above or a p-value lies outside [0, 1].

    Notes
    -----
    With ``m`` counted comparisons and the p-values sorted ascending, ``p_(1) <= ... <= p_(m)``:

    - Bonferroni: ``min(1, m p)``.
    - Sidak (1967): ``1 - (1 - p)**m``, exact for independent tests.
    - Holm (1979): ``max over j <= i of min(1, (m - j + 1) p_(j))``.
    - Benjamini-Hochberg (1995): ``min over j >= i of min(1, m p_(j) / j)``.

    Tied p-values receive equal adjusted values under every method.

    References
    ----------
    Sidak, Z. (1967). JASA 62:626-633. Holm, S. (1979). Scand. J. Stat. 6:65-70.
    Benjamini, Y. & Hochberg, Y. (1995). JRSS-B 57:289-300.

    Examples
    --------
    >>> adjust_pvalues([0.01, 0.04, 0.03], "holm").tolist()
    [0.03, 0.06, 0.06]
    >>> adjust_pvalues([0.01, float("nan"), 0.02], "bonferroni").tolist()
    [0.02, nan, 0.04]
    """
    _check_method(method, ADJUST_METHODS)
    raw = np.array(p, dtype=float)
    if np.any((raw < 0.0) | (raw > 1.0)):
        raise TrialInputError("p-values must lie between 0 and 1; check the comparisons table.")
    counted = ~np.isnan(raw)
    adjusted = raw.copy()
    adjusted[counted] = _ADJUSTERS[method](raw[counted])
    return np.clip(adjusted, 0.0, 1.0)


def per_comparison_level(alpha: float, m: int, method: str) -> tuple[float, float]:
    """The range of per-comparison significance levels a method implies for ``m`` tests.

    Parameters
    ----------
    alpha : float
        The level the method holds, in (0, 1): family-wise for Bonferroni, Sidak and Holm, the false
        discovery rate for ``"bh"``, per comparison for ``"none"``.
    m : int
        Number of comparisons, at least 1.
    method : {"bonferroni", "sidak", "holm", "bh", "none"}

    Returns
    -------
    tuple of float
        ``(smallest, largest)`` level a raw p-value is compared with. Single-step methods use one
        level; the sequential ones (Holm, Benjamini-Hochberg) start at ``alpha / m`` for the
        smallest p-value and end at ``alpha`` for the largest.

    Raises
    ------
    TrialInputError
        If ``alpha`` is not in (0, 1), ``m`` is below 1 or ``method`` is unknown.

    Examples
    --------
    >>> per_comparison_level(0.05, 10, "holm")
    (0.005, 0.05)
    """
    _check_method(method, LEVEL_METHODS)
    _check_alpha(alpha)
    _check_count(m, least=1)
    if method == "bonferroni":
        level = alpha / m
        return level, level
    if method == "sidak":
        # Sidak (1967) JASA 62:626-633: 1 - (1 - alpha)**(1/m), in a form exact for small alpha
        level = -np.expm1(np.log1p(-alpha) / m)
        return float(level), float(level)
    if method in ("holm", "bh"):
        # Holm (1979) Scand. J. Stat. 6:65-70 compares p_(i) with alpha/(m - i + 1); Benjamini &
        # Hochberg (1995) JRSS-B 57:289-300 compare p_(i) with i alpha/m: both run alpha/m .. alpha.
        return alpha / m, alpha
    return alpha, alpha


def familywise_error(alpha: float, m: int) -> float:
    """Chance of at least one false difference among ``m`` independent tests at level ``alpha``.

    Parameters
    ----------
    alpha : float
        Per-comparison level, in (0, 1).
    m : int
        Number of comparisons, at least 0 (``t(t - 1)/2`` for all pairs of ``t`` entries).

    Returns
    -------
    float
        ``1 - (1 - alpha)**m`` (common practice; exact when the tests are independent and every
        null hypothesis is true).

    Raises
    ------
    TrialInputError
        If ``alpha`` is not in (0, 1) or ``m`` is negative.

    Examples
    --------
    >>> round(familywise_error(0.05, 15), 3)
    0.537
    """
    _check_alpha(alpha)
    _check_count(m, least=0)
    return float(-np.expm1(m * np.log1p(-alpha)))  # 1 - (1 - alpha)**m, common practice


def _bonferroni(p: np.ndarray) -> np.ndarray:
    return p * p.size


def _sidak(p: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore"):  # p = 1 gives log(0) = -inf and so an adjusted p of 1
        return -np.expm1(p.size * np.log1p(-p))  # Sidak (1967) JASA 62:626-633: 1 - (1 - p)**m


def _holm(p: np.ndarray) -> np.ndarray:
    m = p.size
    order = np.argsort(p, kind="stable")
    # Holm (1979) Scand. J. Stat. 6:65-70: the i-th smallest p-value is multiplied by m - i + 1
    stepped = (m - np.arange(m)) * p[order]
    adjusted = np.empty(m)
    adjusted[order] = np.maximum.accumulate(np.minimum(stepped, 1.0))  # step-down keeps the order
    return adjusted


def _bh(p: np.ndarray) -> np.ndarray:
    m = p.size
    order = np.argsort(p, kind="stable")
    # Benjamini & Hochberg (1995) JRSS-B 57:289-300: the i-th smallest p-value times m / i
    stepped = m * p[order] / np.arange(1, m + 1)
    adjusted = np.empty(m)
    adjusted[order] = np.minimum.accumulate(stepped[::-1])[::-1]  # step-up: min over j >= i
    return adjusted


_ADJUSTERS = {"bonferroni": _bonferroni, "sidak": _sidak, "holm": _holm, "bh": _bh}


def _check_method(method: str, allowed: tuple[str, ...]) -> None:
    if method not in allowed:
        raise TrialInputError(
            f"Unknown adjustment method '{method}'; choose one of {', '.join(allowed)}."
        )


def _check_alpha(alpha: float) -> None:
    if not 0.0 < alpha < 1.0:
        raise TrialInputError(f"The significance level must lie between 0 and 1, not {alpha}.")


def _check_count(m: int, *, least: int) -> None:
    if int(m) != m or m < least:
        raise TrialInputError(
            f"The number of comparisons must be a whole number of at least {least}, not {m}."
        )
