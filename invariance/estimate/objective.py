"""Objectives the optimizer minimizes: each gives a value, an analytic gradient and an
expected information, summed over groups.

An objective is any object with

* ``n_params``
* ``value(theta) -> float``  (``inf`` outside the admissible region)
* ``derivatives(theta) -> (value, gradient, information)``

Estimators (ML now; FIML and DWLS plug in the same way) are objectives; the optimizer in
:mod:`invariance.estimate.optimize` serves them all.
"""

from __future__ import annotations

import numpy as np

from ..data.moments import SampleStats
from ..model.spec import ModelSpec
from .linalg import partition, pd_inverse_logdet
from .kernels import (
    compile_spec,
    factor_jacobian,
    group_matrices,
    implied_moments,
    layout_jacobians,
)
from .ml_kernels import ml_derivatives, ml_discrepancy, ml_hessian

__all__ = ["GroupObjective", "MLObjective"]


class GroupObjective:
    """What the multi-group objectives share: the compiled layout of every group, the
    arrow partition of shared and group-local parameters (one group: none, a dense
    matrix), and the kept last point.

    The value, the derivatives and the Hessian at one point share one set of per-group
    parts (:meth:`_at`, built by the subclass's ``_parts``); the parts only derivatives
    need are filled on first use (:meth:`_jacobians`, the subclass's ``_complete``), so
    a rejected trial point of the line search costs only its value.
    """

    def _setup(self, spec: ModelSpec, stats: SampleStats) -> None:
        self.spec = spec
        self.stats = stats
        self.layouts = compile_spec(spec)
        self.n_params = spec.n_params
        self.partition = (partition([lay.params for lay in self.layouts], self.n_params)
                          if len(self.layouts) > 1 else None)
        self._kept: tuple[bytes, list] | None = None
        #: one group owning every parameter in order: its arrays are the totals (no scatter)
        self._whole = len(self.layouts) == 1 and np.array_equal(self.layouts[0].params, np.arange(self.n_params))

    def _at(self, theta: np.ndarray) -> list[list]:
        """The parts of every group at ``theta`` (LinAlgError when not admissible)."""
        key = theta.tobytes()
        if self._kept is None or self._kept[0] != key:
            self._kept = (key, [self._parts(g, lay, theta) for g, lay in enumerate(self.layouts)])
        return self._kept[1]

    def _jacobians(self, theta: np.ndarray) -> list[list]:
        """:meth:`_at` with the parts derivatives need filled in."""
        parts = self._at(theta)
        for lay, part in zip(self.layouts, parts):
            self._complete(lay, part)
        return parts

    def moments(self, theta: np.ndarray) -> list[tuple[np.ndarray, np.ndarray]]:
        """Implied (Sigma, mu) of every group."""
        _, sigmas, mus = self.implied(theta)
        return list(zip(sigmas, mus))

    def jacobians(self, theta: np.ndarray):
        """Per group: (matrices, Sigma, mu, dS, dm) at ``theta`` (local parameters)."""
        return layout_jacobians(self.layouts, theta)


class MLObjective(GroupObjective):
    """Normal-theory ML from per-group sufficient statistics.

    The value is the test statistic T = sum_g N_g F_g (METHODS section 2); the
    information is the expected Hessian of T, sum_g N_g E[d2F_g].
    """

    def __init__(self, spec: ModelSpec, stats: SampleStats) -> None:
        self._setup(spec, stats)
        self.n = np.array([g.n for g in stats.groups], dtype=float)
        self.S = [g.cov for g in stats.groups]
        self.mean = [g.mean for g in stats.groups]
        self.logdet_s = [float(np.linalg.slogdet(s)[1]) for s in self.S]

    def _parts(self, g: int, lay, theta: np.ndarray) -> list:
        """[mats, Sigma, mu, G, A, W, log|Sigma|, factored Jacobian (on first use)]."""
        mats = group_matrices(lay, theta)
        sigma, mu, G, A = implied_moments(mats)
        W, logdet = pd_inverse_logdet(sigma)
        return [mats, sigma, mu, G, A, W, logdet, None]

    def _complete(self, lay, part: list) -> None:
        if part[7] is None:
            part[7] = factor_jacobian(lay, part[0], part[3], part[4])

    def implied(self, theta: np.ndarray) -> tuple[tuple, tuple, tuple]:
        """(matrices, Sigma, mu) of every group at ``theta``: copies of the kept point's
        (a result may outlive the objective's cache)."""
        parts = self._at(theta)
        return (tuple(tuple(m.copy() for m in p[0]) for p in parts), tuple(p[1].copy() for p in parts),
                tuple(p[2].copy() for p in parts))

    def group_values(self, theta: np.ndarray) -> np.ndarray:
        """F_g of every group (LinAlgError when a Sigma is not positive definite)."""
        f = np.empty(len(self.layouts))
        for g, (_, _, mu, _, _, W, logdet, _) in enumerate(self._at(theta)):
            f[g] = ml_discrepancy(W, logdet, mu, self.S[g], self.mean[g], self.logdet_s[g])
        return f

    def value(self, theta: np.ndarray) -> float:
        try:
            return float(self.n @ self.group_values(theta))
        except np.linalg.LinAlgError:
            return np.inf

    def derivatives(self, theta: np.ndarray, *, information: bool = True):
        q = self.n_params
        grad = None if self._whole else np.zeros(q)
        info = np.zeros((q, q)) if information and not self._whole else None
        total = 0.0
        for g, (lay, (_, _, mu, _, _, W, logdet, fj)) in enumerate(zip(self.layouts, self._jacobians(theta))):
            f, gg, hh = ml_derivatives(
                W, logdet, mu, self.S[g], self.mean[g], fj, logdet_s=self.logdet_s[g], information=information
            )
            total += self.n[g] * f
            if grad is None:  # one group owning every parameter: its terms are the totals
                return total, self.n[g] * gg, None if hh is None else self.n[g] * hh
            u = lay.params
            grad[u] += self.n[g] * gg
            if information:
                info[np.ix_(u, u)] += self.n[g] * hh
        return total, grad, info

    def hessian(self, theta: np.ndarray) -> np.ndarray:
        """Exact (observed) Hessian of T, analytic."""
        q = self.n_params
        H = None if self._whole else np.zeros((q, q))
        for g, (lay, (mats, _, mu, G, A, W, _, fj)) in enumerate(zip(self.layouts, self._jacobians(theta))):
            hh = ml_hessian(lay, mats, W, mu, G, A, self.S[g], self.mean[g], fj=fj)
            if H is None:
                return self.n[g] * hh
            u = lay.params
            H[np.ix_(u, u)] += self.n[g] * hh
        return H
