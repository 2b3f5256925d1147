"""Stability of entries over a series of environments, from a table of entry means.

An environment is one location in one season. Given the mean of every entry in every environment,
each entry gets the classic measures of how its performance follows the environments:

- the regression of its means on the environment index (Finlay & Wilkinson 1963; the index and
  the deviations from the line as in Eberhart & Russell 1966);
- its ecovalence, its contribution to the entry x environment sum of squares (Wricke 1962);
- its stability variance (Shukla 1972).

All are computed on the table of means: an entry x environment interaction measured this way
holds the plot error of the means as well (``error_ms_of_mean`` removes it from the deviations).

Examples
--------
>>> import pandas as pd
>>> table = pd.DataFrame({"L1-2025": [4.0, 6.0, 8.0, 6.0], "L2-2025": [7.0, 8.0, 9.0, 8.0],
...                       "L1-2026": [10.0, 9.0, 10.0, 11.0], "L2-2026": [11.0, 13.0, 11.0, 13.0]},
...                      index=["A", "B", "C", "D"])
>>> [round(s.regression_slope, 6) for s in stability(table)]
[1.2, 1.1, 0.5, 1.2]
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np
import pandas as pd

from trialdesk.core.errors import TrialInputError

__all__ = ["Stability", "stability", "stability_frame"]


@dataclass(frozen=True, slots=True, kw_only=True)
class Stability:
    """The stability measures of one entry over the environments of a series.

    With ``g`` entries in ``e`` environments, ``y_ij`` the mean of entry i in environment j, entry
    means ``ybar_i.``, environment means ``ybar_.j`` and grand mean ``ybar_..``:

    Attributes
    ----------
    entry : str
        The entry code.
    n_environments : int
        ``e``, the environments the measures are computed over.
    mean : float
        ``ybar_i.``, the entry's mean over the environments.
    regression_slope : float
        ``b_i``, the slope of the entry's means on the environment index
        ``I_j = ybar_.j - ybar_..``. The slopes of all entries average exactly 1; above 1 the
        entry responds more than the average entry to better environments. Finlay & Wilkinson
        worked on the logarithm of yield; pass a table of logarithms for their form.
    slope_se : float
        Standard error of ``b_i`` from the deviations from the entry's line:
        ``sqrt(s2_i / sum_j I_j^2)`` with ``s2_i = sum_j delta_ij^2 / (e - 2)``.
    deviation_ms : float
        ``s2_di = s2_i - s2_e/r``, the mean square of the deviations from the line less the error
        variance of a mean when that was given (``error_ms_of_mean``), otherwise ``s2_i`` itself.
        It can be negative once the error is subtracted; it is reported as computed.
    ecovalence : float
        ``W_i = sum_j (y_ij - ybar_i. - ybar_.j + ybar_..)^2``, the entry's part of the entry x
        environment sum of squares of the table of means.
    ecovalence_share : float
        ``W_i / sum_k W_k``, the entry's share of that sum of squares (NaN when the table has no
        entry x environment interaction at all, ``sum_k W_k = 0``).
    shukla_variance : float
        ``sigma2_i``, the entry's stability variance: its own share of the interaction variance of
        the means. It can be negative (an estimate of a variance, not a sum of squares); it is
        reported as computed, and negative values read as zero.
    """

    entry: str
    n_environments: int
    mean: float
    regression_slope: float
    slope_se: float
    deviation_ms: float
    ecovalence: float
    ecovalence_share: float
    shukla_variance: float

    def to_dict(self) -> dict:
        """Plain data: one key per attribute."""
        return {f.name: getattr(self, f.name) for f in fields(self)}


def stability_frame(results: tuple[Stability, ...] | list[Stability]) -> pd.DataFrame:
    """The stability measures as a table: one row per entry, in the order given."""
    return pd.DataFrame([r.to_dict() for r in results], columns=[f.name for f in fields(Stability)])


def stability(
    table: pd.DataFrame, *, error_ms_of_mean: float | None = None
) -> tuple[Stability, ...]:
    """Regression, ecovalence and stability variance of every entry over the environments.

    Parameters
    ----------
    table : pandas.DataFrame
        Entry means: the index holds the entry codes, each column is one environment (a location
        in a season). Every entry needs a mean in every environment; at least 3 entries and 3
        environments.
    error_ms_of_mean : float, optional
        The pooled error variance of one entry mean, ``s2_e / r`` (the pooled error mean square of
        the trials divided by the replicates). When given it is subtracted from the mean square of
        the deviations from regression (Eberhart & Russell 1966); when not given, no subtraction
        is made and ``deviation_ms`` is the plain mean square of the deviations.

    Returns
    -------
    tuple of Stability
        One per entry, in the table's row order.

    Raises
    ------
    TrialInputError
        If an entry or environment appears twice, a mean is missing (the message names the entries
        and environments; drop them or complete the table first), not a number or infinite, there
        are fewer than 3 entries or 3 environments, all environments have the same mean (the
        environment index is zero, so no slope exists), or ``error_ms_of_mean`` is negative.

    Notes
    -----
    Shukla's stability variance is coded in the form (Shukla 1972)::

        sigma2_i = [g (g - 1) W_i - sum_k W_k] / [(g - 1)(g - 2)(e - 1)]

    which is the same as ``[g W_i - sum_k W_k / (g - 1)] / [(g - 2)(e - 1)]`` (multiply numerator
    and denominator by ``g - 1``). It follows from Shukla's model, in which the interaction
    ``d_ij`` of entry i has its own variance ``sigma2_i``: the double-centred interaction has
    ``E[W_i] = (e - 1) [(g - 2)/g sigma2_i + sum_k sigma2_k / g^2]``, so
    ``E[sum_k W_k] = (e - 1)(g - 1)/g sum_k sigma2_k``; solving the two for ``sigma2_i`` gives the
    form above (derived here from the model). Consequently
    ``sum_i sigma2_i = g/(g - 1) sum_k W_k/(e - 1)``: the average stability variance is the
    entry x environment mean square of the table, ``sum_k W_k / ((g - 1)(e - 1))``.

    References
    ----------
    Finlay, K. W. & Wilkinson, G. N. (1963). The analysis of adaptation in a plant-breeding
    programme. Aust. J. Agric. Res. 14:742-754.
    Eberhart, S. A. & Russell, W. A. (1966). Stability parameters for comparing varieties. Crop
    Sci. 6:36-40.
    Wricke, G. (1962). Über eine Methode zur Erfassung der ökologischen Streubreite in
    Feldversuchen. Z. Pflanzenzüchtg. 47:92-96.
    Shukla, G. K. (1972). Some statistical aspects of partitioning genotype-environmental
    components of variability. Heredity 29:237-245.
    (Titles and pages quoted from memory.)
    """
    y, entries = _means(table)
    if error_ms_of_mean is not None and not (np.isfinite(error_ms_of_mean)
                                             and error_ms_of_mean >= 0):
        raise TrialInputError(
            f"the error variance of a mean must be a number of at least 0, not {error_ms_of_mean}")
    g, e = y.shape
    entry_mean = y.mean(axis=1)
    env_mean = y.mean(axis=0)
    grand = y.mean()
    # Environment index I_j = ybar_.j - ybar_.. (Eberhart & Russell 1966, Crop Sci. 6:36-40)
    index = env_mean - grand
    # A column mean of g values carries a rounding error of about g ulps of the largest value, so
    # environment means closer than that are taken as equal.
    if np.ptp(env_mean) <= g * np.finfo(float).eps * np.abs(y).max():
        raise TrialInputError(
            "all environments have the same mean, so the environment index is zero and no "
            "regression on it exists")
    index_ss = float(index @ index)
    centred = y - entry_mean[:, None]
    # b_i = sum_j y_ij I_j / sum_j I_j^2 (Finlay & Wilkinson 1963, Aust. J. Agric. Res. 14:742-754;
    # Eberhart & Russell 1966, Crop Sci. 6:36-40)
    slope = centred @ index / index_ss
    # delta_ij = y_ij - ybar_i. - b_i I_j, the deviations from the entry's line (Eberhart & Russell
    # 1966, Crop Sci. 6:36-40)
    deviation = centred - slope[:, None] * index[None, :]
    # s2_i = sum_j delta_ij^2 / (e - 2) (Eberhart & Russell 1966, Crop Sci. 6:36-40)
    deviation_ms = (deviation**2).sum(axis=1) / (e - 2)
    # SE(b_i) = sqrt(s2_i / sum_j I_j^2), the least-squares standard error of a slope
    slope_se = np.sqrt(deviation_ms / index_ss)
    # s2_di = s2_i - s2_e/r (Eberhart & Russell 1966, Crop Sci. 6:36-40)
    deviation_less_error = deviation_ms - (error_ms_of_mean or 0.0)
    # W_i = sum_j (y_ij - ybar_i. - ybar_.j + ybar_..)^2 (Wricke 1962, Z. Pflanzenzüchtg. 47:92-96)
    ecovalence = ((centred - index[None, :]) ** 2).sum(axis=1)
    total = float(ecovalence.sum())
    share = ecovalence / total if total > 0 else np.full(g, np.nan)
    # sigma2_i = [g(g-1) W_i - sum_k W_k] / [(g-1)(g-2)(e-1)] (Shukla 1972, Heredity 29:237-245;
    # numerator and denominator of the (g - 2)(e - 1) form multiplied by g - 1; see the Notes)
    shukla = (g * (g - 1) * ecovalence - total) / ((g - 1) * (g - 2) * (e - 1))
    return tuple(
        Stability(
            entry=entries[i],
            n_environments=e,
            mean=float(entry_mean[i]),
            regression_slope=float(slope[i]),
            slope_se=float(slope_se[i]),
            deviation_ms=float(deviation_less_error[i]),
            ecovalence=float(ecovalence[i]),
            ecovalence_share=float(share[i]),
            shukla_variance=float(shukla[i]),
        )
        for i in range(g)
    )


def _means(table: pd.DataFrame) -> tuple[np.ndarray, list[str]]:
    """The table as a float array (entries x environments) and the entry codes, checked."""
    entries = [str(code) for code in table.index]
    environments = [str(name) for name in table.columns]
    for what, labels in (("entry", entries), ("environment", environments)):
        seen = pd.Index(labels)
        twice = sorted(set(seen[seen.duplicated()]))
        if twice:
            raise TrialInputError(f"{what} listed more than once in the table of means: "
                                  + ", ".join(twice))
    if len(environments) < 3:
        raise TrialInputError(
            f"stability needs at least 3 environments (the deviations from regression have e - 2 "
            f"degrees of freedom); the table has {len(environments)}")
    if len(entries) < 3:
        raise TrialInputError(
            f"stability needs at least 3 entries (the stability variance divides by g - 2); the "
            f"table has {len(entries)}")
    columns = []
    for name, column in zip(environments, table.columns, strict=True):
        numbers = pd.to_numeric(table[column], errors="coerce")
        bad = table[column].notna() & numbers.isna()
        if bad.any():
            where = ", ".join(str(code) for code in table.index[bad.to_numpy()])
            raise TrialInputError(f"the mean of entry {where} is not a number", column=name)
        columns.append(numbers.to_numpy(dtype=float))
    y = np.column_stack(columns)
    missing = np.isnan(y)
    if missing.any():
        parts = [f"entry {entries[i]} in " + ", ".join(np.asarray(environments)[missing[i]])
                 for i in np.flatnonzero(missing.any(axis=1))]
        raise TrialInputError("stability needs every entry's mean in every environment; missing: "
                              + "; ".join(parts) + " (drop these entries or environments first)")
    if np.isinf(y).any():
        i, j = np.argwhere(np.isinf(y))[0]
        raise TrialInputError(f"the mean of entry {entries[i]} is infinite", column=environments[j])
    return y, entries
