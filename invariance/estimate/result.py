"""Frozen result of one estimated model: the one result type of every estimator."""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from scipy import stats as _st

import pandas as pd

from .indices import FitStats
from ..model.spec import ALPHA, NU, ModelSpec

__all__ = ["FitResult", "standardize"]

MATRIX_NAMES = ("lambda", "beta", "psi", "theta", "nu", "alpha", "tau")


def standardize(mats: tuple[np.ndarray, ...]) -> tuple[np.ndarray, ...]:
    """Completely standardized matrices of one group (items and factors to unit variance).

    Ordinal models carry a seventh matrix, the thresholds (p, Kmax - 1), which is
    divided by the item SDs like the intercepts.

    Loadings lambda_ij sd(F_j) / sd(x_i); paths b_ij sd(F_j) / sd(F_i); Psi entries
    divided by the total factor SDs (disturbance variances become the unexplained
    share); Theta by the item SDs; intercepts nu_i / sd(x_i); means alpha_j / sd(F_j).
    """
    lam, beta, psi, theta, nu, alpha = mats[:6]
    m = beta.shape[0]
    A = np.linalg.inv(np.eye(m) - beta)
    phi = A @ psi @ A.T
    sigma = lam @ phi @ lam.T + theta
    sf = np.sqrt(np.clip(np.diag(phi), 1e-300, None))
    sx = np.sqrt(np.clip(np.diag(sigma), 1e-300, None))
    out = (
        lam * sf[None, :] / sx[:, None],
        beta * sf[None, :] / sf[:, None],
        psi / np.outer(sf, sf),
        theta / np.outer(sx, sx),
        nu / sx,
        alpha / sf,
    )
    if len(mats) > 6:  # ordinal models: thresholds on the latent-response SD scale
        out = out + (mats[6] / sx[:, None],)
    return out


@dataclass(frozen=True, eq=False)
class FitResult:
    """One fitted multi-group model.

    Attributes
    ----------
    spec
        The model specification that was estimated.
    estimator
        Name of the estimator (``ml``, ...).
    theta
        Estimates of the distinct free parameters (``spec.param_labels`` order).
    acov
        Asymptotic covariance of ``theta`` (``None`` if the information is singular).
    converged, status, iterations
        Optimizer outcome; ``status`` is one of the fixed messages of
        :data:`invariance.estimate.optimize.STATUS`.
    fit
        Fit statistics.
    problems
        Named problems found in the solution (improper estimates, singular
        information, non-convergence); empty for a clean solution.
    matrices
        Per group, the six estimated matrices (Lambda, B, Psi, Theta, nu, alpha).
    sigma, mu
        Per group, the implied covariance matrix and mean vector.
    group_n
        Cases per group.
    extra
        Estimator-specific additions (robust statistics and the like).
    """

    spec: ModelSpec
    estimator: str
    theta: np.ndarray
    acov: np.ndarray | None
    converged: bool
    status: str
    iterations: int
    fit: FitStats
    problems: tuple[str, ...]
    matrices: tuple[tuple[np.ndarray, ...], ...]
    sigma: tuple[np.ndarray, ...]
    mu: tuple[np.ndarray, ...]
    group_n: tuple[int, ...]
    extra: dict = field(default_factory=dict)

    @property
    def groups(self) -> tuple[str, ...]:
        return self.spec.groups

    @property
    def level(self) -> str:
        return self.spec.level

    @cached_property
    def se(self) -> np.ndarray:
        """Standard errors of ``theta`` (nan where unavailable)."""
        if self.acov is None:
            return np.full(self.theta.size, np.nan)
        return np.sqrt(np.clip(np.diag(self.acov), 0, None))

    def group_index(self, group: str) -> int:
        return self.spec.groups.index(group)

    def group_matrices(self, group: str) -> dict[str, np.ndarray]:
        """The estimated matrices of one group, by name."""
        return dict(zip(MATRIX_NAMES, self.matrices[self.group_index(group)]))

    def standardized(self, group: str) -> dict[str, np.ndarray]:
        """The completely standardized matrices of one group, by name."""
        return dict(zip(MATRIX_NAMES, standardize(self.matrices[self.group_index(group)])))

    def factor_covariance(self, group: str) -> np.ndarray:
        """Total factor covariance A Psi A' of one group."""
        lam, beta, psi = self.matrices[self.group_index(group)][:3]
        A = np.linalg.inv(np.eye(beta.shape[0]) - beta)
        return A @ psi @ A.T

    def estimates(self):
        """Every entry of every group as a pandas DataFrame.

        Columns: group, parameter, variable, other, label, free, estimate, se, z, pvalue, std
        (completely standardized value).
        """

        spec = self.spec
        lhs, rhs = spec.entry_names()
        kinds = spec.kinds()
        param = spec.param_index
        est = np.empty(spec.group.size)
        se = np.full(spec.group.size, np.nan)
        std = np.empty(spec.group.size)
        stdm = [standardize(m) for m in self.matrices]
        for k in range(spec.group.size):
            g, mat, r, c = spec.group[k], spec.matrix[k], spec.row[k], spec.col[k]
            M, Ms = self.matrices[g][mat], stdm[g][mat]
            est[k] = M[r] if mat in (NU, ALPHA) else M[r, c]
            std[k] = Ms[r] if mat in (NU, ALPHA) else Ms[r, c]
            if param[k] >= 0:
                se[k] = self.se[param[k]]
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.where(se > 0, est / se, np.nan)
        pval = 2 * _st.norm.sf(np.abs(z))
        return pd.DataFrame(
            {
                "group": [spec.groups[g] for g in spec.group],
                "parameter": kinds,
                "variable": lhs,
                "other": rhs,
                "label": spec.label,
                "free": spec.free,
                "estimate": est,
                "se": se,
                "z": z,
                "pvalue": pval,
                "std": std,
            }
        )

    def summary(self) -> dict:
        """Plain-type summary (for JSON)."""
        return {
            "level": self.level,
            "estimator": self.estimator,
            "converged": self.converged,
            "status": self.status,
            "iterations": self.iterations,
            "problems": list(self.problems),
            **self.fit.to_dict(),
        }
