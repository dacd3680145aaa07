"""Draw multivariate normal data from model matrices (for demos and recovery studies)."""

from __future__ import annotations

import numpy as np

__all__ = ["implied_from_matrices", "draw_group"]


def implied_from_matrices(lam, psi, theta, nu, alpha=None, beta=None) -> tuple[np.ndarray, np.ndarray]:
    """Implied covariance and mean of the all-indicator model (METHODS section 1)."""
    lam = np.asarray(lam, float)
    m = lam.shape[1]
    beta = np.zeros((m, m)) if beta is None else np.asarray(beta, float)
    alpha = np.zeros(m) if alpha is None else np.asarray(alpha, float)
    A = np.linalg.inv(np.eye(m) - beta)
    G = lam @ A
    return G @ np.asarray(psi, float) @ G.T + np.asarray(theta, float), np.asarray(nu, float) + G @ alpha


def draw_group(n: int, sigma: np.ndarray, mu: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """``n`` multivariate normal draws with covariance ``sigma`` and mean ``mu``."""
    L = np.linalg.cholesky(sigma)
    return mu + rng.standard_normal((n, mu.size)) @ L.T
