"""Incomplete-block (alpha-lattice) trials: replicates fixed, incomplete blocks random, by REML.

An alpha design (Patterson & Williams 1976, Biometrika 63:83-92) splits every replicate into
incomplete blocks too small to hold all entries. The model is

    y = mu + replicate_j + block_jk + entry_i + e,   block_jk ~ N(0, s2_b),  e ~ N(0, s2),

with replicates and entries fixed and the incomplete blocks within replicates random, so that the
entry means recover the information between blocks (Yates 1940, Ann. Eugenics 10:317-325). The
variances are estimated by REML (Patterson & Thompson 1971, Biometrika 58:545-554) with
statsmodels ``MixedLM``; the same machinery takes further random terms (field rows and columns,
see :mod:`trialdesk.core.spatial`), a covariate, and entries taken as random (BLUPs).

How the fit is made
-------------------
- REML: one group holding every plot, each random term a variance component of indicator
  columns. Crossed terms (field rows and columns) need one group; for nested incomplete blocks it
  gives the same estimates as one group per block (a test checks both) and is faster than that.
  The likelihood is maximized as for the variance components of a series (BFGS with a tight
  gradient tolerance, then a simplex search when BFGS does not converge); statsmodels' own
  warnings are replaced by plain ones.
- Entry means: Henderson's mixed-model equations at the REML variances (Henderson 1975,
  Biometrics 31:423-447, from memory). Their solution is the GLS estimate of the fixed effects
  and the BLUP of the random ones, and the inverse of their coefficient matrix times ``s2`` holds
  the covariance of the fixed effects, ``(X' V^-1 X)^-1``, and the prediction-error covariance of
  the random effects. A variance estimated as zero (on the boundary) drops its term, and so does
  a random term the fixed terms or an earlier random term already account for (field rows that
  are the replicates, or the incomplete blocks, over again); a note says so.
- Fixed entries: the adjusted means are the least-squares means of the GLS fit, averaging the
  replicates with equal weight and taken at the mean covariate (Searle, Speed & Milliken 1980,
  Am. Stat. 34:216-221). Random entries: the mean of an entry is the same average plus its BLUP,
  and its standard error the square root of its prediction-error variance.
- Tests use the residual degrees of freedom of the same model with every term fixed (for an alpha
  design the intra-block analysis), common practice; no small-sample correction such as
  Kenward-Roger is made. The analysis of variance shown is that of the same all-fixed model.

Examples
--------
Two replicates of four entries in blocks of two, the second replicate with other pairs:

>>> y = np.array([5.0, 6.1, 4.2, 5.4, 5.6, 4.4, 6.3, 4.9])
>>> entry = np.array(["A", "B", "C", "D", "A", "C", "B", "D"])
>>> rep = np.array(["1", "1", "1", "1", "2", "2", "2", "2"])
>>> block = nested_labels(rep, np.array(["1", "1", "2", "2", "1", "1", "2", "2"]))
>>> fit = fit_mixed(y, entry, fixed=[("replicate", rep)], random=[("incomplete block", block)])
>>> fit.entries
('A', 'B', 'C', 'D')
>>> [row.source for row in fit.anova]
['replicate', 'incomplete block', 'entry', 'residual', 'total']
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.linalg
from scipy import stats
from statsmodels.regression.mixed_linear_model import MixedLM, VCSpec

from trialdesk.core.errors import TrialInputError
from trialdesk.core.results import AnovaRow
from trialdesk.core.variance_components import BOUNDARY, _fit

__all__ = [
    "MixedFit",
    "efficiency_percent",
    "fit_mixed",
    "fixed_anova",
    "generalized_heritability",
    "mean_sed_squared",
    "nested_labels",
]

# Joins a replicate and a block label into one label; never typed in a field book.
_SEPARATOR = "\x1f"


@dataclass(frozen=True, slots=True, kw_only=True)
class MixedFit:
    """A trial's linear mixed model, fitted. Arrays over plots cover the plots with a value.

    Attributes
    ----------
    entries : tuple of str
        Entry codes in order of first appearance among the plots with a value.
    entries_random : bool
        True when the entries were random: ``means`` are then predictions (BLUPs).
    means : numpy.ndarray
        Per entry: the adjusted mean (BLUE as a least-squares mean), or the BLUP of its mean.
    means_cov : numpy.ndarray
        Covariance of ``means`` (fixed entries), or the prediction-error covariance of the BLUPs
        (random entries); a pair's variance of difference is ``v_ii + v_jj - 2 v_ij`` either way.
    replication : numpy.ndarray
        Plots with a value, per entry.
    components : dict of str to float
        REML variance of each random term under its name, and ``"residual"`` for the plot
        error ``s2`` (the residual mean square when there is no random term). A component on the
        boundary is 0.
    residual_df : int
        Residual degrees of freedom of the same model with every term fixed.
    anova : tuple of AnovaRow
        Analysis of variance of the same model with every term fixed (see :func:`fixed_anova`).
    fitted : numpy.ndarray
        Fixed part plus every predicted random effect, per plot.
    effects : dict of str to numpy.ndarray
        Per random term (entries excepted), its predicted effect in each plot.
    covariate_effect : numpy.ndarray or None
        Slope times the covariate centred on its mean, per plot; None without a covariate.
    converged : bool
        Whether the REML search converged (True without random terms).
    warnings : tuple of str
        Failed convergence, components on the boundary.
    """

    entries: tuple[str, ...]
    entries_random: bool
    means: np.ndarray
    means_cov: np.ndarray
    replication: np.ndarray
    components: dict[str, float]
    residual_df: int
    anova: tuple[AnovaRow, ...]
    fitted: np.ndarray
    effects: dict[str, np.ndarray]
    covariate_effect: np.ndarray | None
    converged: bool
    warnings: tuple[str, ...]

    @property
    def residual_ms(self) -> float:
        """Residual mean square of the all-fixed analysis."""
        return next(r.ms for r in self.anova if r.source == "residual")


def nested_labels(outer: np.ndarray, inner: np.ndarray) -> np.ndarray:
    """One label per plot for ``inner`` within ``outer``: block "1" of replicate 1 is not block
    "1" of replicate 2.

    >>> nested_labels(np.array(["1", "2"]), np.array(["1", "1"])).tolist() == ["1\\x1f1", "2\\x1f1"]
    True
    """
    return np.array([f"{a}{_SEPARATOR}{b}" for a, b in zip(outer, inner, strict=True)],
                    dtype=object)


def _indicators(labels: np.ndarray) -> tuple[np.ndarray, tuple[str, ...], np.ndarray]:
    """Codes in order of first appearance, the levels in that order, and the indicator matrix of
    all levels."""
    codes, levels = pd.factorize(np.asarray(labels, dtype=object).astype(str), sort=False)
    matrix = np.zeros((len(codes), len(levels)))
    matrix[np.arange(len(codes)), codes] = 1.0
    return codes, tuple(str(v) for v in levels), matrix


def _rss(x: np.ndarray, y: np.ndarray) -> tuple[float, int]:
    """Residual sum of squares of the least-squares fit of ``y`` on ``x``, and the rank of ``x``."""
    coef, _, rank, _ = scipy.linalg.lstsq(x, y, lapack_driver="gelsy", cond=1e-10,
                                      check_finite=False)
    resid = y - x @ coef
    return float(resid @ resid), int(rank)


def fixed_anova(y: np.ndarray, terms: Sequence[tuple[str, np.ndarray]], *,
                first: tuple[str, np.ndarray] | None = None) -> tuple[AnovaRow, ...]:
    """Analysis of variance of a model with every term fixed (an intra-block analysis).

    Parameters
    ----------
    y : numpy.ndarray
        The plot values (no missing value).
    terms : sequence of (str, numpy.ndarray)
        Source name and model columns (any number, redundant columns allowed) of each term. Each
        term's sum of squares is adjusted for every other term and ``first``: the increase in the
        residual sum of squares when it alone is left out (as with Type II sums of squares for a
        model without interactions). An incomplete-block term is so adjusted for entries
        ("eliminating entries") and the entry term for blocks.
    first : (str, numpy.ndarray), optional
        A term fitted first, ignoring the others (the replicates, in which blocks are nested).

    Returns
    -------
    tuple of AnovaRow
        ``first``, ``terms`` in order, ``"residual"`` and ``"total"``. Sums of squares of
        non-orthogonal terms do not add up to the total. A term confounded with the others has
        0 degrees of freedom and no mean square or test.
    """
    y = np.asarray(y, dtype=float)
    n = len(y)
    one = np.ones((n, 1))
    total = float(((y - y.mean()) ** 2).sum())
    lead = [] if first is None else [first[1]]
    rss_full, rank_full = _rss(np.hstack([one, *lead, *(cols for _, cols in terms)]), y)
    residual_df = n - rank_full
    residual_ms = rss_full / residual_df if residual_df > 0 else math.nan
    rows: list[tuple[str, int, float]] = []
    if first is not None:
        rss_first, rank_first = _rss(np.hstack([one, first[1]]), y)
        rows.append((first[0], rank_first - 1, total - rss_first))
    for k, (name, _) in enumerate(terms):
        others = [cols for j, (_, cols) in enumerate(terms) if j != k]
        rss_without, rank_without = _rss(np.hstack([one, *lead, *others]), y)
        rows.append((name, rank_full - rank_without, rss_without - rss_full))
    anova = []
    for name, df, ss in rows:
        ms = ss / df if df else None
        testable = ms is not None and residual_df > 0 and residual_ms > 0
        f = ms / residual_ms if testable else None
        anova.append(AnovaRow(source=name, df=df, ss=ss, ms=ms, f=f,
                              p=float(stats.f.sf(f, df, residual_df)) if testable else None))
    anova.append(AnovaRow(source="residual", df=residual_df, ss=rss_full,
                          ms=residual_ms if residual_df > 0 else None, f=None, p=None))
    anova.append(AnovaRow(source="total", df=n - 1, ss=total, ms=None, f=None, p=None))
    return tuple(anova)


def _reml(y: np.ndarray, x: np.ndarray, random: list[tuple[str, np.ndarray]]
          ) -> tuple[dict[str, float], float, bool]:
    """REML variances of the random terms, the residual variance, and whether REML converged."""
    names = [name for name, _ in random]
    model = MixedLM(y, x, np.zeros(len(y)),
                    exog_vc=VCSpec(names, [[[f"{name}{j}" for j in range(z.shape[1])]]
                                           for name, z in random],
                                   [[z] for _, z in random]))
    fit, converged = _fit(model)
    variances = {name: float(v) for name, v in zip(names, np.atleast_1d(fit.vcomp), strict=True)}
    scale = float(fit.scale)
    if not all(math.isfinite(v) for v in (*variances.values(), scale)):
        raise TrialInputError("the variance components could not be estimated: the REML fit gave "
                              "no finite values")
    return variances, scale, converged


def fit_mixed(
    y: np.ndarray,
    entry: np.ndarray,
    *,
    fixed: Sequence[tuple[str, np.ndarray]] = (),
    random: Sequence[tuple[str, np.ndarray]] = (),
    covariate: np.ndarray | None = None,
    entries_random: bool = False,
    trait: str | None = None,
) -> MixedFit:
    """Fit a trial's mixed model by REML and estimate (or predict) the entry means.

    Parameters
    ----------
    y : numpy.ndarray
        Values per plot; NaN marks a missing plot, which is left out.
    entry : numpy.ndarray
        Entry code per plot.
    fixed : sequence of (str, numpy.ndarray)
        Fixed label terms (the replicates) by source name, labels per plot. The first is fitted
        first in the analysis of variance.
    random : sequence of (str, numpy.ndarray)
        Random label terms (incomplete blocks, field rows, field columns), labels per plot.
    covariate : numpy.ndarray, optional
        A fixed covariate per plot (the neighbour covariate); means are taken at its mean.
    entries_random : bool, default False
        Take the entries as random (BLUPs, for ranking) instead of fixed (BLUEs).
    trait : str, optional
        Name used in error messages.

    Returns
    -------
    MixedFit

    Raises
    ------
    TrialInputError
        If the fixed effects are not estimable (the design is rank deficient, or the covariate is
        constant or confounded), or the REML fit fails numerically.
    """
    y = np.asarray(y, dtype=float)
    keep = ~np.isnan(y)
    y = y[keep]
    n = len(y)
    entry_code, entries, entry_z = _indicators(np.asarray(entry, dtype=object)[keep])
    t = len(entries)
    fixed_codes = [(name, _indicators(np.asarray(labels, dtype=object)[keep]))
                   for name, labels in fixed]
    fixed_terms = [(name, coded[2]) for name, coded in fixed_codes]
    notes: list[str] = []
    random_codes: list[tuple[str, tuple[np.ndarray, tuple[str, ...], np.ndarray]]] = []
    for name, labels in random:
        coded = _indicators(np.asarray(labels, dtype=object)[keep])
        reason = _confounded(coded[0], [(f, c[0]) for f, c in fixed_codes],
                             [(r, c[0]) for r, c in random_codes])
        if reason:
            notes.append(f"the {name} term is left out: {reason}")
        else:
            random_codes.append((name, coded))
    random_terms = [(name, coded[2]) for name, coded in random_codes]
    x_cols = [np.ones((n, 1))]
    weights = [np.ones(1)]  # the least-squares mean's coefficients of the columns before entries
    for _, z in fixed_terms:
        # Dummies for all levels but the first; equal weights average the levels (Searle, Speed &
        # Milliken 1980, Am. Stat. 34:216-221).
        x_cols.append(z[:, 1:])
        weights.append(np.full(z.shape[1] - 1, 1.0 / z.shape[1]))
    cov_x = None
    if covariate is not None:
        cov_x = np.asarray(covariate, dtype=float)[keep]
        x_cols.append(cov_x[:, None])
        weights.append(np.array([cov_x.mean()]))  # means at the mean covariate
    p_before_entries = sum(c.shape[1] for c in x_cols)
    if not entries_random:
        x_cols.append(entry_z[:, 1:])
    x = np.hstack(x_cols)
    _check_full_rank(x, trait)

    covariate_terms = [] if cov_x is None else [("covariate", cov_x[:, None])]
    entry_term = [("entry", entry_z)]
    anova = fixed_anova(y, [*fixed_terms[1:], *random_terms, *covariate_terms, *entry_term],
                        first=fixed_terms[0] if fixed_terms else None)
    residual_df = next(r.df for r in anova if r.source == "residual")

    with_entries = [*random_terms, *(entry_term if entries_random else [])]
    variances: dict[str, float] = {}
    converged = True
    if with_entries:
        variances, scale, converged = _reml(y, x, with_entries)
        if not converged:
            notes.append("REML did not converge: the variance components are the best values "
                         "found and may be inaccurate")
        total = sum(variances.values()) + scale
        for name, v in variances.items():
            if v <= BOUNDARY * total:
                variances[name] = 0.0
                notes.append(f"the REML estimate of the {name} variance is zero (on the boundary "
                             "of the parameter space); the term is left out of the means")
    kept = [(name, z) for name, z in with_entries if variances[name] > 0]
    if not kept:
        # No random term left: REML's plot variance is then the residual mean square of the
        # fixed model (Patterson & Thompson 1971), computed exactly.
        scale = _rss(x, y)[0] / (n - x.shape[1])
    z_all = np.hstack([z for _, z in kept]) if kept else np.zeros((n, 0))
    # Henderson's mixed-model equations (Henderson 1975, Biometrics 31:423-447, from memory):
    # [X'X X'Z; Z'X Z'Z + s2 G^-1] [b; u] = [X'y; Z'y], with G diagonal.
    shrink = np.concatenate([np.full(z.shape[1], scale / variances[name]) for name, z in kept]
                            ) if kept else np.zeros(0)
    w = np.hstack([x, z_all])
    lhs = w.T @ w
    lhs[x.shape[1]:, x.shape[1]:] += np.diag(shrink)
    inverse = scipy.linalg.cho_solve(scipy.linalg.cho_factor(lhs), np.eye(lhs.shape[0]))
    solution = inverse @ (w.T @ y)

    # Coefficients turning the solution into entry means (least-squares means, or predictions).
    lead = np.concatenate(weights)
    coef = np.zeros((t, w.shape[1]))
    coef[:, :p_before_entries] = lead
    if entries_random:
        start = x.shape[1] + sum(z.shape[1] for name, z in kept if name != "entry")
        if variances["entry"] > 0:
            coef[np.arange(t), start + np.arange(t)] = 1.0
    else:
        coef[np.arange(1, t), p_before_entries + np.arange(t - 1)] = 1.0
    means = coef @ solution
    # Covariance of the estimates and prediction-error covariance of the predictions: s2 times
    # the inverse coefficient matrix (Henderson 1975).
    means_cov = coef @ inverse @ coef.T * scale

    fitted = w @ solution
    effects: dict[str, np.ndarray] = {}
    offset = x.shape[1]
    for name, z in kept:
        if name != "entry":
            effects[name] = z @ solution[offset:offset + z.shape[1]]
        offset += z.shape[1]
    for name, _ in random:  # a term left out, or estimated as zero, has no effect
        effects.setdefault(name, np.zeros(n))
    covariate_effect = None
    if cov_x is not None:
        slope = solution[p_before_entries - 1]
        covariate_effect = slope * (cov_x - cov_x.mean())
    return MixedFit(
        entries=entries,
        entries_random=entries_random,
        means=means,
        means_cov=means_cov,
        replication=np.bincount(entry_code, minlength=t),
        components={**variances, "residual": scale},
        residual_df=residual_df,
        anova=anova,
        fitted=fitted,
        effects=effects,
        covariate_effect=covariate_effect,
        converged=converged,
        warnings=tuple(notes),
    )


def _confounded(codes: np.ndarray, fixed: list[tuple[str, np.ndarray]],
                earlier: list[tuple[str, np.ndarray]]) -> str | None:
    """Why a random term cannot be told apart from the terms before it, or None if it can.

    A random term whose every level is a union of levels of a fixed term (a single level, or the
    replicates again) lies in the space of the fixed effects, so its variance is not estimable; a
    random term grouping the plots exactly as an earlier one does is the same term twice.
    """
    levels = codes.max() + 1
    if levels < 2:
        return "it has a single level"
    for name, other in fixed:
        if len(set(zip(other.tolist(), codes.tolist(), strict=True))) == other.max() + 1:
            return f"its levels are made of whole {name} levels (fixed effects)"
    for name, other in earlier:
        pairs = len(set(zip(other.tolist(), codes.tolist(), strict=True)))
        if pairs == levels == other.max() + 1:
            return f"it groups the plots exactly as the {name} term does"
    return None


def _check_full_rank(x: np.ndarray, trait: str | None) -> None:
    # The eigenvalues of X'X are the squared singular values of X, computed to about 1e-16 of
    # the largest: a ratio under 1e-12 (singular values 1e-6 apart) is a design with a direction
    # the data do not determine.
    eigenvalues = np.linalg.eigvalsh(x.T @ x)
    if eigenvalues[0] < 1e-12 * eigenvalues[-1]:
        raise TrialInputError("the fixed effects are not estimable (the design is rank deficient, "
                              "or the covariate is constant or follows the other terms)",
                              column=trait)


def mean_sed_squared(cov: np.ndarray) -> float:
    """Average variance of a difference between two means, over all pairs.

    >>> mean_sed_squared(np.diag([1.0, 1.0, 1.0]))
    2.0
    """
    var = np.diag(cov)
    iu = np.triu_indices(len(var), k=1)
    return float(np.mean(var[iu[0]] + var[iu[1]] - 2.0 * cov[iu]))


def efficiency_percent(reference_cov: np.ndarray, cov: np.ndarray) -> float:
    """Efficiency of an analysis relative to a reference analysis of the same data, in percent.

    100 x (average SED^2 of the reference) / (average SED^2 of the analysis), common practice;
    with the complete-block analysis as reference, the gain from the incomplete blocks (or the
    field-trend adjustment).

    >>> efficiency_percent(np.eye(3) * 2.0, np.eye(3))
    200.0
    """
    return 100.0 * mean_sed_squared(reference_cov) / mean_sed_squared(cov)


def generalized_heritability(pev: np.ndarray, entry_variance: float) -> float:
    """Heritability of entry BLUPs from their prediction-error covariance.

    H2 = 1 - v / (2 s2_entry), ``v`` the average prediction-error variance of a difference of two
    BLUPs (Cullis, Smith & Coombes 2006, JABES 11:381-393, from memory). It is 0 when the entry
    variance is 0.

    >>> generalized_heritability(np.eye(4) * 0.25, 1.0)
    0.75
    """
    if entry_variance <= 0:
        return 0.0
    # Cullis, Smith & Coombes 2006, JABES 11:381-393: H2 = 1 - vBLUP / (2 s2_g) (from memory)
    return 1.0 - mean_sed_squared(pev) / (2.0 * entry_variance)
