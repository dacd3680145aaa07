"""Full-information ML for incomplete data: the casewise likelihood grouped by pattern.

Each case contributes the normal likelihood of its observed items under the implied
moments restricted to them. Cases sharing a missingness pattern are pooled through
their pattern mean m_k and covariance S_k (divisor n_k), so a pattern costs one
Cholesky factor per evaluation:

    -2 logL = sum_k n_k [p_k log 2pi + log|Sigma_k| + tr(S_k Sigma_k^-1) + d_k' Sigma_k^-1 d_k]

with Sigma_k, mu_k the rows and columns of the observed items and d_k = m_k - mu_k.
The value of the objective is T = -2 (logL_model - logL_H1), logL_H1 the saturated
model by EM (METHODS section 6; Arbuckle 1996; Little & Rubin 2002). Gradient and
expected information are sums of the complete-data kernels on the sub-selected rows and
columns of the analytic moment Jacobian, so the optimizer of
:mod:`invariance.estimate.optimize` serves this objective unchanged. With complete data
T equals the complete-data ML statistic exactly.
"""

from __future__ import annotations

import numpy as np

from ..data.em import em_saturated, missing_patterns, pattern_loglik
from ..data.moments import SampleStats
from ..model.spec import ModelSpec
from .kernels import (
    compile_spec,
    group_matrices,
    implied_moments,
    layout_jacobians,
    ml_derivatives,
    ml_hessian,
    moment_jacobian,
)
from .linalg import partition

__all__ = ["FIMLObjective", "independence_loglik"]

_LOG2PI = float(np.log(2 * np.pi))


class _GroupData:
    """Pattern bookkeeping of one group: observed items, counts, means, covariances."""

    def __init__(self, x: np.ndarray, loglik_h1: float | None) -> None:
        self.x = x
        self.pat = missing_patterns(x)
        self.obs, self.nk, self.mk, self.Sk = [], [], [], []
        for k, rows in enumerate(self.pat.rows):
            o = self.pat.observed[k]
            if not o.any():
                continue
            xo = x[np.ix_(rows, o)]
            m = xo.mean(axis=0)
            e = xo - m
            self.obs.append(np.flatnonzero(o))
            self.nk.append(float(rows.size))
            self.mk.append(m)
            self.Sk.append(e.T @ e / rows.size)
        if loglik_h1 is None:
            em = em_saturated(x, patterns=self.pat)
            loglik_h1 = em.loglik
        self.loglik_h1 = float(loglik_h1)
        self.n = float(sum(self.nk))


class FIMLObjective:
    """Full-information ML over missingness patterns, one term per group and pattern.

    Same interface as :class:`~invariance.estimate.objective.MLObjective`: ``value``
    is T = -2 (logL_model - logL_H1); ``derivatives`` gives T, its gradient and the
    expected information (expected Hessian of T).

    Parameters
    ----------
    spec
        The model.
    stats
        Statistics whose groups carry ``raw`` data (NaN = missing), in ``spec`` order;
        ``cov`` and ``mean`` are taken as the saturated estimates (EM) for starting
        values and residual-based indices.
    """

    def __init__(self, spec: ModelSpec, stats: SampleStats) -> None:
        self.spec = spec
        self.stats = stats
        self.layouts = compile_spec(spec)
        self.n_params = spec.n_params
        self.data = []
        for g in stats.groups:
            h1 = None
            if g.missing is not None and g.missing.method == "fiml":
                h1 = g.missing.loglik_h1
            self.data.append(_GroupData(np.asarray(g.raw, dtype=float), h1))
        self.n = np.array([d.n for d in self.data])
        self.S = [g.cov for g in stats.groups]
        self.mean = [g.mean for g in stats.groups]
        self.loglik_h1 = float(sum(d.loglik_h1 for d in self.data))
        #: shared vs group-local parameters: the information matrix is arrow-shaped
        self.partition = partition([lay.params for lay in self.layouts], self.n_params)

    # -- likelihood -----------------------------------------------------------------
    def loglik(self, theta: np.ndarray) -> float:
        """Casewise log-likelihood of the model at ``theta`` (``-inf`` if not admissible)."""
        try:
            total = 0.0
            for lay, d in zip(self.layouts, self.data):
                sigma, mu, _, _ = implied_moments(group_matrices(lay, theta))
                total += pattern_loglik(d.x, d.pat, mu, sigma)
            return total
        except np.linalg.LinAlgError:
            return -np.inf

    def _group_m2ll(self, d: _GroupData, sigma: np.ndarray, mu: np.ndarray) -> float:
        total = 0.0
        for o, n, m, S in zip(d.obs, d.nk, d.mk, d.Sk):
            R = np.linalg.cholesky(sigma[np.ix_(o, o)])
            Ri = np.linalg.inv(R)
            W = Ri.T @ Ri
            e = m - mu[o]
            total += n * (o.size * _LOG2PI + 2.0 * np.log(np.diag(R)).sum() + np.sum(S * W) + e @ W @ e)
        return total

    def value(self, theta: np.ndarray) -> float:
        try:
            total = 0.0
            for lay, d in zip(self.layouts, self.data):
                sigma, mu, _, _ = implied_moments(group_matrices(lay, theta))
                total += self._group_m2ll(d, sigma, mu)
        except np.linalg.LinAlgError:
            return np.inf
        return float(total + 2.0 * self.loglik_h1)

    def moments(self, theta: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
        """Implied (Sigma, mu) of every group."""
        return [implied_moments(group_matrices(lay, theta))[:2] for lay in self.layouts]

    def jacobians(self, theta: np.ndarray):
        """Per group: (matrices, Sigma, mu, dS, dm) at ``theta`` (local parameters)."""
        return layout_jacobians(self.layouts, theta)

    def derivatives(self, theta: np.ndarray, *, information: bool = True):
        q = self.n_params
        grad = np.zeros(q)
        info = np.zeros((q, q)) if information else None
        total = 2.0 * self.loglik_h1
        for lay, d in zip(self.layouts, self.data):
            mats = group_matrices(lay, theta)
            sigma, mu, G, A = implied_moments(mats)
            dS, dm = moment_jacobian(lay, mats, G, A)
            total += self._group_m2ll(d, sigma, mu)
            u = lay.params
            gg = np.zeros(u.size)
            hh = np.zeros((u.size, u.size)) if information else None
            for o, n, m, S in zip(d.obs, d.nk, d.mk, d.Sk):
                g1, h1, _ = ml_derivatives(
                    sigma[np.ix_(o, o)], mu[o], S, m, dS[:, o][:, :, o], dm[:, o], information=information
                )
                gg += n * g1
                if information:
                    hh += n * h1
            grad[u] += gg
            if information:
                info[np.ix_(u, u)] += hh
        if not np.isfinite(total):
            raise np.linalg.LinAlgError("implied covariance not positive definite")
        return float(total), grad, info

    def hessian(self, theta: np.ndarray) -> np.ndarray:
        """Exact (observed) Hessian of T, analytic.

        Per pattern the moment part of the complete-data Hessian on the observed rows
        and columns; the second-derivative part is linear in Gs = W - W C W and w = W d,
        so the patterns' embedded Gs and w are summed and contracted once per group by
        the complete-data kernel (METHODS section 2; Kenward & Molenberghs 1998 for why
        the observed information is the one to use under MAR).
        """
        q = self.n_params
        H = np.zeros((q, q))
        for lay, d in zip(self.layouts, self.data):
            mats = group_matrices(lay, theta)
            sigma, mu, G, A = implied_moments(mats)
            dS, dm = moment_jacobian(lay, mats, G, A)
            p = sigma.shape[0]
            Gs_t = np.zeros((p, p))
            w_t = np.zeros(p)
            hh = np.zeros((dS.shape[0], dS.shape[0]))
            for o, n, m, S in zip(d.obs, d.nk, d.mk, d.Sk):
                W = np.linalg.inv(sigma[np.ix_(o, o)])
                e = m - mu[o]
                C = S + np.outer(e, e)
                hh += n * _moment_part(W, C, W @ e, dS[:, o][:, :, o], dm[:, o])
                Gs_t[np.ix_(o, o)] += n * (W - W @ C @ W)
                w_t[o] += n * (W @ e)
            # second-derivative part: the complete-data kernel at moments giving (Gs_t, w_t)
            Wf = np.linalg.inv(sigma)
            dd = sigma @ w_t
            Cf = sigma - sigma @ Gs_t @ sigma
            full = ml_hessian(lay, mats, sigma, mu, G, A, Cf - np.outer(dd, dd), mu + dd, dS, dm)
            hh += full - _moment_part(Wf, Cf, w_t, dS, dm)
            u = lay.params
            H[np.ix_(u, u)] += hh
        return (H + H.T) / 2


def _moment_part(W: np.ndarray, C: np.ndarray, w: np.ndarray, dS: np.ndarray, dm: np.ndarray) -> np.ndarray:
    """Hessian terms of F built from first derivatives of the moments only::

        -tr(W S_u W S_v) + 2 tr(W S_u W C W S_v) + 2 mu_v' W S_u w + 2 mu_u' W S_v w + 2 mu_u' W mu_v
    """
    WS = W @ dS                                            # (u, p, p): W S_u
    H = -np.einsum("uij,vji->uv", WS, WS) + 2.0 * np.einsum("uij,vji->uv", WS @ (W @ C), WS)
    a = np.einsum("uij,j->ui", dS, w) @ W                  # rows: (W S_u w)'
    H += 2.0 * (dm @ a.T + a @ dm.T) + 2.0 * dm @ W @ dm.T
    return H


def independence_loglik(x: np.ndarray) -> float:
    """Log-likelihood of the baseline model (free means and variances, zero covariances).

    With a diagonal covariance the likelihood factors over items, so the ML estimates
    are each item's mean and variance (divisor n_j) over its observed values.
    """
    total = 0.0
    for j in range(x.shape[1]):
        v = x[:, j][~np.isnan(x[:, j])]
        total += -0.5 * v.size * (_LOG2PI + np.log(v.var()) + 1.0)
    return float(total)
