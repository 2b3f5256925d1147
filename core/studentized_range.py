"""The studentized range distribution, computed once per (k, df) and evaluated for many q at once.

Tukey's HSD and the step-down range tests need P(Q >= q) for the studentized range Q of k means
with df error degrees of freedom, for every pair of entries: 11,175 values that share k and df in
a trial of 150 entries. Integrating the distribution afresh per value is slow, so this module
splits the work into a part that depends on k only, a part that depends on (k, df) and a cheap
evaluation per value.

Method
------
1. Range of k standard normals (the "known variance" part, depends on k only). Its survival
   function is Hartley's single integral (Hartley 1942, Biometrika 32:334-348; the form tabulated
   by Harter 1960, Ann. Math. Stat. 31:1122-1147), written directly for the upper tail::

       S_k(x) = P(W >= x) = k * Int phi(z) [Phi(z)^(k-1) - (Phi(z) - Phi(z - x))^(k-1)] dz

   evaluated in logarithms (so that tail probabilities down to 1e-300 keep their relative
   accuracy) by the trapezoidal rule with step 0.08 on [-40, 40]. For a smooth, rapidly
   decaying integrand on the whole line the trapezoidal rule converges geometrically (Trefethen
   & Weideman 2014, SIAM Review 56:385-458); the step was checked against
   scipy.stats.studentized_range with infinite df and against the exact k = 2 case,
   S_2(x) = 2 Phi(-x / sqrt(2)), to about 1e-14. ``log S_k`` is then represented on
   [0, x_max] by piecewise Chebyshev interpolants of degree 31, each piece split in two until its
   last Chebyshev coefficients fall below 1e-12 of its size (a self-checking fit in the manner of
   Battles & Trefethen 2004, SIAM J. Sci. Comput. 25:1743-1770). Beyond x_max, S_k < e^-750.

2. Studentization (depends on k and df). With s = sqrt(chi2_df / df) independent of W,
   P(Q >= q) = E[S_k(q s)], the outer integral of the Copenhaver & Holland (1988, J. Statist.
   Comput. Simul. 30:1-15) double-integral form. It is integrated over y = log s, where the
   density of y is g(y) = 2 (df/2)^(df/2) / Gamma(df/2) * exp(df y - df e^(2y) / 2). To keep
   relative accuracy in the far tail the integral is split at y_c, the point where q e^(y_c)
   is the median x_med of W::

       P(Q >= q) = G(y_c) - Int_{-inf}^{y_c} g(y) C(q e^y) dy + Int_{y_c}^{inf} g(y) S(q e^y) dy

   with C = 1 - S and G the distribution function of y (a regularized incomplete gamma
   function). Below the median C <= 1/2, so the subtraction loses at most one bit. Each of the
   two integrals is unimodal; its support (where the log integrand is within 40 of its maximum)
   is located by two passes of a 33-point grid, then integrated by 48-point Gauss-Legendre rules
   on either side of the maximum.

3. Many values at once. For more than 100 distinct q, ``log P(Q >= q)`` is itself
   fitted by piecewise Chebyshev interpolants in log q over the range of the data (tolerance
   1e-11 of its size) from exact values at the nodes, and evaluated for all q.

Accuracy: against scipy.stats.studentized_range (whose quadrature is set to 1e-11) the absolute
difference is below 1e-11 over k = 2..600, df = 1..10,000 and infinite df (tests use 1e-9);
for k = 2 the tail agrees with 2 P(T >= q / sqrt(2)) to a relative 1e-10 down to 1e-300.
Values below about 1e-300 underflow to 0.

References
----------
Copenhaver, M. D. & Holland, B. (1988). Computation of the distribution of the maximum
studentized range statistic with application to multiple significance testing of simple effects.
J. Statist. Comput. Simul. 30:1-15.
Harter, H. L. (1960). Tables of range and studentized range. Ann. Math. Stat. 31:1122-1147.
Hartley, H. O. (1942). The range in random samples. Biometrika 32:334-348.

Examples
--------
>>> round(float(range_sf(3.877, 3, 10)), 4)
0.05
>>> round(range_quantile(0.05, 10, 20), 3)
5.008
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from numpy.typing import ArrayLike
from scipy import fft, optimize, special

from trialdesk.core.errors import TrialInputError

_LOG_FLOOR = -750.0  # exp(-750) underflows to 0 in double precision
_LN2 = float(np.log(2.0))

# Step 1: trapezoidal rule for the range of k normals.
_Z_STEP = 0.08
_Z = np.arange(-40.0, 40.0 + _Z_STEP / 2, _Z_STEP)
_LOG_PDF_Z = -0.5 * _Z * _Z - 0.5 * np.log(2.0 * np.pi)
_LOG_CDF_Z = special.log_ndtr(_Z)

# Piecewise Chebyshev fits.
_CHEB_NODES = 32
_CHEB_TOL = 1e-12
_MAX_PIECES = 4096

# Step 2: quadrature over y = log s.
_CHI_SPAN = 800.0  # the chi density is below e^-800 of its peak outside [y_low, y_high]
_SUPPORT = 40.0  # integrand values below e^-40 of the maximum are dropped
_COARSE = np.linspace(0.0, 1.0, 33)
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(48)
_C_NEGLIGIBLE = 1e-13  # C(x) below this is dropped (relative effect below 2e-13)

# Step 3: how many distinct values are computed directly before fitting in log q.
_DIRECT_LIMIT = 100
_FINAL_TOL = 1e-11


def log1mexp(a: ArrayLike) -> np.ndarray:
    """log(1 - exp(a)) for a <= 0, accurate near both ends.

    Maechler (2012), "Accurately computing log(1 - exp(-|a|))", vignette of the R package Rmpfr.
    """
    a = np.asarray(a, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(a > -_LN2, np.log(-np.expm1(a)), np.log1p(-np.exp(a)))


@dataclass(frozen=True, eq=False)
class ChebyshevPieces:
    """A smooth function on [breaks[0], breaks[-1]] as piecewise Chebyshev series.

    Attributes
    ----------
    breaks : ndarray
        Increasing end points of the pieces, length n + 1.
    coefs : ndarray
        Chebyshev coefficients, shape (n, degree + 1), for each piece on its own [-1, 1].
    left, right : float
        Values returned below ``breaks[0]`` and above ``breaks[-1]``.
    """

    breaks: np.ndarray
    coefs: np.ndarray
    left: float
    right: float

    @classmethod
    def fit(
        cls,
        func: Callable[[np.ndarray], np.ndarray],
        breaks: ArrayLike,
        *,
        left: float,
        right: float,
        tol: float = _CHEB_TOL,
    ) -> ChebyshevPieces:
        """Fit ``func`` (vectorized) starting from the pieces ``breaks``, halving pieces until
        the last three Chebyshev coefficients of each are below ``tol * max(1, min|func|)``:
        an absolute tolerance where the function is small, a relative one where it is large
        throughout the piece."""
        n = _CHEB_NODES
        nodes = np.cos(np.pi * (np.arange(n) + 0.5) / n)  # Chebyshev points of the first kind
        edges = np.asarray(breaks, dtype=float)
        todo_a, todo_b = edges[:-1], edges[1:]
        done_a, done_b, done_c = [], [], []
        while todo_a.size:
            x = 0.5 * (todo_a + todo_b)[:, None] + 0.5 * (todo_b - todo_a)[:, None] * nodes
            values = func(x.ravel()).reshape(x.shape)
            coefs = fft.dct(values, type=2, axis=1) / n  # Chebyshev coefficients from the DCT-II
            coefs[:, 0] /= 2
            scale = np.maximum(1.0, np.abs(values).min(axis=1))
            ok = np.abs(coefs[:, -3:]).max(axis=1) <= tol * scale
            done_a.append(todo_a[ok])
            done_b.append(todo_b[ok])
            done_c.append(coefs[ok])
            mid = 0.5 * (todo_a[~ok] + todo_b[~ok])
            todo_a = np.concatenate([todo_a[~ok], mid])
            todo_b = np.concatenate([mid, todo_b[~ok]])
            if sum(map(len, done_a)) + todo_a.size > _MAX_PIECES:
                raise ArithmeticError("piecewise Chebyshev fit did not converge")
        a, b, c = np.concatenate(done_a), np.concatenate(done_b), np.concatenate(done_c)
        order = np.argsort(a)
        return cls(np.append(a[order], b[order][-1]), c[order], float(left), float(right))

    def __call__(self, x: ArrayLike) -> np.ndarray:
        """Evaluate at ``x`` (any shape) by Clenshaw's recurrence."""
        x = np.asarray(x, dtype=float)
        edges = self.breaks
        piece = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, len(edges) - 2)
        a, b = edges[piece], edges[piece + 1]
        t = np.clip((2.0 * x - (a + b)) / (b - a), -1.0, 1.0)
        t2 = 2.0 * t
        b1 = np.zeros_like(t)
        b2 = np.zeros_like(t)
        for j in range(self.coefs.shape[1] - 1, 0, -1):
            b1, b2 = self.coefs[piece, j] + t2 * b1 - b2, b1
        value = self.coefs[piece, 0] + t * b1 - b2
        value = np.where(x < edges[0], self.left, value)
        return np.where(x > edges[-1], self.right, value)


@dataclass(frozen=True, eq=False)
class KnownVarianceTail:
    """Upper tail of a statistic whose error variance is known, ready to be studentized.

    Attributes
    ----------
    log_sf : callable
        Vectorized log P(X >= x), never above 0; 0 below its domain, -inf above ``x_max``.
    x_med : float
        Median of X (log_sf(x_med) = -log 2).
    x_low : float
        A positive point below which P(X < x) < 1e-13, or -inf when there is none.
    x_max : float
        Above this point P(X >= x) is 0 (or below e^-750).
    """

    log_sf: Callable[[np.ndarray], np.ndarray]
    x_med: float
    x_low: float
    x_max: float

    @classmethod
    def fit(
        cls, exact_log_sf: Callable[[np.ndarray], np.ndarray], x_min: float, x_max: float
    ) -> KnownVarianceTail:
        """Fit ``exact_log_sf`` on [x_min, x_max] and locate its median and lower end."""
        breaks = np.append(np.arange(x_min, x_max, 4.0), x_max)
        pieces = ChebyshevPieces.fit(exact_log_sf, breaks, left=0.0, right=-np.inf)

        def log_sf(x: ArrayLike) -> np.ndarray:  # the fit may stray a rounding error above 0
            return np.minimum(pieces(x), 0.0)

        def shifted(level: float) -> Callable[[float], float]:
            return lambda x: float(log_sf(x)) - level

        x_med = optimize.brentq(shifted(-_LN2), x_min, x_max, xtol=1e-14)
        level_low = float(np.log1p(-_C_NEGLIGIBLE))
        if float(log_sf(max(x_min, 0.0))) >= level_low:
            x_low = optimize.brentq(shifted(level_low), max(x_min, 0.0), x_med, xtol=1e-300)
        else:
            x_low = -np.inf
        return cls(log_sf, float(x_med), float(x_low), float(x_max))


@lru_cache(maxsize=256)
def _chi_bounds(df: float) -> tuple[float, float, float]:
    """[y_low, y_high] outside which the density of y = log s is below e^-800 of its peak,
    and the log of its normalizing constant."""
    a = df / 2.0
    target = _CHI_SPAN / a

    def excess(y: float) -> float:
        return float(np.expm1(2.0 * y) - 2.0 * y) - target

    # expm1(2y) - 2y >= 2y^2 for y >= 0 and >= -2y - 1 for all y bracket the two roots.
    y_high = optimize.brentq(excess, 0.0, np.sqrt(target / 2.0), xtol=1e-15)
    y_low = optimize.brentq(excess, -(target + 1.0) / 2.0, 0.0, xtol=1e-15)
    return y_low, y_high, _LN2 + _log_chi_constant(a)


def _log_chi_constant(a: float) -> float:
    """a log a - a - log Gamma(a), without cancellation for large a.

    For a >= 20 from Stirling's series for log Gamma (Abramowitz & Stegun 1964, eq. 6.1.41);
    the omitted term is below 2e-15.
    """
    if a >= 20.0:
        remainder = 1 / (12 * a) - 1 / (360 * a**3) + 1 / (1260 * a**5) - 1 / (1680 * a**7)
        return 0.5 * float(np.log(a / (2.0 * np.pi))) - remainder
    return a * float(np.log(a)) - a - float(special.gammaln(a))


def _log_integral(log_f: Callable[[np.ndarray], np.ndarray], lo: np.ndarray, hi: np.ndarray):
    """log of Int_lo^hi f(y) dy per row, for a unimodal f given as log f(y) (rows x points)."""
    lo = lo.copy()
    hi = np.maximum(hi, lo)
    rows = np.arange(lo.size)
    peak = lo
    with np.errstate(invalid="ignore"):
        for _ in range(2):
            y = lo[:, None] + (hi - lo)[:, None] * _COARSE
            values = log_f(y)
            top = values.max(axis=1, keepdims=True)
            kept = values >= top - _SUPPORT
            first = np.argmax(kept, axis=1)
            last = len(_COARSE) - 1 - np.argmax(kept[:, ::-1], axis=1)
            peak = y[rows, np.argmax(values, axis=1)]
            lo = y[rows, np.maximum(first - 1, 0)]
            hi = y[rows, np.minimum(last + 1, len(_COARSE) - 1)]
        terms = []
        for a, b in ((lo, peak), (peak, hi)):
            half = 0.5 * (b - a)
            y = 0.5 * (a + b)[:, None] + half[:, None] * _GL_NODES
            with np.errstate(divide="ignore"):
                terms.append(log_f(y) + np.log(_GL_WEIGHTS) + np.log(half)[:, None])
        return special.logsumexp(np.concatenate(terms, axis=1), axis=1)


def studentized_sf(tail: KnownVarianceTail, q: ArrayLike, df: float) -> np.ndarray:
    """P(X / s >= q) where X has the known-variance upper tail ``tail`` and s = sqrt(chi2_df/df).

    Parameters
    ----------
    tail : KnownVarianceTail
        The statistic with known error variance.
    q : array_like
        Points (1-D).
    df : float
        Error degrees of freedom (> 0, finite).

    Returns
    -------
    ndarray
        Upper-tail probabilities, same length as ``q`` (see the module notes for the method).
    """
    q = np.asarray(q, dtype=float)
    y_low, y_high, log_const = _chi_bounds(float(df))
    a = df / 2.0

    def log_g(y: np.ndarray) -> np.ndarray:
        return log_const - a * (np.expm1(2.0 * y) - 2.0 * y)

    def x_at(y: np.ndarray) -> np.ndarray:  # x = q s for each row's q
        with np.errstate(over="ignore"):
            return q[:, None] * np.exp(y)

    # For q <= 0 (one-sided statistics only) no split is needed: sf = 1 - Int g C.
    positive = q > 0
    log_q = np.log(np.where(positive, q, 1.0))

    def log_point(x: float) -> float:  # a one-sided median may be 0; x_low may be -inf
        return float(np.log(x)) if x > 0 else -np.inf

    y_c = np.where(positive, np.clip(log_point(tail.x_med) - log_q, y_low, y_high), y_high)
    lo = np.where(positive, np.maximum(y_low, log_point(tail.x_low) - log_q), y_low)
    hi = np.where(positive, np.minimum(y_high, log_point(tail.x_max) - log_q), y_high)
    lo = np.minimum(lo, y_c)
    hi = np.maximum(hi, y_c)

    def log_below(y: np.ndarray) -> np.ndarray:  # g(y) C(q e^y) left of the median
        return log_g(y) + log1mexp(tail.log_sf(x_at(y)))

    def log_above(y: np.ndarray) -> np.ndarray:  # g(y) S(q e^y) right of the median
        return log_g(y) + tail.log_sf(x_at(y))

    below_mass = special.gammainc(a, a * np.exp(2.0 * y_c))  # G(y_c) = P(chi2 <= df e^(2 y_c))
    below = np.exp(_log_integral(log_below, lo, y_c))
    above = np.exp(_log_integral(log_above, y_c, hi))
    return np.clip(below_mass - below + above, 0.0, 1.0)


def _check_k_df(k: int, df: float) -> tuple[int, float]:
    if isinstance(k, bool) or not float(k).is_integer() or k < 2:
        raise TrialInputError(
            f"The number of means k must be a whole number of at least 2 (got {k})."
        )
    df = float(df)
    if not df > 0:
        raise TrialInputError(f"The error degrees of freedom must be positive (got {df}).")
    return int(k), df


def _range_exact_log_sf(x: np.ndarray, k: int) -> np.ndarray:
    """log P(W >= x) for the range W of k standard normals (Hartley 1942; Harter 1960)."""
    x = np.asarray(x, dtype=float)
    # log of Phi(z - x) / Phi(z), then of 1 - (1 - that)^(k-1): the bracket in the integral
    # divided by Phi(z)^(k-1), computed without cancellation.
    log_ratio = special.log_ndtr(_Z - x[:, None]) - _LOG_CDF_Z
    # Where the ratio r is below e^-40, 1 - (1 - r)^(k-1) = (k - 1) r to double precision,
    # which keeps the far tail out of underflow.
    with np.errstate(invalid="ignore"):
        log_bracket = np.where(
            log_ratio < -40.0,
            np.log(k - 1.0) + log_ratio,
            log1mexp((k - 1) * log1mexp(log_ratio)),
        )
    terms = _LOG_PDF_Z + (k - 1) * _LOG_CDF_Z + log_bracket
    return special.logsumexp(terms, axis=1) + np.log(k * _Z_STEP)


@lru_cache(maxsize=1024)
def _range_tail(k: int) -> KnownVarianceTail:
    """The range of k standard normals, fitted once per k."""
    # Bonferroni: S_k(x) <= k (k - 1) Phi(-x / sqrt 2); x_max puts that bound at e^-750.
    log_pairs = float(np.log(k * (k - 1.0)))
    x_max = optimize.brentq(
        lambda x: log_pairs + float(special.log_ndtr(-x / np.sqrt(2.0))) - _LOG_FLOOR, 0.0, 100.0
    )
    return KnownVarianceTail.fit(lambda x: _range_exact_log_sf(x, k), 0.0, x_max)


def _range_sf_positive(q: np.ndarray, k: int, df: float) -> np.ndarray:
    """P(Q >= q) for distinct positive finite q (1-D, increasing)."""
    tail = _range_tail(k)
    if np.isinf(df):
        return np.exp(tail.log_sf(q))
    # Fit in log q where the Bonferroni bound k(k-1) P(T >= q / sqrt 2) leaves room above
    # underflow; compute the rest (far tail, usually none) directly.
    with np.errstate(divide="ignore"):
        bound = np.log(k * (k - 1.0)) + np.log(special.stdtr(df, -q / np.sqrt(2.0)))
    fit_here = bound > _LOG_FLOOR + 50.0  # a leading run, since q increases
    if fit_here.sum() <= _DIRECT_LIMIT:
        return studentized_sf(tail, q, df)
    out = np.empty_like(q)
    if not fit_here.all():
        out[~fit_here] = studentized_sf(tail, q[~fit_here], df)
    w = np.log(q[fit_here])
    fitted = ChebyshevPieces.fit(
        lambda v: np.log(studentized_sf(tail, np.exp(v), df)),
        np.linspace(w[0], w[-1], 5),
        left=0.0,
        right=-np.inf,
        tol=_FINAL_TOL,
    )
    out[fit_here] = np.exp(fitted(w))
    return out


def range_sf(q: ArrayLike, k: int, df: float) -> np.ndarray:
    """P(Q >= q) for the studentized range of k means with df error degrees of freedom.

    Parameters
    ----------
    q : array_like
        Observed studentized ranges, any shape.
    k : int
        Number of means (at least 2).
    df : float
        Error degrees of freedom (> 0; ``np.inf`` for a known variance).

    Returns
    -------
    ndarray
        Upper-tail probabilities, the shape of ``q`` (1 for q <= 0, NaN for NaN).

    Notes
    -----
    See the module notes for the method and its accuracy. The distribution is fitted once per
    k (cached), so many calls with the same k are cheap.

    Examples
    --------
    >>> p = range_sf([0.0, 3.877, 10.0], 3, 10)
    >>> [round(float(v), 4) for v in p]
    [1.0, 0.05, 0.0001]
    """
    k, df = _check_k_df(k, df)
    q = np.asarray(q, dtype=float)
    out = np.where(np.isnan(q), np.nan, np.where(q > 0, 0.0, 1.0))
    usable = np.isfinite(q) & (q > 0)
    if usable.any():
        distinct, position = np.unique(q[usable], return_inverse=True)
        out[usable] = _range_sf_positive(distinct, k, df)[position]
    return out


def solve_upper_point(sf: Callable[[float], float], alpha: float, lo: float, hi: float) -> float:
    """The x with sf(x) == alpha for a decreasing sf, starting from the bracket [lo, hi].

    The bracket is widened until sf(lo) >= alpha >= sf(hi), so bounds that hold only up to
    simulation error still work; Brent's method then solves log sf(x) = log alpha.
    """
    log_alpha = float(np.log(alpha))

    def gap(x: float) -> float:
        with np.errstate(divide="ignore"):
            return float(np.log(sf(x))) - log_alpha

    step = 1e-6 * (1.0 + abs(lo))
    while gap(lo) < 0.0:
        lo -= step
        step *= 4.0
    step = 1e-6 * (1.0 + abs(hi))
    while gap(hi) > 0.0:
        hi += step
        step *= 4.0
    return float(optimize.brentq(gap, lo, hi, xtol=1e-13, rtol=1e-13))


def check_alpha(alpha: float) -> float:
    """The significance level as a float, or a TrialInputError if it is not in (0, 1)."""
    alpha = float(alpha)
    if not 0.0 < alpha < 1.0:
        raise TrialInputError(f"The significance level must be between 0 and 1 (got {alpha}).")
    return alpha


def range_quantile(alpha: float, k: int, df: float) -> float:
    """Upper-alpha point of the studentized range: the q with ``range_sf(q, k, df) == alpha``.

    Parameters
    ----------
    alpha : float
        Upper-tail probability, 0 < alpha < 1.
    k : int
        Number of means (at least 2).
    df : float
        Error degrees of freedom (> 0; ``np.inf`` for a known variance).

    Returns
    -------
    float
        The critical value q_alpha(k, df).

    Notes
    -----
    Bracketed by two bounds on the distribution, the single pair and Bonferroni over the
    k(k-1)/2 pairs: 2 P(T >= q / sqrt 2) <= P(Q >= q) <= k(k-1) P(T >= q / sqrt 2), with T
    Student's t on df degrees of freedom, then solved by Brent's method on log P(Q >= q).

    Examples
    --------
    >>> round(range_quantile(0.01, 4, 30), 3)
    4.799
    """
    alpha = check_alpha(alpha)
    k, df = _check_k_df(k, df)
    pair = t_upper_point(alpha / 2.0, df)
    bonferroni = t_upper_point(alpha / (k * (k - 1.0)), df)
    return solve_upper_point(
        lambda x: float(range_sf(x, k, df)), alpha, np.sqrt(2.0) * pair, np.sqrt(2.0) * bonferroni
    )


def t_upper_point(p: float, df: float) -> float:
    """The x with P(T >= x) = p for Student's t on df degrees of freedom (normal for inf)."""
    return float(-special.stdtrit(df, p))
