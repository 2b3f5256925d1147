"""Field-trend (spatial) adjustment of a trial with known field rows and columns.

Two adjustments are offered beside the plain analysis of the design (complete blocks, incomplete
blocks or none), and the breeder chooses which one the entry means come from:

- ``"rowcol"``: the field rows and the field columns as two further random terms of the model,
  fitted by REML (see :mod:`trialdesk.core.alpha_lattice`): smooth or patchy fertility along
  either direction is taken out of the error.
- ``"papadakis"``: the nearest-neighbour adjustment of Papadakis (1937, Bull. Inst. Amél. Plantes
  Salonique 23, from memory). Each plot's residual is its value minus the plain mean of its
  entry's plots (the classic form); the covariate of a plot is the mean residual of its
  neighbours along the field row, the plots in the same row in the columns on its left and right
  (column - 1 and column + 1). A plot at the edge of the field, or beside a plot that is missing or
  not in the trial, uses the one neighbour it has; a plot with neither neighbour gets the
  covariate 0, the mean residual. The analysis of covariance (design terms + covariate + entry)
  is then made once, without iterating (common practice; Bartlett 1978, JRSS-B 40:147-174,
  discussed iterating it). Entry means are adjusted to the mean covariate.

Each is compared with the plain analysis by its residual (plot error) variance: 100 x its
variance / the plain analysis' variance, in percent. Field rows and columns are as the field book
gives them; every plot needs both, and no two plots may share a position (checked by
:func:`trialdesk.core.fieldbook.check_field_positions` before the analysis).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from trialdesk.core.alpha_lattice import MixedFit, fit_mixed
from trialdesk.core.results import PlotTrend, SpatialOption

__all__ = [
    "SpatialFits",
    "entry_mean_residuals",
    "field_trend",
    "fit_spatial",
    "neighbour_covariate",
    "spatial_options",
]


@dataclass(frozen=True, slots=True, kw_only=True)
class SpatialFits:
    """The two field-trend adjustments of one trait, fitted.

    ``without_neighbours`` counts the plots with a value whose neighbour covariate is 0 because
    neither neighbour has a value.
    """

    rowcol: MixedFit
    papadakis: MixedFit
    without_neighbours: int


def entry_mean_residuals(y: np.ndarray, entry: np.ndarray) -> np.ndarray:
    """Each plot's value minus the plain mean of its entry's plots with a value (Papadakis 1937).

    NaN where the plot has no value.

    >>> entry_mean_residuals(np.array([4.0, 6.0, 5.0, np.nan]), np.array(["A", "A", "B", "B"]))
    array([-1.,  1.,  0., nan])
    """
    y = np.asarray(y, dtype=float)
    means = pd.Series(y).groupby(np.asarray(entry, dtype=object).astype(str)).transform("mean")
    return y - means.to_numpy()


def neighbour_covariate(residuals: np.ndarray, row: np.ndarray, column: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray]:
    """The Papadakis covariate: per plot, the mean residual of its neighbours along the row.

    Parameters
    ----------
    residuals : numpy.ndarray
        Per plot, NaN where the plot has no value (it is then no one's neighbour).
    row, column : numpy.ndarray
        Whole-number field positions per plot, all known and no two plots alike.

    Returns
    -------
    covariate : numpy.ndarray
        The mean of the residuals at (row, column - 1) and (row, column + 1) that exist; 0 where
        neither does.
    used : numpy.ndarray
        How many neighbours each covariate is the mean of (0, 1 or 2).

    Examples
    --------
    One field row of three plots, the middle one missing, and a plot alone in a second row:

    >>> covariate, used = neighbour_covariate(np.array([1.0, np.nan, 4.0, 3.0]),
    ...                                       np.array([1, 1, 1, 2]), np.array([1, 2, 3, 1]))
    >>> covariate.tolist(), used.tolist()
    ([0.0, 2.5, 0.0, 0.0], [0, 2, 0, 0])
    """
    residuals = np.asarray(residuals, dtype=float)
    where = pd.MultiIndex.from_arrays([np.asarray(row, dtype=np.int64),
                                       np.asarray(column, dtype=np.int64)])
    by_position = pd.Series(residuals, index=where)
    sides = np.column_stack([
        by_position.reindex(pd.MultiIndex.from_arrays([where.get_level_values(0),
                                                       where.get_level_values(1) + step]))
        .to_numpy()
        for step in (-1, 1)
    ])
    used = np.isfinite(sides).sum(axis=1)
    total = np.nansum(sides, axis=1)
    covariate = np.divide(total, used, out=np.zeros(len(residuals)), where=used > 0)
    return covariate, used


def fit_spatial(
    y: np.ndarray,
    entry: np.ndarray,
    row: np.ndarray,
    column: np.ndarray,
    *,
    fixed: Sequence[tuple[str, np.ndarray]] = (),
    random: Sequence[tuple[str, np.ndarray]] = (),
    entries_random: bool = False,
    trait: str | None = None,
) -> SpatialFits:
    """Fit both field-trend adjustments on top of a design's own terms.

    Parameters
    ----------
    y, entry : numpy.ndarray
        Values (NaN for missing) and entry codes per plot.
    row, column : numpy.ndarray
        Field positions per plot, all known and unique.
    fixed, random, entries_random, trait
        The design's terms, as for :func:`trialdesk.core.alpha_lattice.fit_mixed`.

    Returns
    -------
    SpatialFits
    """
    y = np.asarray(y, dtype=float)
    rows = np.asarray(row, dtype=np.int64)
    columns = np.asarray(column, dtype=np.int64)
    rowcol = fit_mixed(y, entry, fixed=fixed,
                       random=[*random, ("field row", rows.astype(str)),
                               ("field column", columns.astype(str))],
                       entries_random=entries_random, trait=trait)
    covariate, used = neighbour_covariate(entry_mean_residuals(y, entry), rows, columns)
    papadakis = fit_mixed(y, entry, fixed=fixed, random=random, covariate=covariate,
                          entries_random=entries_random, trait=trait)
    observed = ~np.isnan(y)
    return SpatialFits(rowcol=rowcol, papadakis=papadakis,
                       without_neighbours=int((observed & (used == 0)).sum()))


def spatial_options(plain: MixedFit, fits: SpatialFits, chosen: str) -> tuple[SpatialOption, ...]:
    """The plain analysis and both adjustments by their residual variance, ``chosen`` marked."""
    base = plain.components["residual"]
    return tuple(
        SpatialOption(method=method, residual_variance=fit.components["residual"],
                      percent_of_plain=100.0 * (fit.components["residual"] / base),
                      chosen=method == chosen)
        for method, fit in (("none", plain), ("rowcol", fits.rowcol),
                            ("papadakis", fits.papadakis))
    )


def field_trend(fit: MixedFit, method: str, y: np.ndarray, plots: np.ndarray,
                row: np.ndarray, column: np.ndarray) -> tuple[PlotTrend, ...]:
    """The field map of a field-trend fit: value, trend and residual of each plot with a value.

    Parameters
    ----------
    fit : MixedFit
        The fit of ``method`` ("rowcol" or "papadakis").
    y, plots, row, column : numpy.ndarray
        Values (NaN for missing), plot labels and field positions over all plots.
    """
    y = np.asarray(y, dtype=float)
    observed = ~np.isnan(y)
    if method == "rowcol":
        trend = fit.effects["field row"] + fit.effects["field column"]
    else:
        trend = fit.covariate_effect
    values = y[observed]
    residual = values - fit.fitted
    labels = np.asarray(plots, dtype=object)[observed]
    rows = np.asarray(row, dtype=np.int64)[observed]
    columns = np.asarray(column, dtype=np.int64)[observed]
    return tuple(
        PlotTrend(plot=str(labels[k]), row=int(rows[k]), column=int(columns[k]),
                  value=float(values[k]), trend=float(trend[k]), residual=float(residual[k]))
        for k in range(len(values))
    )
