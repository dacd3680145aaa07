"""Missingness patterns and the saturated (H1) normal model by EM: pure array functions.

The saturated model of incomplete multivariate normal data has free means and a free
covariance matrix; its ML estimates under MAR come from the EM algorithm (Dempster,
Laird & Rubin 1977; the normal-data form in Little & Rubin 2002, chapter 11). The
maximized log-likelihood is the reference logL_H1 of the full-information test statistic
T = -2 (logL_model - logL_H1) (METHODS section 6).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Patterns", "missing_patterns", "EMResult", "em_saturated", "pattern_loglik"]


@dataclass(frozen=True, eq=False)
class Patterns:
    """Missingness patterns of an (n, p) array.

    Attributes
    ----------
    observed
        (K, p) boolean, True where the pattern observes the item; patterns are sorted
        by decreasing number of observed items, then by first appearance.
    case_pattern
        (n,) pattern index of every case.
    counts
        (K,) cases per pattern.
    rows
        Per pattern, the row indices of its cases.
    """

    observed: np.ndarray
    case_pattern: np.ndarray
    counts: np.ndarray
    rows: tuple[np.ndarray, ...]

    @property
    def n_patterns(self) -> int:
        return int(self.observed.shape[0])


def missing_patterns(x: np.ndarray) -> Patterns:
    """Group the rows of ``x`` (NaN = missing) by their pattern of observed items."""
    x = np.asarray(x, dtype=float)
    obs = ~np.isnan(x)
    uniq, first, inv = np.unique(obs, axis=0, return_index=True, return_inverse=True)
    inv = np.asarray(inv).reshape(-1)
    order = np.lexsort((first, -uniq.sum(axis=1)))
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    case = rank[inv]
    observed = uniq[order]
    counts = np.bincount(case, minlength=order.size)
    rows = tuple(np.flatnonzero(case == k) for k in range(order.size))
    return Patterns(observed, case, counts, rows)


def pattern_loglik(x: np.ndarray, pat: Patterns, mean: np.ndarray, cov: np.ndarray) -> float:
    """Normal log-likelihood of incomplete data: every case on its observed items."""
    total = 0.0
    for k, rows in enumerate(pat.rows):
        o = pat.observed[k]
        if not o.any():
            continue
        R = np.linalg.cholesky(cov[np.ix_(o, o)])
        e = np.linalg.solve(R, (x[np.ix_(rows, o)] - mean[o]).T)
        logdet = 2.0 * np.log(np.diag(R)).sum()
        total += -0.5 * (rows.size * (o.sum() * np.log(2 * np.pi) + logdet) + np.sum(e * e))
    return float(total)


@dataclass(frozen=True, eq=False)
class EMResult:
    """Saturated-model estimates of incomplete normal data."""

    mean: np.ndarray
    cov: np.ndarray
    loglik: float
    iterations: int
    converged: bool


def em_saturated(
    x: np.ndarray,
    *,
    patterns: Patterns | None = None,
    max_iter: int = 5000,
    tol: float = 1e-10,
) -> EMResult:
    """ML means and covariance (divisor n) of incomplete normal data by EM.

    Parameters
    ----------
    x
        (n, p) data, NaN where missing; every row must observe at least one item.
    patterns
        Precomputed :func:`missing_patterns` of ``x``.
    max_iter, tol
        Iteration limit; convergence when no mean or covariance entry moves by more
        than ``tol`` relative to the item variances.

    Returns
    -------
    EMResult
        With complete data the estimates are the sample mean and covariance after one
        step.
    """
    x = np.asarray(x, dtype=float)
    n, p = x.shape
    pat = missing_patterns(x) if patterns is None else patterns
    mean = np.nanmean(x, axis=0)
    var = np.nanvar(x, axis=0)
    cov = np.diag(np.where(var > 0, var, 1.0))
    blocks = [(pat.observed[k], x[np.ix_(rows, pat.observed[k])]) for k, rows in enumerate(pat.rows)]
    converged = False
    it = 0
    for it in range(1, max_iter + 1):
        t1 = np.zeros(p)
        t2 = np.zeros((p, p))
        for o, xo in blocks:
            m = ~o
            if not m.any():
                t1 += xo.sum(axis=0)
                t2 += xo.T @ xo
                continue
            soo = cov[np.ix_(o, o)]
            beta = np.linalg.solve(soo, cov[np.ix_(o, m)])          # (po, pm)
            xm = mean[m] + (xo - mean[o]) @ beta                      # conditional means
            cres = cov[np.ix_(m, m)] - cov[np.ix_(m, o)] @ beta      # conditional covariance
            full = np.empty((xo.shape[0], p))
            full[:, o] = xo
            full[:, m] = xm
            t1 += full.sum(axis=0)
            t2 += full.T @ full
            t2[np.ix_(m, m)] += xo.shape[0] * cres
        new_mean = t1 / n
        new_cov = t2 / n - np.outer(new_mean, new_mean)
        new_cov = (new_cov + new_cov.T) / 2
        scale = np.sqrt(np.outer(np.diag(new_cov), np.diag(new_cov)))
        change = max(
            np.max(np.abs(new_mean - mean) / np.sqrt(np.diag(new_cov))),
            np.max(np.abs(new_cov - cov) / scale),
        )
        mean, cov = new_mean, new_cov
        if change < tol:
            converged = True
            break
    return EMResult(mean, cov, pattern_loglik(x, pat, mean, cov), it, converged)
