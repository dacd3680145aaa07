"""The ML discrepancy of one group with its gradient, expected information and exact
Hessian (METHODS section 2): pure array functions built on the factored moment
Jacobian of :mod:`invariance.estimate.kernels`."""

from __future__ import annotations

import numpy as np

from ..model.spec import ALPHA, BETA, LAMBDA, PSI
from .kernels import (
    FactoredJacobian,
    GroupLayout,
    to_params,
    factor_jacobian,
    factored_gradient,
    factored_information,
    factored_moment_hessian,
    gram,
)

__all__ = ["ml_discrepancy", "ml_derivatives", "ml_hessian", "second_derivative_part"]


def ml_discrepancy(W: np.ndarray, logdet: float, mu: np.ndarray, S: np.ndarray, mean: np.ndarray, logdet_s: float) -> float:
    """ML discrepancy F of one group (METHODS section 2) from W = Sigma^-1 and log|Sigma|
    (:func:`~invariance.estimate.linalg.pd_inverse_logdet`)."""
    d = mean - mu
    return float(logdet + np.sum(S * W) - logdet_s - S.shape[0] + d @ W @ d)


def ml_derivatives(
    W: np.ndarray,
    logdet: float,
    mu: np.ndarray,
    S: np.ndarray,
    mean: np.ndarray,
    fj: FactoredJacobian,
    *,
    logdet_s: float = 0.0,
    information: bool = True,
) -> tuple[float, np.ndarray, np.ndarray | None]:
    """Discrepancy, gradient and expected information of one group's ML discrepancy.

    ``W`` = Sigma^-1 and ``logdet`` = log|Sigma| (one factorization per point, shared
    with the value and the Hessian); the factored Jacobian (:func:`factor_jacobian`)
    means no (u, p, p) array is built.

    Returns
    -------
    F : float
        The discrepancy (METHODS section 2) with ``logdet_s`` = log|S|.
    grad : (u,) array
        dF/dtheta = tr(Gs S_u) - 2 mu_u' W d, Gs = W - W (S + dd') W.
    info : (u, u) array or None
        E[d2F/dtheta dtheta'] = tr(W dS_u W dS_v) + 2 dm_u' W dm_v.
    """
    d = mean - mu
    Wd = W @ d
    WC = W @ S
    f = logdet + np.trace(WC) - logdet_s - S.shape[0] + d @ Wd
    Gs = W - (WC + np.outer(Wd, d)) @ W
    grad = factored_gradient(fj, Gs, Wd)
    info = factored_information(fj, gram(fj.H, W)) if information else None
    return float(f), grad, info


def ml_hessian(
    lay: GroupLayout,
    mats: tuple[np.ndarray, ...],
    W: np.ndarray,
    mu: np.ndarray,
    G: np.ndarray,
    A: np.ndarray,
    S: np.ndarray,
    mean: np.ndarray,
    *,
    fj: FactoredJacobian | None = None,
) -> np.ndarray:
    """Exact (observed) Hessian of one group's ML discrepancy, local parameters
    (``W`` = Sigma^-1; ``fj``: the factored Jacobian at this point, when already computed).

    With W = Sigma^-1, d = m - mu, C = S + dd', Gs = W - W C W, w = W d::

        F_uv = tr(Gs Sigma_uv) - 2 w' mu_uv - tr(W S_u W S_v) + 2 tr(W S_u W C W S_v)
               + 2 mu_v' W S_u w + 2 mu_u' W S_v w + 2 mu_u' W mu_v

    The first-derivative terms come from the factored Jacobian
    (:func:`factored_moment_hessian`); the second-derivative terms from
    :func:`second_derivative_part`.
    """
    d = mean - mu
    w = W @ d
    M = W @ (S + np.outer(d, d)) @ W
    Gs = W - M
    if fj is None:
        fj = factor_jacobian(lay, mats, G, A)
    kw = np.concatenate([w, fj.H.T @ w])
    He = factored_moment_hessian(fj, gram(fj.H, W), gram(fj.H, M), kw)
    He += second_derivative_part(lay, mats, G, A, Gs, w)
    return to_params(fj, None, He)[1]


def _put(Ke: np.ndarray, rows: np.ndarray, cols: np.ndarray, blk: np.ndarray) -> None:
    """Write a block and its transpose into the symmetric ``Ke``."""
    Ke[rows[:, None], cols[None, :]] = blk
    Ke[cols[:, None], rows[None, :]] = blk.T


def second_derivative_part(
    lay: GroupLayout, mats: tuple[np.ndarray, ...], G: np.ndarray, A: np.ndarray, Gs: np.ndarray, w: np.ndarray
) -> np.ndarray:
    """tr(Gs Sigma_uv) - 2 w' mu_uv per pair of free entries (not mapped to parameters).

    Contracted in closed form per pair of matrix entries (Lambda, B, Psi, alpha; Theta
    and nu enter linearly). Linear in (Gs, w): full-information ML passes the sums over
    its missingness patterns.
    """
    psi = mats[2]
    k = lay.ent_mat.size
    Ke = np.zeros((k, k))
    iL, jL, _, pL = lay.sel[LAMBDA]
    cP, dP, _, pP = lay.sel[PSI]
    cA, _, _, pA = lay.sel[ALPHA]
    offP = (cP != dP).astype(float)
    Phi = A @ psi @ A.T
    GsG = Gs @ G
    if pL.size:
        Ke[pL[:, None], pL[None, :]] = 2.0 * Gs[iL[:, None], iL[None, :]] * Phi[jL[:, None], jL[None, :]].T
        if pP.size:
            _put(Ke, pL, pP, 2.0 * GsG[iL][:, cP] * A[jL][:, dP] + offP[None, :] * 2.0 * GsG[iL][:, dP] * A[jL][:, cP])
        if pA.size:
            _put(Ke, pL, pA, -2.0 * w[iL][:, None] * A[jL][:, cA])
    if lay.sel[BETA][3].size:
        _path_part(Ke, lay, mats, G, A, Gs, w, Phi, GsG)
    return Ke


def _path_part(Ke, lay: GroupLayout, mats, G, A, Gs, w, Phi, GsG) -> None:
    """The blocks of :func:`second_derivative_part` that involve paths (B entries)."""
    lam, psi, alpha = mats[0], mats[2], mats[5]
    iL, jL, _, pL = lay.sel[LAMBDA]
    eB, fB, _, pB = lay.sel[BETA]
    cP, dP, _, pP = lay.sel[PSI]
    cA, _, _, pA = lay.sel[ALPHA]
    offP = (cP != dP).astype(float)
    M = lam.T @ Gs @ lam
    v = lam.T @ w
    if pL.size:
        blk = 2.0 * (GsG[iL][:, eB] * Phi[fB][:, jL].T + (Gs @ lam @ Phi)[iL][:, fB] * A[jL][:, eB])
        blk -= 2.0 * w[iL][:, None] * A[jL][:, eB] * (A @ alpha)[fB][None, :]
        _put(Ke, pL, pB, blk)
    AZA = A.T @ (2.0 * M @ A @ psi - 2.0 * np.outer(v, alpha)) @ A.T
    Ke[pB[:, None], pB[None, :]] = (
        2.0 * (A.T @ M @ A)[eB[:, None], eB[None, :]].T * Phi[fB[:, None], fB[None, :]]
        + A[fB[:, None], eB[None, :]].T * AZA[eB[:, None], fB[None, :]].T
        + A[fB[:, None], eB[None, :]] * AZA[eB[:, None], fB[None, :]]
    )
    if pP.size:
        # rows: Psi entries (c, d); cols: B entries (e, f)
        Kf = G.T @ Gs @ G
        blk = 2.0 * A[fB[:, None], cP[None, :]].T * Kf[eB[:, None], dP[None, :]].T
        blk += offP[:, None] * 2.0 * A[fB[:, None], dP[None, :]].T * Kf[eB[:, None], cP[None, :]].T
        blk = np.where(offP[:, None] > 0, blk, 2.0 * A[fB[:, None], cP[None, :]].T * Kf[eB[:, None], cP[None, :]].T)
        _put(Ke, pP, pB, blk)
    if pA.size:
        _put(Ke, pB, pA, -2.0 * (A.T @ v)[eB][:, None] * A[fB[:, None], cA[None, :]])
