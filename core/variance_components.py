"""Variance components of a series of trials, and the heritability of entry means.

A series grows the same entries in several environments (a location in a season). Taking entries
and the entry x environment interaction as random, the variance of the plots splits into the
entry variance ``s2G``, the entry x environment variance ``s2GE`` and the plot error ``s2e``.
They are estimated either from the mean squares of a balanced analysis of variance (their
expectations solved for the components) or by REML from the plots, balanced or not.

With one value per entry and environment (a table of entry means), ``s2GE`` and ``s2e`` cannot be
told apart: the residual then holds both, and is reported as ``error``.

Examples
--------
>>> vc = components_from_anova(30.0, 6.0, 2.0, replicates=4, environments=3)
>>> vc.entry, vc.entry_by_environment, vc.error
(2.0, 1.0, 2.0)
>>> round(vc.heritability, 6)
0.8
"""

from __future__ import annotations

import math
import statistics
import warnings
from dataclasses import dataclass, fields

import numpy as np
import pandas as pd
from statsmodels.regression.mixed_linear_model import MixedLM

from trialdesk.core.errors import TrialInputError

__all__ = [
    "VarianceComponents",
    "components_from_anova",
    "components_reml",
    "entry_mean_heritability",
]

FORMULA_WITH_INTERACTION = "H2 = s2G / (s2G + s2GE/e + s2e/(r e))"
FORMULA_MEANS_ONLY = ("H2 = s2G / (s2G + s2res/e), s2res the residual variance of the "
                      "entry-environment means (entry x environment and error together)")
HERITABILITY_SOURCE = ("entry-mean heritability: Holland, Nyquist & Cervantes-Martinez 2003, "
                       "Plant Breeding Reviews 22:9-112 (quoted from memory)")
ANOVA_SOURCE = ("expected mean squares of the analysis over environments with entries and entry x "
                "environment random: Hallauer & Miranda 1981, Quantitative Genetics in Maize "
                "Breeding, Iowa State University Press (quoted from memory, chapter not checked); "
                + HERITABILITY_SOURCE)
REML_SOURCE = ("REML: Patterson & Thompson 1971, Biometrika 58:545-554, fitted with statsmodels "
               "MixedLM; " + HERITABILITY_SOURCE + "; e and r as harmonic means for unbalanced "
               "data (an approximation)")
# A REML component this small beside the sum of the components is zero to the optimizer's
# precision (the simplex search reaches about 1e-8 of it at the boundary).
BOUNDARY = 1e-6


@dataclass(frozen=True, slots=True, kw_only=True)
class VarianceComponents:
    """The variance components of a series and the heritability of entry means.

    Attributes
    ----------
    method : str
        ``"REML"`` or ``"ANOVA"`` (expected mean squares of a balanced analysis).
    entry : float
        ``s2G``, the variance among entries.
    entry_by_environment : float or None
        ``s2GE``, the entry x environment variance; None when it cannot be separated from the
        error (one value per entry and environment).
    error : float
        ``s2e``, the plot error variance; with one value per entry and environment, the residual
        variance of those values, which holds the entry x environment variance and the error of a
        mean together.
    n_environments : float
        ``e``, environments per entry (harmonic mean over entries where unequal).
    replicates : float
        ``r``, values per entry-environment cell (harmonic mean over the cells where unequal). With
        one value per entry and environment it does not enter the heritability.
    heritability : float
        Broad-sense heritability on an entry-mean basis (see ``heritability_formula``); NaN when
        all components are zero.
    heritability_formula : str
        The formula used, in symbols.
    source : str
        The published sources of the estimates and the formula.
    converged : bool
        Whether the estimation converged (always True for ANOVA, a closed form).
    warnings : tuple of str
        Estimates set to zero, components on the boundary, approximations, failed convergence.
    """

    method: str
    entry: float
    entry_by_environment: float | None
    error: float
    n_environments: float
    replicates: float
    heritability: float
    heritability_formula: str
    source: str
    converged: bool
    warnings: tuple[str, ...]

    def to_dict(self) -> dict:
        """Plain data: one key per attribute, ``warnings`` as a list."""
        return {f.name: (list(v) if isinstance(v := getattr(self, f.name), tuple) else v)
                for f in fields(self)}


def entry_mean_heritability(
    entry: float,
    entry_by_environment: float | None,
    error: float,
    *,
    environments: float,
    replicates: float,
) -> float:
    """Broad-sense heritability of entry means over environments.

    Parameters
    ----------
    entry, entry_by_environment, error : float
        The variance components ``s2G``, ``s2GE`` and ``s2e`` (each at least 0). When
        ``entry_by_environment`` is None, ``error`` is the residual variance of entry-environment
        means (interaction and error together) and ``replicates`` does not enter.
    environments, replicates : float
        ``e`` and ``r`` (above 0), harmonic means where they differ between entries or cells.

    Returns
    -------
    float
        ``s2G / (s2G + s2GE/e + s2e/(r e))``, or ``s2G / (s2G + s2res/e)`` without a separate
        interaction; NaN when the denominator is zero (all components zero).

    Raises
    ------
    TrialInputError
        If a component is negative or not finite, or ``environments`` or ``replicates`` is not
        above 0.

    Examples
    --------
    >>> entry_mean_heritability(2.0, 1.0, 2.0, environments=3, replicates=4)
    0.8
    """
    for name, component in (("entry", entry), ("entry x environment", entry_by_environment),
                            ("error", error)):
        if component is not None and not (math.isfinite(component) and component >= 0):
            raise TrialInputError(
                f"the {name} variance must be a number of at least 0, not {component}")
    _check_positive("environments", environments)
    _check_positive("replicates", replicates)
    if entry_by_environment is None:
        # H2 = s2G / (s2G + s2res/e) on entry means over e environments (Holland, Nyquist &
        # Cervantes-Martinez 2003, Plant Breeding Reviews 22:9-112, from memory)
        phenotypic = entry + error / environments
    else:
        # H2 = s2G / (s2G + s2GE/e + s2e/(r e)) (Holland, Nyquist & Cervantes-Martinez 2003, Plant
        # Breeding Reviews 22:9-112; Hallauer & Miranda 1981; both from memory)
        phenotypic = entry + entry_by_environment / environments + error / (replicates
                                                                            * environments)
    return entry / phenotypic if phenotypic > 0 else math.nan


def components_from_anova(
    ms_entry: float,
    ms_entry_by_env: float | None,
    ms_error: float,
    *,
    replicates: float,
    environments: float,
) -> VarianceComponents:
    """Variance components from the mean squares of a balanced analysis over environments.

    Parameters
    ----------
    ms_entry : float
        Mean square of entries.
    ms_entry_by_env : float or None
        Mean square of the entry x environment interaction, from plot data (r replicates per
        entry and environment). None when the analysis is of entry means (one value per entry and
        environment): ``ms_error`` is then the residual mean square of that analysis.
    ms_error : float
        Error mean square (plot basis), or the residual mean square of the means.
    replicates : float
        ``r``, replicates per entry and environment (with means only, recorded but not used).
    environments : float
        ``e``, the number of environments.

    Returns
    -------
    VarianceComponents
        ``method="ANOVA"``. A negative estimate is set to 0 with a warning that keeps the raw
        value (common practice).

    Raises
    ------
    TrialInputError
        If a mean square is negative or not finite, or ``replicates`` or ``environments`` is not
        above 0.

    Notes
    -----
    Balanced expectations with entries and entry x environment random: ``E(MSe) = s2e``,
    ``E(MS_GE) = s2e + r s2GE``, ``E(MS_G) = s2e + r s2GE + r e s2G``; on means,
    ``E(MS_res) = s2res`` and ``E(MS_G) = s2res + e s2G``.
    """
    for name, ms in (("entries", ms_entry), ("entry x environment", ms_entry_by_env),
                     ("error", ms_error)):
        if ms is not None and not (math.isfinite(ms) and ms >= 0):
            raise TrialInputError(f"the mean square of {name} must be a number of at least 0, "
                                  f"not {ms}")
    _check_positive("replicates", replicates)
    _check_positive("environments", environments)
    notes: list[str] = []
    if ms_entry_by_env is None:
        interaction = None
        # s2G = (MS_G - MS_res)/e on entry means (Hallauer & Miranda 1981, from memory)
        entry = _not_negative("entry", (ms_entry - ms_error) / environments, notes)
        formula = FORMULA_MEANS_ONLY
    else:
        # s2GE = (MS_GE - MSe)/r (Hallauer & Miranda 1981, Quantitative Genetics in Maize
        # Breeding, from memory)
        interaction = _not_negative("entry x environment", (ms_entry_by_env - ms_error)
                                    / replicates, notes)
        # s2G = (MS_G - MS_GE)/(r e) (Hallauer & Miranda 1981, from memory)
        entry = _not_negative("entry", (ms_entry - ms_entry_by_env) / (replicates * environments),
                              notes)
        formula = FORMULA_WITH_INTERACTION
    return _result("ANOVA", entry, interaction, float(ms_error), environments, replicates,
                   formula, ANOVA_SOURCE, True, notes)


def components_reml(
    frame: pd.DataFrame,
    *,
    value: str = "y",
    entry: str = "entry",
    environment: str = "environment",
    block: str | None = "block",
) -> VarianceComponents:
    """Variance components by REML from the plots of a series, balanced or not.

    Parameters
    ----------
    frame : pandas.DataFrame
        One row per plot (or per entry and environment for a table of means). Rows whose value is
        missing are left out.
    value, entry, environment : str
        The columns holding the value, the entry code and the environment.
    block : str or None
        The column of blocks (replicates) within environments. Used when given and present in
        ``frame``; otherwise environments alone are the fixed effects.

    Returns
    -------
    VarianceComponents
        ``method="REML"``. Environments (and blocks within environments) are fixed; entries and
        entry x environment are random. With one value per entry and environment only entries are
        random, ``entry_by_environment`` is None and ``error`` holds interaction and error.

    Raises
    ------
    TrialInputError
        If a column is missing, a value is not a number, a label is missing, there are fewer than
        2 entries or 2 environments, too few values to estimate anything, all values are equal,
        or the fit fails numerically.

    Notes
    -----
    The heritability on an entry-mean basis uses ``e``, the harmonic mean over entries of the
    environments each was grown in, and ``r``, the harmonic mean over entry-environment cells of
    the values in each (Holland, Nyquist & Cervantes-Martinez 2003, Plant Breeding Reviews
    22:9-112, from memory). For unbalanced data this is an approximation, and a warning says so.

    The REML likelihood is maximized with statsmodels ``MixedLM``, each entry one group (both
    random terms are nested in entries). A quasi-Newton (BFGS) search comes first; it is precise
    inside the parameter space but can stall next to a component at zero. When it does not
    converge, a simplex (Nelder-Mead) search, which reaches such a component, is run and then
    refined by BFGS from its result. The fit with the highest REML log-likelihood is kept; it
    counts as converged when at least one of the searches converged. statsmodels' own warnings
    are replaced by the plain ones in ``warnings``.
    """
    data = _plots(frame, value, entry, environment, block)
    cells = data.groupby(["entry", "environment"]).size()
    separate = bool((cells > 1).any())
    # Harmonic means of replicates per cell and environments per entry (Holland, Nyquist &
    # Cervantes-Martinez 2003, Plant Breeding Reviews 22:9-112, from memory)
    replicates = float(statistics.harmonic_mean(cells.tolist()))
    per_entry = data.groupby("entry")["environment"].nunique()
    environments = float(statistics.harmonic_mean(per_entry.tolist()))
    # Both random terms are nested in entries, so the plots of different entries are independent
    # and each entry is one group: a random intercept (s2G) and, within it, one effect per
    # environment (s2GE).
    model = MixedLM.from_formula("y ~ 0 + C(fixed)", groups="entry", re_formula="1",
                                 vc_formula={"ge": "0 + C(environment)"} if separate else None,
                                 data=data)
    fit, converged = _fit(model)
    components = {"entry": float(np.asarray(fit.cov_re)[0, 0])}
    if separate:
        components["ge"] = float(fit.vcomp[0])
    error = float(fit.scale)
    if not all(math.isfinite(v) for v in (*components.values(), error)):
        raise TrialInputError("the variance components could not be estimated: the REML fit gave "
                              "no finite values")
    notes: list[str] = []
    if not converged:
        notes.append("REML did not converge: the components are the best values found and may "
                     "be inaccurate")
    words = {"entry": "entry", "ge": "entry x environment"}
    total = sum(components.values()) + error
    notes.extend(f"the REML estimate of the {words[name]} variance is zero (on the boundary of "
                 f"the parameter space)" for name, v in components.items() if v <= BOUNDARY * total)
    if cells.nunique() > 1 or per_entry.nunique() > 1:
        notes.append(f"unbalanced data: the heritability uses harmonic means, e = {environments!r} "
                     f"environments per entry and r = {replicates!r} values per cell (an "
                     f"approximation)")
    formula = FORMULA_WITH_INTERACTION if separate else FORMULA_MEANS_ONLY
    return _result("REML", components["entry"], components.get("ge"), error, environments,
                   replicates, formula, REML_SOURCE, converged, notes)


def _result(method: str, entry: float, interaction: float | None, error: float,
            environments: float, replicates: float, formula: str, source: str, converged: bool,
            notes: list[str]) -> VarianceComponents:
    """The result, with the heritability of the components given."""
    heritability = entry_mean_heritability(entry, interaction, error, environments=environments,
                                           replicates=replicates)
    if math.isnan(heritability):
        notes.append("all variance components are zero: the heritability is undefined")
    return VarianceComponents(
        method=method, entry=entry, entry_by_environment=interaction, error=error,
        n_environments=float(environments), replicates=float(replicates),
        heritability=heritability, heritability_formula=formula, source=source,
        converged=converged, warnings=tuple(notes))


def _check_positive(name: str, number: float) -> None:
    if not (math.isfinite(number) and number > 0):
        raise TrialInputError(f"{name} must be a number above 0, not {number}")


def _not_negative(name: str, raw: float, notes: list[str]) -> float:
    """The estimate, or 0 with a note when it is negative (common practice)."""
    if raw < 0:
        notes.append(f"the ANOVA estimate of the {name} variance is negative ({float(raw)!r}); "
                     f"it is set to 0 (common practice)")
        return 0.0
    return float(raw)


def _plots(frame: pd.DataFrame, value: str, entry: str, environment: str,
           block: str | None) -> pd.DataFrame:
    """The plots with a value, under fixed column names, checked for what REML needs."""
    for column in (value, entry, environment):
        if column not in frame.columns:
            raise TrialInputError("column not found in the plots of the series", column=column)
    use_block = block is not None and block in frame.columns
    numbers = pd.to_numeric(frame[value], errors="coerce")
    bad = frame[value].notna() & numbers.isna()
    if bad.any():
        first = int(np.flatnonzero(bad.to_numpy())[0])
        raise TrialInputError(f"{frame[value].iloc[first]!r} is not a number (row "
                              f"{frame.index[first]} of the plots)", column=value)
    if np.isinf(numbers).any():
        first = int(np.flatnonzero(np.isinf(numbers).to_numpy())[0])
        raise TrialInputError(f"the value in row {frame.index[first]} of the plots is infinite",
                              column=value)
    keep = numbers.notna().to_numpy()
    labels = [entry, environment, *([block] if use_block else [])]
    for column in labels:
        unlabelled = keep & frame[column].isna().to_numpy()
        if unlabelled.any():
            label = frame.index[unlabelled][0]
            raise TrialInputError(f"row {label} of the plots has a value but no label",
                                  column=column)
    kept = frame[keep]
    data = pd.DataFrame({"y": numbers[keep].to_numpy(dtype=float),
                         "entry": kept[entry].astype(str).to_numpy(),
                         "environment": kept[environment].astype(str).to_numpy()})
    data["fixed"] = kept.groupby(labels[1:], sort=False).ngroup().to_numpy()
    for what, column in (("entries", "entry"), ("environments", "environment")):
        if data[column].nunique() < 2:
            raise TrialInputError(f"variance components need at least 2 {what} with values; "
                                  f"there are {data[column].nunique()}")
    if len(data) - data["fixed"].nunique() < 2:
        raise TrialInputError("too few values to estimate variance components: the series needs "
                              "more values than environments (and blocks) plus one")
    if np.ptp(data["y"].to_numpy()) == 0:
        raise TrialInputError("all values are equal: there is no variation to split",
                              column=value)
    return data


def _fit(model: MixedLM):
    """The REML fit kept (see :func:`components_reml`) and whether it converged."""
    failures: list[Exception] = []
    # gtol: BFGS's default 1e-5 stops at about 1e-4 of the balanced-data solution, 1e-8 at 1e-7.
    fits = [_attempt(model, failures, method=["bfgs"], gtol=1e-8)]
    if fits[0] is None or not fits[0].converged:
        # maxiter: the simplex needs more steps than statsmodels' default of 100 to settle next
        # to a zero component.
        simplex = _attempt(model, failures, method=["nm"], maxiter=5000)
        if simplex is not None:
            fits += [simplex, _attempt(model, failures, method=["bfgs"], gtol=1e-8,
                                       start_params=simplex.params_object)]
    usable = [f for f in fits if f is not None and np.isfinite(f.llf)]
    if not usable:
        reason = f" ({failures[-1]})" if failures else ": the REML likelihood is not finite"
        raise TrialInputError("the variance components could not be estimated: the REML fit "
                              "failed numerically" + reason)
    # The fit kept is the best point found; it counts as converged when some search converged,
    # since it is then at least as good as that search's optimum.
    return max(usable, key=lambda f: f.llf), any(f.converged for f in usable)


def _attempt(model: MixedLM, failures: list[Exception], **options):
    """One REML fit with statsmodels' warnings silenced; None (the error noted) if it fails."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return model.fit(reml=True, **options)
        except (np.linalg.LinAlgError, ValueError, ArithmeticError) as error:
            failures.append(error)
            return None
