"""Alignment loss and its solver: pure array kernels (METHODS section 11).

The simplicity function, the total loss with its analytic gradient over the group means
and log variances, the multi-start minimizer and the implicit-function Jacobian of the
aligned solution. :mod:`invariance.partial.alignment` holds the front door and results.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize as _sopt

__all__ = [
    "EPSILON",
    "simplicity",
    "alignment_loss",
    "aligned_parameters",
    "solve_alignment",
    "implicit_jacobian",
]

EPSILON = 0.01


def simplicity(x: np.ndarray, eps: float = EPSILON) -> tuple[np.ndarray, np.ndarray]:
    """The component loss f(x) = (x^2 + eps)^(1/4) and its derivative."""
    q = x * x + eps
    val = np.sqrt(np.sqrt(q))
    return val, x / (2.0 * q**0.75)


def unpack_solution(x: np.ndarray, n_groups: int, ref: int) -> tuple[np.ndarray, np.ndarray]:
    """Group means and log variances (length G each, 0 in the reference group) from ``x``."""
    others = np.delete(np.arange(n_groups), ref)
    a = np.zeros(n_groups)
    u = np.zeros(n_groups)
    k = others.size
    a[others] = x[:k]
    u[others] = x[k:]
    return a, u


def aligned_parameters(lam0: np.ndarray, nu0: np.ndarray, a: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Aligned loadings and intercepts (G, k) for group means ``a`` and variances ``v``."""
    s = 1.0 / np.sqrt(v)
    lam = lam0 * s[:, None]
    return lam, nu0 - a[:, None] * lam


def alignment_loss(
    x: np.ndarray, lam0: np.ndarray, nu0: np.ndarray, weights: np.ndarray, ref: int, eps: float = EPSILON
) -> tuple[float, np.ndarray]:
    """Total alignment loss and its analytic gradient.

    Parameters
    ----------
    x
        Means then log variances of the non-reference groups (length 2(G-1)).
    lam0, nu0
        Configural loadings and intercepts, shape (G, k).
    weights
        Symmetric (G, G) pair weights with a zero diagonal.
    ref
        Index of the reference group (mean 0, variance 1).
    """
    G = lam0.shape[0]
    a, u = unpack_solution(x, G, ref)
    lam, nu = aligned_parameters(lam0, nu0, a, np.exp(u))
    total = 0.0
    grads = []
    for P in (lam, nu):
        D = P[:, None, :] - P[None, :, :]
        val, der = simplicity(D, eps)
        total += 0.5 * float(np.sum(weights[:, :, None] * val))
        grads.append(np.einsum("gh,ghi->gi", weights, der))
    gL, gN = grads
    grad_a = -np.sum(gN * lam, axis=1)
    grad_u = np.sum(-0.5 * gL * lam + 0.5 * gN * a[:, None] * lam, axis=1)
    others = np.delete(np.arange(G), ref)
    return total, np.concatenate([grad_a[others], grad_u[others]])


def _heuristic_start(lam0: np.ndarray, nu0: np.ndarray, ref: int) -> np.ndarray:
    """Median loading ratios and intercept shifts against the reference group as a start."""
    G = lam0.shape[0]
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.abs(lam0) / np.abs(lam0[ref])[None, :]
        sd = np.nanmedian(np.where(np.isfinite(ratio) & (ratio > 0), ratio, np.nan), axis=1)
        sd = np.where(np.isfinite(sd), sd, 1.0)
        lam = lam0 / sd[:, None]
        a = np.nanmedian(np.where(np.abs(lam) > 1e-8, (nu0 - nu0[ref][None, :]) / lam, np.nan), axis=1)
    a = np.where(np.isfinite(a), a, 0.0)
    others = np.delete(np.arange(G), ref)
    return np.concatenate([a[others], 2.0 * np.log(sd[others])])


def solve_alignment(
    lam0: np.ndarray,
    nu0: np.ndarray,
    weights: np.ndarray,
    ref: int,
    *,
    eps: float = EPSILON,
    random_starts: int = 4,
    seed: int = 0,
) -> tuple[np.ndarray, float, bool]:
    """Minimize the alignment loss from several starts; returns ``(x, loss, converged)``.

    Starts: equal means and variances; a median-ratio guess; ``random_starts``
    seeded perturbations of the guess. The best converged solution wins.
    """
    G = lam0.shape[0]
    rng = np.random.default_rng(seed)
    guess = _heuristic_start(lam0, nu0, ref)
    starts = [np.zeros(2 * (G - 1)), guess]
    starts += [guess + rng.normal(scale=0.3, size=guess.size) for _ in range(random_starts)]
    # the weights are rescaled to sum 1 over pairs: the same minimizer, and gradients of
    # order one, so the optimizer's tolerances mean the same for 2 groups or 80
    scale = 2.0 / max(float(weights.sum()), 1e-300)
    w = weights * scale
    best = None
    for x0 in starts:
        res = _sopt.minimize(
            alignment_loss, x0, args=(lam0, nu0, w, ref, eps), jac=True, method="BFGS",
            options={"gtol": 1e-8, "maxiter": 2000},
        )
        # "precision loss" stops at the floating-point limit: accept a small gradient
        ok = bool(res.success) or float(np.max(np.abs(res.jac))) < 1e-6
        key = (not ok, float(res.fun))
        if best is None or key < best[0]:
            best = (key, res.x, float(res.fun) / scale, ok)
    return best[1], best[2], best[3]


def fd_jacobian(fun, x: np.ndarray, h: float = 1e-5) -> np.ndarray:
    """Central-difference Jacobian of a vector function."""
    cols = []
    for j in range(x.size):
        e = np.zeros_like(x)
        step = h * max(1.0, abs(x[j]))
        e[j] = step
        cols.append((fun(x + e) - fun(x - e)) / (2 * step))
    return np.column_stack(cols)


def implicit_jacobian(
    x: np.ndarray, lam0: np.ndarray, nu0: np.ndarray, weights: np.ndarray, ref: int, *, eps: float = EPSILON
) -> np.ndarray:
    """Derivative of the aligned solution with respect to the configural estimates.

    At a minimum ``grad_x F(x, c) = 0``, so ``dx/dc = -H_xx^-1 H_xc`` (implicit function
    theorem); both blocks are central differences of the analytic gradient. ``c`` is
    ``(lam0.ravel(), nu0.ravel())``. Returns a (2(G-1), 2Gk) array (nan if H_xx is singular).
    """
    G, k = lam0.shape
    c0 = np.concatenate([lam0.ravel(), nu0.ravel()])
    H = fd_jacobian(lambda xx: alignment_loss(xx, lam0, nu0, weights, ref, eps)[1], x)
    H = (H + H.T) / 2
    Hc = fd_jacobian(
        lambda cc: alignment_loss(x, cc[: G * k].reshape(G, k), cc[G * k :].reshape(G, k), weights, ref, eps)[1], c0
    )
    try:
        return -np.linalg.solve(H, Hc)
    except np.linalg.LinAlgError:
        return np.full((x.size, c0.size), np.nan)
