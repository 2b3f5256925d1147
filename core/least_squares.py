"""Least-squares fit of a single-site trial: entries in complete blocks (RCBD) or none (CRD).

The model is y = mu + block_j + entry_i + e (RCBD) or y = mu + entry_i + e (CRD), fitted to the
plots that have a value. Missing plots are handled by least squares, not by filling them in: the
entry sum of squares is adjusted for blocks and entry means are least-squares means (Gomez & Gomez
1984, Statistical Procedures for Agricultural Research, 2nd ed., ch. 7; Steel, Torrie & Dickey
1997, 3rd ed., sec. 9.9). For one missing plot this equals Yates' missing-plot estimate, with one
residual degree of freedom lost per missing plot.

The ANOVA is sequential with blocks first: the block SS ignores entries, the entry SS is adjusted
for blocks (identical to the Type II entry SS), and block + entry + residual add up to the total.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from trialdesk.core.errors import TrialInputError


@dataclass(frozen=True, slots=True, kw_only=True)
class TrialFit:
    """The fitted model of one trait. Arrays over plots follow the order of the input values.

    Attributes
    ----------
    entries, blocks : entry codes and block labels in model order (first appearance).
    ss, df : sums of squares and degrees of freedom keyed "block", "entry", "residual", "total".
    residual_ms, residual_df : error mean square and its degrees of freedom.
    means : least-squares entry means, in the order of ``entries``.
    means_cov : covariance matrix of ``means`` (already scaled by the residual MS).
    replication : number of plots with a value, per entry.
    fitted, residuals, leverage : per plot.
    design : the model matrix over the plots with a value (intercept, blocks, entries).
    """

    entries: tuple[str, ...]
    blocks: tuple[str, ...]
    ss: dict[str, float]
    df: dict[str, int]
    residual_ms: float
    residual_df: int
    means: np.ndarray
    means_cov: np.ndarray
    replication: np.ndarray
    fitted: np.ndarray
    residuals: np.ndarray
    leverage: np.ndarray
    design: np.ndarray

    def f_test(self, source: str) -> tuple[float, float]:
        """F statistic and p-value of ``source`` ("block" or "entry") against the residual MS."""
        if self.df[source] <= 0 or self.residual_df <= 0 or self.residual_ms <= 0:
            return float("nan"), float("nan")
        f = (self.ss[source] / self.df[source]) / self.residual_ms
        return f, float(stats.f.sf(f, self.df[source], self.residual_df))

    def studentized_residuals(self) -> np.ndarray:
        """Externally studentized (deleted) residuals; NaN for plots with leverage 1.

        t_i = e_i / sqrt(s2_(i) (1 - h_i)) with s2_(i) = (RSS - e_i^2 / (1 - h_i)) / (df - 1)
        (Cook & Weisberg 1982, Residuals and Influence in Regression, eq. 2.2.9).
        """
        with np.errstate(divide="ignore", invalid="ignore"):
            one_minus_h = 1.0 - self.leverage
            rss = self.ss["residual"]
            s2_deleted = (rss - self.residuals**2 / one_minus_h) / (self.residual_df - 1)
            t = self.residuals / np.sqrt(s2_deleted * one_minus_h)
        t[one_minus_h < 1e-10] = np.nan
        return t


def _codes(labels: np.ndarray) -> tuple[np.ndarray, tuple[str, ...]]:
    """Integer codes in order of first appearance, and the labels in that order."""
    uniques, first, inverse = np.unique(labels, return_index=True, return_inverse=True)
    order = np.argsort(first, kind="stable")
    rank = np.empty_like(order)
    rank[order] = np.arange(len(order))
    return rank[inverse], tuple(str(u) for u in uniques[order])


def _rss(x: np.ndarray, y: np.ndarray) -> tuple[float, int]:
    coef, _, rank, _ = np.linalg.lstsq(x, y, rcond=None)
    resid = y - x @ coef
    return float(resid @ resid), int(rank)


def _check_connected(entry_code, block_code, entries, blocks, trait) -> None:
    """All entry differences are estimable only if entries and blocks form one connected set."""
    t = len(entries)
    parent = list(range(t + len(blocks)))  # union-find over entries and blocks

    def root(node: int) -> int:
        while parent[node] != node:
            parent[node] = parent[parent[node]]
            node = parent[node]
        return node

    for e, b in set(zip(entry_code.tolist(), (t + block_code).tolist(), strict=True)):
        parent[root(e)] = root(b)
    parts: dict[int, list[str]] = {}
    for i in range(t):
        parts.setdefault(root(i), []).append(entries[i])
    if len(parts) > 1:
        listed = "; ".join(", ".join(sorted(g)) for g in parts.values())
        raise TrialInputError(
            "the missing plots split the trial into groups of entries that never share a block, so "
            f"differences between these groups are not estimable: {listed}",
            column=trait,
        )


def fit_trial(
    y: np.ndarray, entry: np.ndarray, block: np.ndarray | None, *, trait: str | None = None
) -> TrialFit:
    """Fit the RCBD (``block`` given) or CRD (``block`` None) model to the plots with a value.

    Parameters
    ----------
    y : values per plot; NaN marks a missing plot, which is left out of the fit.
    entry, block : labels per plot.
    trait : name used in error messages.

    Returns
    -------
    TrialFit
        Arrays over plots cover only the plots with a value, in input order.
    """
    y = np.asarray(y, dtype=float)
    keep = ~np.isnan(y)
    y = y[keep]
    entry_code, entries = _codes(np.asarray(entry, dtype=object)[keep].astype(str))
    n, t = len(y), len(entries)
    columns = [np.ones((n, 1))]
    blocks: tuple[str, ...] = ()
    if block is not None:
        block_code, blocks = _codes(np.asarray(block, dtype=object)[keep].astype(str))
        _check_connected(entry_code, block_code, entries, blocks, trait)
        b = len(blocks)
        block_x = np.zeros((n, b - 1))
        rows = np.nonzero(block_code > 0)[0]
        block_x[rows, block_code[rows] - 1] = 1.0
        columns.append(block_x)
    entry_x = np.zeros((n, t - 1))
    rows = np.nonzero(entry_code > 0)[0]
    entry_x[rows, entry_code[rows] - 1] = 1.0
    x_reduced = np.hstack(columns)
    x = np.hstack([x_reduced, entry_x])

    q, r = np.linalg.qr(x)
    if np.min(np.abs(np.diag(r))) < 1e-10 * np.max(np.abs(np.diag(r))):
        raise TrialInputError("the design is rank deficient; entry means are not estimable",
                              column=trait)
    coef = np.linalg.solve(r, q.T @ y)
    fitted = x @ coef
    residuals = y - fitted
    rss_full = float(residuals @ residuals)
    leverage = np.einsum("ij,ij->i", q, q)
    total = float(((y - y.mean()) ** 2).sum())
    rss_blocks, rank_blocks = _rss(x_reduced, y) if block is not None else (total, 1)
    residual_df = n - x.shape[1]

    ss = {
        "block": total - rss_blocks,
        "entry": rss_blocks - rss_full,
        "residual": rss_full,
        "total": total,
    }
    df = {
        "block": rank_blocks - 1,
        "entry": t - 1,
        "residual": residual_df,
        "total": n - 1,
    }
    residual_ms = rss_full / residual_df if residual_df > 0 else float("nan")

    # Least-squares means average the block effects with equal weight (Searle, Speed & Milliken
    # 1980, Am. Stat. 34:216-221): L_i = [1, 1/b, ..., 1/b, e_i].
    n_block_cols = x_reduced.shape[1] - 1
    weights = np.zeros((t, x.shape[1]))
    weights[:, 0] = 1.0
    if n_block_cols:
        weights[:, 1 : 1 + n_block_cols] = 1.0 / (n_block_cols + 1)
    weights[np.arange(1, t), x_reduced.shape[1] + np.arange(t - 1)] = 1.0
    r_inv = np.linalg.solve(r, np.eye(r.shape[0]))
    lw = weights @ r_inv
    means = weights @ coef
    means_cov = (lw @ lw.T) * residual_ms

    return TrialFit(
        entries=entries,
        blocks=blocks,
        ss=ss,
        df=df,
        residual_ms=residual_ms,
        residual_df=residual_df,
        means=means,
        means_cov=means_cov,
        replication=np.bincount(entry_code, minlength=t),
        fitted=fitted,
        residuals=residuals,
        leverage=leverage,
        design=x,
    )
