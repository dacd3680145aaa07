"""The saturated (H1) normal model of incomplete data by EM: pure array functions.

The saturated model of incomplete multivariate normal data has free means and a free
covariance matrix; its ML estimates under MAR come from the EM algorithm (Dempster,
Laird & Rubin 1977; the normal-data form in Little & Rubin 2002, chapter 11). The
maximized log-likelihood is the reference logL_H1 of the full-information test statistic
T = -2 (logL_model - logL_H1) (METHODS section 6). The pattern statistics it works on
come from :mod:`invariance.data.patterns`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .em_factored import Factored, Point
from .patterns import CACHE, PatternMoments, pattern_moments_by_key

__all__ = ["EMResult", "em_saturated", "saturated_with_patterns"]


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


def em_saturated(
    x: np.ndarray,
    *,
    max_iter: int = 2000,
    tol: float = 1e-10,
) -> EMResult:
    """ML means and covariance (divisor n) of incomplete normal data by EM.

    EM updates (Dempster, Laird & Rubin 1977) accelerated by squared extrapolation
    (SQUAREM, Varadhan & Roland 2008): two EM steps give the direction, an extrapolated
    point is accepted only when its covariance is positive definite and the likelihood
    does not fall, so the iteration stays monotone. The items every case observes are
    factored out (:class:`Factored`): their moments are the sample ones, and EM runs on
    the regression of the other items on them, each step on the pattern statistics
    (:func:`pattern_moments`). The result is cached by the data's content
    (:data:`CACHE`): the MCAR test and refits of the same group reuse it.

    Parameters
    ----------
    x
        (n, p) data, NaN where missing; every row must observe at least one item.
    max_iter, tol
        Limit on EM updates; convergence when an EM update moves no mean or covariance
        entry by more than ``tol`` relative to the item variances. The estimates
        returned are the last point whose update was measured (converged: its update
        moved less than ``tol``), with the log-likelihood at that point.

    Returns
    -------
    EMResult
        With complete data the sample mean and covariance (one update).

    Raises
    ------
    numpy.linalg.LinAlgError
        When an EM update leaves the positive-definite region: the iterates run to a
        singular covariance (too few cases observe some items together).
    """
    return saturated_with_patterns(x, max_iter=max_iter, tol=tol)[0]


def saturated_with_patterns(
    x: np.ndarray, *, max_iter: int = 2000, tol: float = 1e-10
) -> tuple[EMResult, PatternMoments]:
    """:func:`em_saturated` and :func:`pattern_moments` of ``x``, its content hashed once."""
    key = CACHE.key(x)
    em = CACHE.get(f"em:{max_iter}:{tol!r}", x, lambda xc: _em_run(xc, key[0], max_iter=max_iter, tol=tol), key=key)
    return em, pattern_moments_by_key(x, key)


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


def _change(fac: Factored, th0, th1) -> float:
    """Largest move of a mean or covariance entry from ``th0`` to ``th1``, relative to the
    item variances at ``th1``; only the rows of R move (the moments of A are fixed)."""
    (b0, z0), (b1, z1) = th0, th1
    g0, g1 = b0[1:], b1[1:]
    sar0, sar1 = fac.cov_a @ g0, fac.cov_a @ g1
    srr1 = z1 + g1.T @ sar1
    with np.errstate(invalid="ignore"):  # a variance below 0 makes the move NaN: not converged
        sd_r, sd_a = np.sqrt(np.diag(srr1)), fac.sd_a
    dm = np.abs(b1[0] - b0[0] + fac.mean_a @ (g1 - g0)) / sd_r
    dar = np.abs(sar1 - sar0) / np.outer(sd_a, sd_r) if fac.a else dm
    drr = np.abs(srr1 - z0 - g0.T @ sar0) / np.outer(sd_r, sd_r)
    return float(max(dm.max(), dar.max(), drr.max()))


#: Newton steps take over once an EM update moves no entry by more than this (relative)
_NEWTON_FROM = 3e-2
#: relative rounding of a log-likelihood summed over patterns
_ROUNDING = 1e-12


def _em_run(x: np.ndarray, key: tuple, *, max_iter: int, tol: float) -> EMResult:
    """The saturated estimates of ``x`` from the pairwise start (:func:`_advance` steps),
    ``x`` with content key ``key`` and its columns in canonical order already, so the
    pattern statistics are looked up without hashing again."""
    pm = pattern_moments_by_key(x, (key, np.arange(x.shape[1])))
    fac = Factored.of(pm)
    if fac.a == x.shape[1]:  # complete data: the sample moments
        mean, cov = fac.moments(np.zeros((fac.a + 1, 0)), np.zeros((0, 0)))
        return EMResult(mean, cov, fac.ll_const, 1, True)
    th = fac.regression(*_pairwise_start(pm))
    pt = fac.evaluate(*th)
    steps, converged = 1, False
    while True:
        move = _change(fac, th, pt.update)
        if move < tol:  # th: its EM update moves less than tol; pt.ll is at th
            converged = True
            break
        if steps >= max_iter:
            break
        th, pt, used = _advance(fac, th, pt, newton=move < _NEWTON_FROM)
        steps += used
    mean, cov = fac.moments(*th)
    return EMResult(mean, cov, pt.ll, steps, converged)


def _advance(fac: Factored, th, pt: Point, *, newton: bool) -> tuple[tuple, Point, int]:
    """The next point from ``th`` (evaluated as ``pt``), its evaluation and the number of
    evaluations spent.

    Near the optimum (``newton``) a Newton step, kept when it does not lower the
    likelihood (up to rounding: there the gain is below the rounding of the sum); else a
    SQUAREM cycle (Varadhan & Roland 2008): two EM updates give the direction, and the
    extrapolated point, stabilized by one EM update, is kept only when it is positive
    definite and its likelihood does not fall (else the second EM update), so the
    likelihood never falls.
    """
    used = 0
    if newton:
        cand = fac.newton(*th, pt)
        if cand is not None:
            used += 1
            pc = _evaluated(fac, cand)
            if pc is not None and pc.ll >= pt.ll - _ROUNDING * abs(pt.ll):
                return cand, pc, used
    th1 = pt.update
    p1 = fac.evaluate(*th1)
    th2 = p1.update
    ext = _extrapolated(th, th1, th2)
    pe = None if ext is None else _evaluated(fac, ext)
    nxt = pe.update if pe is not None and pe.ll >= pt.ll else th2
    return nxt, fac.evaluate(*nxt), used + 2 + (ext is not None)


def _evaluated(fac: Factored, th) -> Point | None:
    """:meth:`Factored.evaluate` at ``th``, or None when Z is not positive definite there."""
    try:
        np.linalg.cholesky(th[1])
        return fac.evaluate(*th)
    except np.linalg.LinAlgError:
        return None


def _extrapolated(th0, th1, th2):
    """The SQUAREM point from ``th0`` through the EM updates ``th1`` and ``th2`` (step
    length -|r|/|v|), or None when the step would not go beyond ``th2``."""
    (b0, z0), (b1, z1), (b2, z2) = th0, th1, th2
    rb, rz = b1 - b0, z1 - z0
    vb, vz = b2 - 2 * b1 + b0, z2 - 2 * z1 + z0
    alpha = -np.sqrt((rb * rb).sum() + (rz * rz).sum()) / max(np.sqrt((vb * vb).sum() + (vz * vz).sum()), 1e-300)
    if alpha >= -1.0:
        return None
    ze = z0 - 2 * alpha * rz + alpha**2 * vz
    return b0 - 2 * alpha * rb + alpha**2 * vb, (ze + ze.T) / 2
