"""The saturated normal likelihood of incomplete data in factored form: pure array functions.

The items every case observes (set A, ``a`` of them) come first, the others (R, ``r``)
after them. The normal density factors into the marginal of x_A and the regression of
x_R on z = (1, x_A): x_R = beta' z + e, e ~ N(0, Z) (Anderson 1957; Little & Rubin 2002,
section 7). x_A is always observed, so its ML mean and covariance are the sample ones and
its log-likelihood is fixed; only (beta, Z) need iterating, and each pattern k needs the
inverse of Z over its observed items of R only. :mod:`invariance.data.em` runs EM and
Newton steps on these pieces.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from scipy.linalg import lapack

from .patterns import PatternMoments

__all__ = ["Factored", "Point"]

_LOG2PI = float(np.log(2 * np.pi))


@functools.lru_cache(maxsize=64)
def _duplication(r: int) -> np.ndarray:
    """The duplication matrix of an r x r symmetric matrix: vec Z = D vech Z, rows of vec
    in row-major order, vech over the upper triangle row by row (read-only)."""
    iu, ju = np.triu_indices(r)
    dup = np.zeros((r * r, iu.size))
    dup[iu * r + ju, np.arange(iu.size)] = dup[ju * r + iu, np.arange(iu.size)] = 1.0
    dup.flags.writeable = False
    return dup


@dataclass(frozen=True, eq=False)
class Point:
    """One evaluation of the factored log-likelihood at (beta, Z).

    Attributes
    ----------
    ll
        The log-likelihood (of all items) at the point.
    update
        The EM update (beta+, Z+) from the point.
    y, dy, yey
        Per pattern: Y_k (the inverse of Z over the observed items of R, 0 elsewhere),
        D_k Y_k and Y_k E_k Y_k (D_k = sum z e', E_k = sum e e' over its cases).
    """

    ll: float
    update: tuple[np.ndarray, np.ndarray]
    y: np.ndarray
    dy: np.ndarray
    yey: np.ndarray


@dataclass(frozen=True, eq=False)
class Factored:
    """Pattern sums of one group in the factored coordinates (see the module docstring).

    Per pattern the raw sums (not means) over its n_k cases: ``tzz`` = sum z z',
    ``tzy`` = sum z y', ``tyy`` = sum y y' (y = x_R, 0 where missing); ``oo`` masks each
    pattern's observed block of R; ``dup`` is the duplication matrix of Z (vec Z =
    dup vech Z, rows in row-major order).
    """

    order: np.ndarray
    back: np.ndarray
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
    dup: np.ndarray

    @classmethod
    def of(cls, pm: PatternMoments) -> "Factored":
        """The factored sums of pattern statistics (every pattern observes an item)."""
        blk = pm.blocks                                   # the split A, R of the pattern statistics
        order, a, p = blk.order, blk.n_always, blk.order.size
        means, n = pm.means[:, order], pm.counts
        aug = np.empty((n.size, p + 1, p + 1))  # n_k [[1, m'], [m, S + m m']] per pattern
        aug[:, 0, 0] = n
        aug[:, 0, 1:] = aug[:, 1:, 0] = n[:, None] * means
        aug[:, 1:, 1:] = n[:, None, None] * (pm.covs[:, order[:, None], order] + means[:, :, None] * means[:, None, :])
        q, tot = a + 1, float(n.sum())
        szz = aug[:, :q, :q].sum(axis=0)
        mean_a = szz[0, 1:] / tot
        cov_a = szz[1:, 1:] / tot - np.outer(mean_a, mean_a)
        logdet_a = 2.0 * np.log(np.diag(np.linalg.cholesky(cov_a))).sum() if a else 0.0
        ll_const = -0.5 * (tot * a * (_LOG2PI + 1.0) + tot * logdet_a + float(n @ pm.observed[:, order[a:]].sum(axis=1)) * _LOG2PI)
        return cls(order, blk.back, a, n, aug[:, :q, :q], aug[:, :q, q:], aug[:, q:, q:], blk.oo_rest,
                   np.linalg.inv(szz), ll_const, mean_a, cov_a, np.sqrt(np.diag(cov_a)), np.eye(p - a), tot,
                   _duplication(p - a))

    def regression(self, mean: np.ndarray, cov: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(beta, Z) of (mean, cov) given in the items' own order."""
        a, m, c = self.a, mean[self.order], cov[self.order[:, None], self.order]
        g = np.linalg.solve(c[:a, :a], c[:a, a:]) if a else np.zeros((0, m.size))
        beta = np.vstack([m[a:] - m[:a] @ g, g])
        return beta, c[a:, a:] - c[:a, a:].T @ g

    def moments(self, beta: np.ndarray, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(mean, cov) in the items' own order, with the sample moments of A."""
        g = beta[1:]
        sar = self.cov_a @ g
        mean = np.concatenate([self.mean_a, beta[0] + self.mean_a @ g])
        a = self.a
        cov = np.empty((mean.size, mean.size))
        cov[:a, :a], cov[:a, a:], cov[a:, :a], cov[a:, a:] = self.cov_a, sar, sar.T, z + g.T @ sar
        return mean[self.back], cov[self.back[:, None], self.back]

    def evaluate(self, beta: np.ndarray, z: np.ndarray) -> Point:
        """The log-likelihood at (beta, Z), its EM update and the per-pattern pieces.

        With F_k = Z Y_k a case's conditional mean of y is beta'z + F_k e (e = y - beta'z
        on the observed items) and its conditional covariance Z - F_k Z (Little & Rubin
        2002, section 11.2); the M-step regression gives beta+ = beta + Szz^-1 D with
        D = sum_k D_k F_k', and n Z+ = sum_k [F_k E_k F_k' + n_k (Z - F_k Z)] - D' Szz^-1 D.
        Every sum over patterns is taken before multiplying by Z (F_k is never formed).

        Raises
        ------
        numpy.linalg.LinAlgError
            When Z over some pattern's observed items is not positive definite.
        """
        pad = np.where(self.oo, z, self.eye)
        chol = np.linalg.cholesky(pad)
        y = np.linalg.inv(pad) * self.oo
        dze = self.tzy - self.tzz @ beta                                    # D_k = sum z e'
        eee = self.tyy - beta.T @ self.tzy - dze.transpose(0, 2, 1) @ beta  # E_k = sum e e'
        ye = y @ eee
        logdet = 2.0 * np.log(np.diagonal(chol, axis1=1, axis2=2)).sum(axis=1)
        ll = self.ll_const - 0.5 * (self.counts @ logdet + np.trace(ye, axis1=1, axis2=2).sum())
        dy, yey = dze @ y, ye @ y
        d = dy.sum(axis=0) @ z
        sd = self.szz_inv @ d
        z1 = z + (z @ (yey.sum(axis=0) - self._ny(y)) @ z - d.T @ sd) / self.n
        return Point(float(ll), (beta + sd, (z1 + z1.T) / 2), y, dy, yey)

    def _ny(self, y: np.ndarray) -> np.ndarray:
        """sum_k n_k Y_k."""
        return (self.counts @ y.reshape(y.shape[0], -1)).reshape(self.eye.shape)

    def derivatives(self, pt: Point) -> tuple[np.ndarray, np.ndarray]:
        """Gradient and Hessian of the log-likelihood at the point evaluated as ``pt``, in
        (vec beta, vech Z) coordinates, row-major.

        The gradient is sum_k D_k Y_k and 1/2 sum_k (Y_k E_k Y_k - n_k Y_k); the Hessian
        blocks are -sum_k T_zz,k (x) Y_k, d/dZ of the beta gradient
        -sum_k (D_k Y_k) dZ Y_k, and of the Z gradient
        1/2 sum_k [n_k Y_k dZ Y_k - Y_k dZ M_k - M_k dZ Y_k] with M_k = Y_k E_k Y_k
        (Magnus & Neudecker 1988 differentials of log|Z_oo| and tr(Z_oo^-1 E)). Every
        sum over patterns is one matrix product of the per-pattern pieces laid flat.
        """
        k, q, r = self.counts.size, self.a + 1, self.eye.shape[0]
        yf, mf, dup, m = pt.y.reshape(k, r * r), pt.yey.reshape(k, r * r), self.dup, q * r
        hbb = -(self.tzz.reshape(k, q * q).T @ yf).reshape(q, q, r, r).transpose(0, 2, 1, 3).reshape(m, m)
        hbz = -(pt.dy.reshape(k, m).T @ yf).reshape(q, r, r, r).transpose(0, 3, 1, 2).reshape(m, r * r) @ dup
        hzz = (self.counts[:, None] * yf).T @ yf - yf.T @ mf - mf.T @ yf
        hzz = dup.T @ (0.5 * hzz.reshape(r, r, r, r).transpose(0, 3, 1, 2).reshape(r * r, r * r)) @ dup
        grad = np.concatenate([pt.dy.sum(axis=0).ravel(), dup.T @ (0.5 * (pt.yey.sum(axis=0) - self._ny(pt.y))).ravel()])
        hess = np.empty((m + hzz.shape[0],) * 2)
        hess[:m, :m], hess[:m, m:], hess[m:, :m], hess[m:, m:] = hbb, hbz, hbz.T, hzz
        return grad, hess

    def newton(self, beta: np.ndarray, z: np.ndarray, pt: Point) -> tuple[np.ndarray, np.ndarray] | None:
        """The Newton point from (beta, Z) evaluated as ``pt`` (:meth:`derivatives`), or
        None when the Hessian is not negative definite there."""
        grad, hess = self.derivatives(pt)
        chol, info = lapack.dpotrf(-hess, lower=1)
        if info != 0:
            return None
        step, info = lapack.dpotrs(chol, grad, lower=1)
        if info != 0:
            return None
        m = beta.size
        return beta + step[:m].reshape(beta.shape), z + (self.dup @ step[m:]).reshape(z.shape)
