"""Numerical kernels of the all-indicator model: pure functions of arrays.

Nothing here knows about labels, pandas or files. A :class:`GroupLayout` is the compiled
form of one group's entries of a :class:`~invariance.model.ModelSpec`; the functions
build the group's matrices from a parameter vector, the implied moments, their analytic
Jacobian, and the ML discrepancy with its gradient and expected information
(METHODS sections 1 and 2).

Conventions: ``dS`` arrays have shape (u, p, p) (one symmetric matrix per local
parameter), ``dm`` arrays shape (u, p).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..model.spec import ALPHA, BETA, LAMBDA, NU, PSI, THETA, ModelSpec

__all__ = [
    "GroupLayout",
    "compile_spec",
    "group_matrices",
    "implied_moments",
    "moment_jacobian",
    "ml_discrepancy",
    "ml_derivatives",
]


@dataclass(frozen=True, eq=False)
class GroupLayout:
    """One group's entries, compiled for fast evaluation.

    ``base`` holds the six matrices with fixed values filled in. Free entries are
    listed by matrix in ``sel`` (a dict matrix code -> (rows, cols, global param
    index, local param index)). ``params`` are the global parameter indices present in
    the group (u of them); ``P`` maps entries to local parameters (k x u).
    """

    p: int
    m: int
    base: tuple[np.ndarray, ...]
    ent_mat: np.ndarray
    ent_row: np.ndarray
    ent_col: np.ndarray
    ent_param: np.ndarray
    params: np.ndarray
    P: np.ndarray
    sel: dict


def compile_spec(spec: ModelSpec) -> tuple[GroupLayout, ...]:
    """Compile a spec into one :class:`GroupLayout` per group."""
    p, m = len(spec.items), len(spec.factors)
    out = []
    param = spec.param_index
    for g in range(len(spec.groups)):
        idx = spec.group_entries(g)
        lam = np.zeros((p, m)); beta = np.zeros((m, m)); psi = np.zeros((m, m))
        theta = np.zeros((p, p)); nu = np.zeros(p); alpha = np.zeros(m)
        base = (lam, beta, psi, theta, nu, alpha)
        fixed = idx[~spec.free[idx]]
        for k in fixed:
            mat, r, c, v = spec.matrix[k], spec.row[k], spec.col[k], spec.value[k]
            if mat > ALPHA:  # thresholds (ordinal models) are handled by their own kernels
                continue
            if mat in (NU, ALPHA):
                base[mat][r] = v
            else:
                base[mat][r, c] = v
                if mat in (PSI, THETA):
                    base[mat][c, r] = v
        fr = idx[spec.free[idx]]
        ent_param = param[fr]
        params, local = np.unique(ent_param, return_inverse=True)
        P = np.zeros((fr.size, params.size))
        P[np.arange(fr.size), local] = 1.0
        sel = {}
        for mat in range(6):
            s = spec.matrix[fr] == mat
            sel[mat] = (spec.row[fr][s], spec.col[fr][s], ent_param[s], np.flatnonzero(s))
        for b in base:
            b.setflags(write=False)
        out.append(
            GroupLayout(p, m, base, spec.matrix[fr], spec.row[fr], spec.col[fr], ent_param, params, P, sel)
        )
    return tuple(out)


def group_matrices(lay: GroupLayout, theta: np.ndarray) -> tuple[np.ndarray, ...]:
    """The six matrices (Lambda, B, Psi, Theta, nu, alpha) of a group at ``theta``."""
    mats = [b.copy() for b in lay.base]
    for mat in range(6):
        r, c, par, _ = lay.sel[mat]
        if not r.size:
            continue
        v = theta[par]
        if mat in (NU, ALPHA):
            mats[mat][r] = v
        else:
            mats[mat][r, c] = v
            if mat in (PSI, THETA):
                mats[mat][c, r] = v
    return tuple(mats)


def implied_moments(mats: tuple[np.ndarray, ...]) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Implied covariance and mean, plus G = Lambda A and A = (I - B)^-1.

    Returns
    -------
    sigma, mu, G, A
    """
    lam, beta, psi, theta, nu, alpha = mats
    m = beta.shape[0]
    A = np.linalg.inv(np.eye(m) - beta) if beta.any() else np.eye(m)
    G = lam @ A
    sigma = G @ psi @ G.T + theta
    mu = nu + G @ alpha
    return sigma, mu, G, A


def moment_jacobian(lay: GroupLayout, mats: tuple[np.ndarray, ...], G: np.ndarray, A: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Analytic derivatives of (Sigma, mu) with respect to the group's local parameters.

    Returns
    -------
    dS : (u, p, p) array
    dm : (u, p) array
    """
    lam, beta, psi, theta, nu, alpha = mats
    p = lay.p
    k = lay.ent_mat.size
    dS = np.zeros((k, p, p))
    dm = np.zeros((k, p))
    C = A @ psi @ G.T          # (m, p): d Sigma / d Lambda and d B building block
    Aa = A @ alpha             # (m,)
    # loadings
    r, c, _, pos = lay.sel[LAMBDA]
    if pos.size:
        dS[pos, r, :] += C[c, :]
        dS[pos, :, r] += C[c, :]
        dm[pos, r] = Aa[c]
    # factor regressions: dA = A E_rc A
    r, c, _, pos = lay.sel[BETA]
    if pos.size:
        v = G[:, r].T           # (n, p)
        w = C[c, :]             # (n, p)
        outer = v[:, :, None] * w[:, None, :]
        dS[pos] = outer + outer.transpose(0, 2, 1)
        dm[pos] = v * Aa[c][:, None]
    # factor (co)variances
    r, c, _, pos = lay.sel[PSI]
    if pos.size:
        gr, gc = G[:, r].T, G[:, c].T
        outer = gr[:, :, None] * gc[:, None, :]
        off = (r != c)[:, None, None]
        dS[pos] = outer + np.where(off, outer.transpose(0, 2, 1), 0.0)
    # residual (co)variances
    r, c, _, pos = lay.sel[THETA]
    if pos.size:
        dS[pos, r, c] = 1.0
        dS[pos, c, r] = 1.0
    r, _, _, pos = lay.sel[NU]
    if pos.size:
        dm[pos, r] = 1.0
    r, _, _, pos = lay.sel[ALPHA]
    if pos.size:
        dm[pos] = G[:, r].T
    # entries -> local parameters (entries sharing a label inside the group add up)
    if lay.P.shape[0] == lay.P.shape[1] and np.array_equal(lay.P, np.eye(k)):
        return dS, dm
    dS = np.tensordot(lay.P.T, dS, axes=1)
    dm = lay.P.T @ dm
    return dS, dm


def ml_discrepancy(sigma: np.ndarray, mu: np.ndarray, S: np.ndarray, mean: np.ndarray, logdet_s: float) -> float:
    """ML discrepancy F of one group (METHODS section 2); ``inf`` if Sigma is not PD."""
    try:
        R = np.linalg.cholesky(sigma)
    except np.linalg.LinAlgError:
        return np.inf
    Rinv = np.linalg.inv(R)
    W = Rinv.T @ Rinv
    d = mean - mu
    logdet = 2.0 * np.log(np.diag(R)).sum()
    return float(logdet + np.sum(S * W) - logdet_s - S.shape[0] + d @ W @ d)


def ml_derivatives(
    sigma: np.ndarray,
    mu: np.ndarray,
    S: np.ndarray,
    mean: np.ndarray,
    dS: np.ndarray,
    dm: np.ndarray,
    *,
    information: bool = True,
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray]:
    """Gradient and expected information of one group's ML discrepancy.

    Returns
    -------
    grad : (u,) array
        dF/dtheta.
    info : (u, u) array or None
        E[d2F/dtheta dtheta'] = tr(W dS_u W dS_v) + 2 dm_u' W dm_v.
    W : (p, p) array
        Sigma^-1.
    """
    R = np.linalg.cholesky(sigma)
    Rinv = np.linalg.inv(R)
    W = Rinv.T @ Rinv
    d = mean - mu
    Wd = W @ d
    Gs = W - W @ (S + np.outer(d, d)) @ W
    u = dS.shape[0]
    grad = np.tensordot(dS, Gs, axes=([1, 2], [0, 1])) - 2.0 * dm @ Wd
    info = None
    if information:
        X = (Rinv @ dS @ Rinv.T).reshape(u, -1)
        Y = dm @ Rinv.T
        info = X @ X.T + 2.0 * (Y @ Y.T)
    return grad, info, W
