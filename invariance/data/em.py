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
    pattern_moments_by_key,
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
    "saturated_with_patterns",
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


@dataclass(frozen=True, eq=False)
class _Factored:
    """Pattern sums of one group in the coordinates of the factored likelihood.

    The items every case observes (set A, ``a`` of them) come first, the others (R, ``r``)
    after them. The normal density factors into the marginal of x_A and the regression of
    x_R on z = (1, x_A): x_R = beta' z + e, e ~ N(0, Z) (Anderson 1957; Little & Rubin
    2002, section 7). x_A is always observed, so its ML mean and covariance are the sample
    ones and its log-likelihood ``ll_a`` is fixed; only (beta, Z) need EM, and each
    pattern k needs the inverse of Z over its observed items of R only. Per pattern the
    raw sums (not means) over its n_k cases: ``tzz`` = sum z z', ``tzy`` = sum z y',
    ``tyy`` = sum y y' (y = x_R, 0 where missing).
    """

    order: np.ndarray
    a: int
    counts: np.ndarray
    tzz: np.ndarray
    tzy: np.ndarray
    tyy: np.ndarray
    oo: np.ndarray
    szz_inv: np.ndarray
    ll_const: float
    mean_a: np.ndarray
    cov_a: np.ndarray
    sd_a: np.ndarray
    eye: np.ndarray
    n: float

    @classmethod
    def of(cls, pm: PatternMoments) -> "_Factored":
        every = pm.observed.all(axis=0)
        order = np.concatenate([np.flatnonzero(every), np.flatnonzero(~every)])
        a, p = int(every.sum()), every.size
        obs, means = pm.observed[:, order], pm.means[:, order]
        n = pm.counts
        aug = np.empty((n.size, p + 1, p + 1))  # n_k [[1, m'], [m, S + m m']] per pattern
        aug[:, 0, 0] = n
        aug[:, 0, 1:] = aug[:, 1:, 0] = n[:, None] * means
        aug[:, 1:, 1:] = n[:, None, None] * (pm.covs[:, order][:, :, order] + means[:, :, None] * means[:, None, :])
        q = a + 1
        szz = aug[:, :q, :q].sum(axis=0)
        tot = float(n.sum())
        mean_a = szz[0, 1:] / tot
        cov_a = szz[1:, 1:] / tot - np.outer(mean_a, mean_a)
        logdet_a = 2.0 * np.log(np.diag(np.linalg.cholesky(cov_a))).sum() if a else 0.0
        o = obs[:, a:]
        ll_const = -0.5 * (tot * a * (_LOG2PI + 1.0) + tot * logdet_a + float(n @ o.sum(axis=1)) * _LOG2PI)
        return cls(order, a, n, aug[:, :q, :q], aug[:, :q, q:], aug[:, q:, q:], o[:, :, None] & o[:, None, :],
                   np.linalg.inv(szz), ll_const, mean_a, cov_a, np.sqrt(np.diag(cov_a)), np.eye(p - a), tot)

    def regression(self, mean: np.ndarray, cov: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(beta, Z) of (mean, cov) given in the items' own order."""
        a, m, c = self.a, mean[self.order], cov[self.order[:, None], self.order]
        g = np.linalg.solve(c[:a, :a], c[:a, a:]) if a else np.zeros((0, m.size))
        beta = np.vstack([m[a:] - m[:a] @ g, g])
        return beta, c[a:, a:] - c[:a, a:].T @ g

    def moments(self, beta: np.ndarray, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(mean, cov) in the items' own order, with the sample moments of A."""
        a, g = self.a, beta[1:]
        sar = self.cov_a @ g
        mean = np.concatenate([self.mean_a, beta[0] + self.mean_a @ g])
        cov = np.block([[self.cov_a, sar], [sar.T, z + g.T @ sar]])
        back = np.argsort(self.order)
        return mean[back], cov[back[:, None], back]

    def step(self, beta: np.ndarray, z: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
        """One EM update of (beta, Z) and the log-likelihood at the input point.

        With Y_k the inverse of Z over pattern k's observed items of R (0 elsewhere) and
        F_k = Z Y_k, a case's conditional mean of y is beta'z + F_k e (e = y - beta'z on
        the observed items) and its conditional covariance Z - F_k Z (Little & Rubin 2002,
        section 11.2); with E_k = sum e e' and D_k = sum z e' the M-step regression gives
        beta+ = beta + Szz^-1 D, D = sum_k D_k F_k', and
        n Z+ = sum_k [F_k E_k F_k' + n_k (Z - F_k Z)] - D' Szz^-1 D. Every sum over patterns
        is taken before multiplying by Z, so F_k is never formed.

        Raises
        ------
        numpy.linalg.LinAlgError
            When Z over some pattern's observed items is not positive definite.
        """
        pad = np.where(self.oo, z, self.eye)
        chol = np.linalg.cholesky(pad)
        y = np.linalg.inv(pad) * self.oo
        dze = self.tzy - self.tzz @ beta                                    # sum z e'
        eee = self.tyy - beta.T @ self.tzy - dze.transpose(0, 2, 1) @ beta  # sum e e'
        ye = y @ eee
        logdet = 2.0 * np.log(np.diagonal(chol, axis1=1, axis2=2)).sum(axis=1)
        ll = self.ll_const - 0.5 * (self.counts @ logdet + np.trace(ye, axis1=1, axis2=2).sum())
        # F_k = Z Y_k: sum_k D_k F_k' = (sum_k D_k Y_k) Z, sum_k F_k E_k F_k' = Z (sum_k Y_k E_k Y_k) Z
        d = (dze @ y).sum(axis=0) @ z
        sd = self.szz_inv @ d
        ny = (self.counts @ y.reshape(y.shape[0], -1)).reshape(z.shape)
        z1 = z + (z @ ((ye @ y).sum(axis=0) - ny) @ z - d.T @ sd) / self.n
        return beta + sd, (z1 + z1.T) / 2, float(ll)


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
    does not fall, so the iteration stays monotone. The items every case observes are
    factored out (:class:`_Factored`): their moments are the sample ones, and EM runs on
    the regression of the other items on them, each step on the pattern statistics
    (:func:`pattern_moments`). The result is cached by the data's content
    (:data:`CACHE`): the MCAR test and refits of the same group reuse it.

    Parameters
    ----------
    x
        (n, p) data, NaN where missing; every row must observe at least one item.
    patterns
        Accepted for compatibility; the pattern statistics come from the cache.
    max_iter, tol
        Limit on EM updates; convergence when an EM update moves no mean or covariance
        entry by more than ``tol`` relative to the item variances. The estimates
        returned are the last point whose update was measured (converged: its update
        moved less than ``tol``), with the log-likelihood at that point.

    Returns
    -------
    EMResult
        With complete data the sample mean and covariance (one update).
    """
    return saturated_with_patterns(x, max_iter=max_iter, tol=tol)[0]


def saturated_with_patterns(
    x: np.ndarray, *, max_iter: int = 2000, tol: float = 1e-10
) -> tuple[EMResult, PatternMoments]:
    """:func:`em_saturated` and :func:`pattern_moments` of ``x``, its content hashed once."""
    key = CACHE.key(x)
    em = CACHE.get(f"em:{max_iter}:{tol!r}", x, lambda xc: _em_run(xc, key[0], max_iter=max_iter, tol=tol), key=key)
    return em, pattern_moments_by_key(x, key)


def _squarem_point(fac: _Factored, th0, th1, th2, ll: float):
    """The SQUAREM extrapolation from ``th0`` through two EM steps, stabilized by one EM
    step, or None when it is not positive definite or its likelihood falls below ``ll``
    (the EM step after it cannot lower it again, so the run stays monotone)."""
    (b0, z0), (b1, z1), (b2, z2) = th0, th1, th2
    r = np.concatenate([(b1 - b0).ravel(), (z1 - z0).ravel()])
    v = np.concatenate([(b2 - 2 * b1 + b0).ravel(), (z2 - 2 * z1 + z0).ravel()])
    alpha = -np.sqrt(r @ r) / max(np.sqrt(v @ v), 1e-300)
    if alpha >= -1.0:
        return None
    be = b0 - 2 * alpha * (b1 - b0) + alpha**2 * (b2 - 2 * b1 + b0)
    ze = z0 - 2 * alpha * (z1 - z0) + alpha**2 * (z2 - 2 * z1 + z0)
    try:
        np.linalg.cholesky(ze)
        b3, z3, lle = fac.step(be, (ze + ze.T) / 2)
    except np.linalg.LinAlgError:
        return None
    return (b3, z3) if lle >= ll else None


def _pairwise_start(pm: PatternMoments) -> tuple[np.ndarray, np.ndarray]:
    """Starting means and covariance: available-case moments (each pair over the cases
    observing both items, from the pattern sums), or the diagonal of the variances when
    those are not positive definite."""
    obs = pm.observed.astype(float)
    n = pm.counts
    mean = (n @ pm.means) / (n @ obs)
    d = (pm.means - mean) * pm.observed
    both = obs[:, :, None] * obs[:, None, :]
    cnt = np.tensordot(n, both, axes=1)
    cov = np.tensordot(n, pm.covs + d[:, :, None] * d[:, None, :], axes=1) / np.maximum(cnt, 1.0)
    try:
        np.linalg.cholesky(cov)
        return mean, cov
    except np.linalg.LinAlgError:
        var = np.diag(cov)
        return mean, np.diag(np.where(var > 0, var, 1.0))


def _change(fac: _Factored, th0, th1) -> float:
    """Largest move of a mean or covariance entry from ``th0`` to ``th1``, relative to the
    item variances at ``th1``; only the rows of R move (the moments of A are fixed)."""
    (b0, z0), (b1, z1) = th0, th1
    g0, g1 = b0[1:], b1[1:]
    sar0, sar1 = fac.cov_a @ g0, fac.cov_a @ g1
    srr1 = z1 + g1.T @ sar1
    sd_r, sd_a = np.sqrt(np.diag(srr1)), fac.sd_a
    dm = np.abs(b1[0] - b0[0] + fac.mean_a @ (g1 - g0)) / sd_r
    dar = np.abs(sar1 - sar0) / np.outer(sd_a, sd_r) if fac.a else dm
    drr = np.abs(srr1 - z0 - g0.T @ sar0) / np.outer(sd_r, sd_r)
    return float(max(dm.max(), dar.max(), drr.max()))


def _em_run(x: np.ndarray, key: tuple, *, max_iter: int, tol: float) -> EMResult:
    """EM from the pairwise start on ``x``, whose content key is ``key`` (its columns in
    canonical order already, so the pattern statistics are looked up without hashing)."""
    pm = pattern_moments_by_key(x, (key, np.arange(x.shape[1])))
    fac = _Factored.of(pm)
    if fac.a == x.shape[1]:  # complete data: the sample moments
        mean, cov = fac.moments(np.zeros((fac.a + 1, 0)), np.zeros((0, 0)))
        return EMResult(mean, cov, fac.ll_const, 1, True)
    th = fac.regression(*_pairwise_start(pm))
    converged = False
    steps = 0
    while steps < max_iter:
        *th1, ll = fac.step(*th)
        steps += 1
        if _change(fac, th, th1) < tol:
            converged = True  # th: its update moves less than tol, and ll is at th
            break
        *th2, ll1 = fac.step(*th1)
        steps += 1
        if _change(fac, th1, th2) < tol:
            th, ll, converged = th1, ll1, True
            break
        ext = _squarem_point(fac, th, th1, th2, ll)
        steps += ext is not None
        th = ext if ext is not None else th2
    if not converged:  # the log-likelihood at the point returned
        *_, ll = fac.step(*th)
    mean, cov = fac.moments(*th)
    return EMResult(mean, cov, ll, steps, converged)
