"""Full-information ML for incomplete data: the casewise likelihood grouped by pattern.

Each case contributes the normal likelihood of its observed items under the implied
moments restricted to them. Cases sharing a missingness pattern are pooled through
their pattern mean m_k and covariance S_k (divisor n_k), so a pattern costs one
Cholesky factor per evaluation:

    -2 logL = sum_k n_k [p_k log 2pi + log|Sigma_k| + tr(S_k Sigma_k^-1) + d_k' Sigma_k^-1 d_k]

with Sigma_k, mu_k the rows and columns of the observed items and d_k = m_k - mu_k.
The value of the objective is T = -2 (logL_model - logL_H1), logL_H1 the saturated
model by EM (METHODS section 6; Arbuckle 1996; Little & Rubin 2002). Gradient and
expected information and the exact Hessian are contracted through the factored moment
Jacobian; the sums over patterns run in the coordinates of the items every case observes
(:mod:`invariance.estimate.fiml_kernels`), so a pattern costs one small factorization.
The optimizer of :mod:`invariance.estimate.optimize` serves this objective unchanged.
With complete data T equals the complete-data ML statistic exactly.
"""

from __future__ import annotations

import numpy as np

from ..data.em import em_saturated
from ..data.patterns import PatternMoments, pattern_moments
from ..data.moments import SampleStats
from ..model.spec import ModelSpec
from .fiml_kernels import PatternSplit, gradient_terms, hessian_terms, information_terms, pattern_point
from .kernels import entry_matrix, factor_jacobian, factored_gradient, group_matrices, implied_moments, to_params
from .ml_kernels import second_derivative_part
from .objective import GroupObjective

__all__ = ["FIMLObjective", "independence_loglik"]

_LOG2PI = float(np.log(2 * np.pi))


class _GroupData:
    """One group's data: the cases, their pattern statistics and logL_H1 (all cached)."""

    def __init__(self, x: np.ndarray, loglik_h1: float | None) -> None:
        self.x = x
        self.pm: PatternMoments = pattern_moments(x)
        self.split = PatternSplit.of(self.pm)
        if loglik_h1 is None:
            loglik_h1 = em_saturated(x).loglik
        self.loglik_h1 = float(loglik_h1)
        self.n = self.pm.n


class FIMLObjective(GroupObjective):
    """Full-information ML over missingness patterns, one term per group and pattern.

    Same interface as :class:`~invariance.estimate.objective.MLObjective`: ``value``
    is T = -2 (logL_model - logL_H1); ``derivatives`` gives T, its gradient and the
    expected information (expected Hessian of T). Every evaluation is batched over a
    group's patterns (one stacked factorization), and the derivatives are contracted
    once per group through the factored Jacobian
    (:func:`~invariance.estimate.kernels.factor_jacobian`).

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
        self._setup(spec, stats)
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

    # -- the kept point (:class:`~invariance.estimate.objective.GroupObjective`) --------
    def _parts(self, g: int, lay, theta: np.ndarray) -> list:
        """[mats, G, A, value, pattern point, factored Jacobian (on first use)]: the
        value from :func:`~invariance.estimate.fiml_kernels.pattern_point`."""
        mats = group_matrices(lay, theta)
        sigma, mu, G, A = implied_moments(mats)
        pt = pattern_point(self.data[g].split, sigma, mu)
        return [mats, G, A, pt.value, pt, None]

    def _complete(self, lay, part: list) -> None:
        if part[5] is None:
            part[5] = factor_jacobian(lay, part[0], part[1], part[2])

    # -- likelihood -----------------------------------------------------------------
    def loglik(self, theta: np.ndarray) -> float:
        """Casewise log-likelihood of the model at ``theta`` (``-inf`` if not admissible)."""
        try:
            return -0.5 * sum(part[3] for part in self._at(theta))
        except np.linalg.LinAlgError:
            return -np.inf

    def value(self, theta: np.ndarray) -> float:
        ll = self.loglik(theta)
        return float(-2.0 * ll + 2.0 * self.loglik_h1) if np.isfinite(ll) else np.inf

    def implied(self, theta: np.ndarray) -> tuple[tuple, tuple, tuple]:
        """(matrices, Sigma, mu) of every group at ``theta``."""
        matrices = tuple(group_matrices(lay, theta) for lay in self.layouts)
        moments = [implied_moments(m)[:2] for m in matrices]
        return matrices, tuple(s for s, _ in moments), tuple(mu for _, mu in moments)

    def derivatives(self, theta: np.ndarray, *, information: bool = True):
        """T, its gradient and (optionally) the expected information: sums over patterns
        through :mod:`~invariance.estimate.fiml_kernels`."""
        q = self.n_params
        grad = np.zeros(q)
        info = np.zeros((q, q)) if information else None
        total = 2.0 * self.loglik_h1
        for lay, d, (_, _, _, val, pt, fj) in zip(self.layouts, self.data, self._jacobians(theta)):
            total += val
            gg = factored_gradient(fj, *gradient_terms(d.split, pt))
            hh = None
            if information:
                hh = to_params(fj, None, entry_matrix(fj, *information_terms(d.split, pt, fj)))[1]
            if self._whole:  # one group owning every parameter: its terms are the totals
                grad, info = gg, hh
                break
            u = lay.params
            grad[u] += gg
            if information:
                info[np.ix_(u, u)] += hh
        if not np.isfinite(total):
            raise np.linalg.LinAlgError("implied covariance not positive definite")
        return float(total), grad, info

    def hessian(self, theta: np.ndarray) -> np.ndarray:
        """Exact (observed) Hessian of T, analytic.

        The first-derivative part is summed over patterns in the split coordinates
        (:func:`~invariance.estimate.fiml_kernels.hessian_terms`); the
        second-derivative part is linear in Gs = sum n_k (W_k - W_k C_k W_k) and
        w = sum n_k W_k d_k (METHODS section 2; Kenward & Molenberghs 1998 for why the
        observed information is the one to use under MAR).
        """
        q = self.n_params
        H = np.zeros((q, q))
        for lay, d, (mats, G, A, _, pt, fj) in zip(self.layouts, self.data, self._jacobians(theta)):
            Gs, w = gradient_terms(d.split, pt)
            He = hessian_terms(d.split, pt, fj) + second_derivative_part(lay, mats, G, A, Gs, w)
            hh = He if fj.P is None else fj.P.T @ He @ fj.P
            if self._whole:
                return (hh + hh.T) / 2
            u = lay.params
            H[np.ix_(u, u)] += hh
        return (H + H.T) / 2


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
