"""The saturated (H1) normal model of incomplete data by EM: pure array functions.

The saturated model of incomplete multivariate normal data has free means and a free
covariance matrix; its ML estimates under MAR come from the EM algorithm (Dempster,
Laird & Rubin 1977; the normal-data form in Little & Rubin 2002, chapter 11). The
maximized log-likelihood is the reference logL_H1 of the full-information test statistic
T = -2 (logL_model - logL_H1) (METHODS section 6). The pattern statistics it works on
come from :mod:`invariance.data.patterns` (re-exported here).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .patterns import (
    CACHE,
    ContentCache,
    PatternMoments,
    Patterns,
    missing_patterns,
    pattern_loglik,
    pattern_loglik_moments,
    pattern_moments,
    pattern_terms,
)

__all__ = [
    "Patterns",
    "missing_patterns",
    "PatternMoments",
    "pattern_moments",
    "pattern_terms",
    "pattern_loglik",
    "pattern_loglik_moments",
    "ContentCache",
    "CACHE",
    "EMResult",
    "em_saturated",
]

_LOG2PI = float(np.log(2 * np.pi))

@dataclass(frozen=True, eq=False)
class EMResult:
    """Saturated-model estimates of incomplete normal data."""

    mean: np.ndarray
    cov: np.ndarray
    loglik: float
    iterations: int
    converged: bool

    def reorder(self, ix) -> "EMResult":
        """The same estimates with items in the order ``ix``."""
        ix = np.asarray(ix)
        return EMResult(self.mean[ix], self.cov[np.ix_(ix, ix)], self.loglik, self.iterations, self.converged)


def _em_step(pm: PatternMoments, mean: np.ndarray, cov: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """One EM update of the saturated normal model from the pattern statistics, and the
    log-likelihood at the input point (from the same factorizations).

    E-step for all patterns at once: with H_k = Sigma W_k (W_k the padded inverse of
    Sigma_oo) the conditional mean of a case is a_k + H_k x_o, a_k = mu - H_k mu_o, and
    the conditional covariance Sigma - H_k Sigma; their sums over a pattern's cases
    need only n_k, m_k and S_k (Little & Rubin 2002, section 11.2).
    """
    W, logdet, d = pattern_terms(pm, mean, cov)
    n = pm.counts
    quad = np.einsum("kij,kij->k", W, pm.covs) + np.einsum("ki,kij,kj->k", d, W, d)
    ll = float(-0.5 * n @ (pm.observed.sum(axis=1) * _LOG2PI + logdet + quad))
    H = cov[None] @ W                                            # (K, p, p)
    a = mean[None] - np.einsum("kij,kj->ki", H, mean[None] * pm.observed)
    Hm = np.einsum("kij,kj->ki", H, pm.means)
    sxx = pm.covs + pm.means[:, :, None] * pm.means[:, None, :]  # per case: S_k + m_k m_k'
    t1 = n @ (a + Hm)
    outer = a[:, :, None] * (a + 2.0 * Hm)[:, None, :]
    t2 = np.einsum("k,kij->ij", n, outer + H @ sxx @ H.transpose(0, 2, 1) + (cov[None] - H @ cov[None]))
    tot = n.sum()
    new_mean = t1 / tot
    new_cov = t2 / tot - np.outer(new_mean, new_mean)
    return new_mean, (new_cov + new_cov.T) / 2, ll


def _change(m0, c0, m1, c1) -> float:
    sd = np.sqrt(np.diag(c1))
    return float(max(np.max(np.abs(m1 - m0) / sd), np.max(np.abs(c1 - c0) / np.outer(sd, sd))))


def em_saturated(
    x: np.ndarray,
    *,
    patterns: Patterns | None = None,
    max_iter: int = 2000,
    tol: float = 1e-10,
) -> EMResult:
    """ML means and covariance (divisor n) of incomplete normal data by EM.

    EM updates (Dempster, Laird & Rubin 1977) accelerated by squared extrapolation
    (SQUAREM, Varadhan & Roland 2008): two EM steps give the direction, an extrapolated
    point is accepted only when its covariance is positive definite and the likelihood
    does not fall, so the iteration stays monotone. Every step works on the pattern
    statistics (:func:`pattern_moments`), and the result is cached by the data's
    content (:data:`CACHE`): the MCAR test and refits of the same group reuse it.

    Parameters
    ----------
    x
        (n, p) data, NaN where missing; every row must observe at least one item.
    patterns
        Accepted for compatibility; the pattern statistics come from the cache.
    max_iter, tol
        Limit on EM updates; convergence when an EM update moves no mean or covariance
        entry by more than ``tol`` relative to the item variances.

    Returns
    -------
    EMResult
        With complete data the estimates are the sample mean and covariance after one
        step.
    """
    return CACHE.get(f"em:{max_iter}:{tol!r}", x, lambda xc: _em_run(xc, max_iter=max_iter, tol=tol))


def _squarem_point(pm, mean, cov, m1, c1, m2, c2, ll):
    """The SQUAREM extrapolation from (mean, cov) through two EM steps, stabilized by one
    EM step, or None when it is not positive definite or its likelihood falls below
    ``ll`` (the EM step after it cannot lower it again, so the run stays monotone)."""
    p = mean.size
    th0 = np.concatenate([mean, cov.ravel()])
    r = np.concatenate([m1, c1.ravel()]) - th0
    v = np.concatenate([m2, c2.ravel()]) - 2 * np.concatenate([m1, c1.ravel()]) + th0
    alpha = -np.sqrt(r @ r) / max(np.sqrt(v @ v), 1e-300)
    if alpha >= -1.0:
        return None
    th = th0 - 2 * alpha * r + alpha**2 * v
    me, ce = th[:p], th[p:].reshape(p, p)
    try:
        me2, ce2, lle = _em_step(pm, me, (ce + ce.T) / 2)
    except np.linalg.LinAlgError:
        return None
    return (me2, ce2) if lle >= ll else None


def _pairwise_start(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Starting means and covariance: available-case moments (each pair over the cases
    observing both items), or the diagonal of the variances when those are not positive
    definite."""
    mean = np.nanmean(x, axis=0)
    obs = ~np.isnan(x)
    xc = np.where(obs, x - mean, 0.0)
    cnt = obs.T.astype(float) @ obs.astype(float)
    cov = (xc.T @ xc) / np.maximum(cnt, 1.0)
    try:
        np.linalg.cholesky(cov)
        return mean, cov
    except np.linalg.LinAlgError:
        var = np.diag(cov)
        return mean, np.diag(np.where(var > 0, var, 1.0))


def _em_run(x: np.ndarray, *, max_iter: int, tol: float) -> EMResult:
    pm = pattern_moments(x)
    mean, cov = _pairwise_start(x)
    converged = False
    steps = 0
    while steps < max_iter:
        m1, c1, ll = _em_step(pm, mean, cov)
        steps += 1
        if _change(mean, cov, m1, c1) < tol:
            mean, cov, converged = m1, c1, True
            break
        m2, c2, _ = _em_step(pm, m1, c1)
        steps += 1
        if _change(m1, c1, m2, c2) < tol:
            mean, cov, converged = m2, c2, True
            break
        ext = _squarem_point(pm, mean, cov, m1, c1, m2, c2, ll)
        steps += ext is not None
        mean, cov = ext if ext is not None else (m2, c2)
    return EMResult(mean, cov, pattern_loglik_moments(pm, mean, cov), steps, converged)
