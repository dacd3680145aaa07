"""Numerical kernels of the all-indicator model: pure functions of arrays.

Nothing here knows about labels, pandas or files. A :class:`GroupLayout` is the compiled
form of one group's entries of a :class:`~invariance.model.ModelSpec`; the functions
build the group's matrices from a parameter vector, the implied moments and their analytic
Jacobian, dense or factored (METHODS section 1). The ML discrepancy and its derivatives
built on them are in :mod:`invariance.estimate.ml_kernels`.

Conventions: ``dS`` arrays have shape (u, p, p) (one symmetric matrix per local
parameter), ``dm`` arrays shape (u, p).
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass

import numpy as np

from ..model.spec import ALPHA, BETA, LAMBDA, NU, PSI, THETA, ModelSpec

__all__ = [
    "GroupLayout",
    "compile_spec",
    "group_matrices",
    "implied_moments",
    "moment_jacobian",
    "layout_jacobians",
    "FactoredJacobian",
    "factor_jacobian",
    "gram",
    "factored_gradient",
    "factored_information",
    "factored_moment_hessian",
    "pair_products",
    "entry_matrix",
    "to_params",
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
        for mat in range(6):  # thresholds (ordinal models) are handled by their own kernels
            k = fixed[spec.matrix[fixed] == mat]
            r, c, v = spec.row[k], spec.col[k], spec.value[k]
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


def layout_jacobians(layouts, theta: np.ndarray) -> list[tuple]:
    """Per group: (matrices, Sigma, mu, dS, dm) at ``theta``, over each group's local parameters."""
    out = []
    for lay in layouts:
        mats = group_matrices(lay, theta)
        sigma, mu, G, A = implied_moments(mats)
        dS, dm = moment_jacobian(lay, mats, G, A)
        out.append((mats, sigma, mu, dS, dm))
    return out


# -- factored derivatives: every dSigma is a symmetric rank-2 term ------------------------

@dataclass(frozen=True, eq=False)
class FactoredJacobian:
    """The moment Jacobian of one group without building (u, p, p) arrays.

    Every free entry e has dSigma_e = s_e (a_e b_e' + b_e a_e') and dmu_e = t_e c_e,
    with a_e, b_e, c_e columns of the basis K = [I_p | G | C'] (G = Lambda A,
    C = A Psi G'): a loading (i, j) has a = e_i, b = C_j'; a factor regression (i, j)
    a = G_i, b = C_j'; a factor (co)variance (i, j) a = G_i, b = G_j; a residual
    (co)variance (i, j) a = e_i, b = e_j (s = 1/2 on diagonals); intercepts and factor
    means have t = 1. Contractions with any p x p matrix X then need only the small
    Gram matrix K'XK, gathered by index: the cost per group grows as p^2 (the item
    block of K is the identity and is never multiplied).

    Attributes
    ----------
    H
        (p, 2m): the non-identity columns [G | C'] of the basis.
    ia, ib, ic
        (k,) basis columns of a_e, b_e, c_e.
    s, t
        (k,) scale of the covariance and mean parts (0 where an entry has none).
    P
        Entries -> local parameters (k x u), or ``None`` when it is the identity.
    flat
        Index arrays fixed by the layout: ``cs`` the entries with a covariance part
        (s != 0; intercepts and factor means have none), ``a``, ``b`` their basis
        columns; flat positions in an n x n Gram matrix (n the basis size): ``ab`` and
        ``ba`` gather X[[a, b]][:, [a, b]] and X[[b, a]][:, [b, a]] over those entries
        (:func:`pair_products`), ``cc`` gathers X[c][:, c] over all entries; ``cs_flat``
        the positions of the cs x cs block in a k x k matrix over entries.
    """

    H: np.ndarray
    ia: np.ndarray
    ib: np.ndarray
    ic: np.ndarray
    s: np.ndarray
    t: np.ndarray
    P: np.ndarray | None
    flat: dict


def _factor_pattern(lay: GroupLayout) -> tuple[np.ndarray, ...]:
    """The theta-free part of a group's factored Jacobian: (ia, ib, ic, s, t0, tsrc, ident)."""
    p, m = lay.p, lay.m
    k = lay.ent_mat.size
    ia, ib, ic = np.zeros(k, np.int64), np.zeros(k, np.int64), np.zeros(k, np.int64)
    s, t0, tsrc = np.zeros(k), np.zeros(k), np.full(k, -1, np.int64)
    gcol, ccol = p, p + m                                   # offsets of the G and C' blocks
    r, c, _, pos = lay.sel[LAMBDA]
    ia[pos], ib[pos], s[pos], ic[pos], tsrc[pos] = r, ccol + c, 1.0, r, c
    r, c, _, pos = lay.sel[BETA]
    ia[pos], ib[pos], s[pos], ic[pos], tsrc[pos] = gcol + r, ccol + c, 1.0, gcol + r, c
    r, c, _, pos = lay.sel[PSI]
    ia[pos], ib[pos], s[pos] = gcol + r, gcol + c, np.where(r == c, 0.5, 1.0)
    r, c, _, pos = lay.sel[THETA]
    ia[pos], ib[pos], s[pos] = r, c, np.where(r == c, 0.5, 1.0)
    r, _, _, pos = lay.sel[NU]
    ic[pos], t0[pos] = r, 1.0
    r, _, _, pos = lay.sel[ALPHA]
    ic[pos], t0[pos] = gcol + r, 1.0
    ident = lay.P.shape[0] == lay.P.shape[1] and np.array_equal(lay.P, np.eye(k))
    n = p + 2 * m
    cs = np.flatnonzero(s != 0)
    a, b = ia[cs], ib[cs]
    ab, ba = np.concatenate([a, b]), np.concatenate([b, a])
    flat = {key: v[:, None] * n + v[None, :] for key, v in (("ab", ab), ("ba", ba), ("cc", ic))}
    flat.update(cs=cs, a=a, b=b, cs_flat=(cs[:, None] * k + cs[None, :]).ravel())
    return ia, ib, ic, s, t0, tsrc, ident, flat


_PATTERNS: "weakref.WeakKeyDictionary[GroupLayout, tuple]" = weakref.WeakKeyDictionary()


def factor_jacobian(lay: GroupLayout, mats: tuple[np.ndarray, ...], G: np.ndarray, A: np.ndarray) -> FactoredJacobian:
    """The :class:`FactoredJacobian` of one group at its matrices (see :func:`moment_jacobian`)."""
    pat = _PATTERNS.get(lay)
    if pat is None:
        pat = _PATTERNS[lay] = _factor_pattern(lay)
    ia, ib, ic, s, t0, tsrc, ident, flat = pat
    C = A @ mats[2] @ G.T
    Aa = A @ mats[5]
    t = np.where(tsrc >= 0, Aa[tsrc], t0)
    return FactoredJacobian(np.hstack([G, C.T]), ia, ib, ic, s, t, None if ident else lay.P, flat)


def gram(H: np.ndarray, X: np.ndarray) -> np.ndarray:
    """K'XK for K = [I | H] and a symmetric p x p matrix X (the identity block of K is
    never multiplied: the cost grows as p^2)."""
    p = X.shape[0]
    XH = X @ H
    out = np.empty((p + H.shape[1], p + H.shape[1]))
    out[:p, :p] = X
    out[:p, p:] = XH
    out[p:, :p] = XH.T
    out[p:, p:] = H.T @ XH
    return out


def to_params(fj: FactoredJacobian, g: np.ndarray | None, M: np.ndarray | None):
    """Map a gradient ``g`` and a matrix ``M`` over free entries to parameters (P' g, P' M P)."""
    if fj.P is None:
        return g, M
    return (None if g is None else fj.P.T @ g), (None if M is None else fj.P.T @ M @ fj.P)


def factored_gradient(fj: FactoredJacobian, Gs: np.ndarray, w: np.ndarray) -> np.ndarray:
    """tr(Gs dSigma_u) - 2 dmu_u' w for every local parameter u."""
    Q = gram(fj.H, Gs)
    kw = np.concatenate([w, fj.H.T @ w])
    g = 2.0 * fj.s * Q[fj.ia, fj.ib] - 2.0 * fj.t * kw[fj.ic]
    return to_params(fj, g, None)[0]


def pair_products(X: np.ndarray, Y: np.ndarray, fj: FactoredJacobian) -> np.ndarray:
    """X[a_u, a_v] Y[b_u, b_v] + X[a_u, b_v] Y[b_u, a_v] + X[b_u, a_v] Y[a_u, b_v]
    + X[b_u, b_v] Y[a_u, a_v] for every pair (u, v) of the entries with a covariance part
    (``fj.flat``): the four blocks of X[[a, b]][:, [a, b]] times Y[[b, a]][:, [b, a]],
    summed (two flat gathers)."""
    u = fj.flat["cs"].size
    P = X.take(fj.flat["ab"]) * Y.take(fj.flat["ba"])
    Q = P[:u] + P[u:]
    return Q[:, :u] + Q[:, u:]


def entry_matrix(fj: FactoredJacobian, cov: np.ndarray, mean: np.ndarray, cross: np.ndarray | None = None) -> np.ndarray:
    """2 (s s' cov + t t' mean + s t' cross + (s t' cross)') over free entries, with
    ``cov`` (and the rows of ``cross``) over the entries with a covariance part only."""
    s, t, cs = fj.s, fj.t, fj.flat["cs"]
    sc = 2.0 * s[cs]
    out = (2.0 * t)[:, None] * t[None, :] * mean
    out.ravel()[fj.flat["cs_flat"]] += (sc[:, None] * s[cs][None, :] * cov).ravel()
    if cross is not None:
        ys = sc[:, None] * t[None, :] * cross
        out[cs] += ys
        out[:, cs] += ys.T
    return out


def factored_information(fj: FactoredJacobian, QW: np.ndarray) -> np.ndarray:
    """Expected information tr(W S_u W S_v) + 2 mu_u' W mu_v from the Gram matrix QW = K'WK.

    (Full-information ML sums it over missingness patterns in
    :mod:`invariance.estimate.fiml_kernels`.)
    """
    info = entry_matrix(fj, 0.5 * pair_products(QW, QW, fj), QW.take(fj.flat["cc"]))
    return to_params(fj, None, info)[1]


def factored_moment_hessian(fj: FactoredJacobian, QW: np.ndarray, QM: np.ndarray, kw: np.ndarray) -> np.ndarray:
    """First-derivative part of the exact Hessian of F, per entry (not yet mapped by P)::

        -tr(W S_u W S_v) + 2 tr(W S_u M S_v) + 2 mu_v' W S_u w + 2 mu_u' W S_v w + 2 mu_u' W mu_v

    with M = W C W, w = W d; ``QW`` = K'WK, ``QM`` = K'MK, ``kw`` = K'w.
    """
    a, b = fj.flat["a"], fj.flat["b"]
    Wc = QW.take(fj.ic, 1)
    Y = Wc.take(a, 0) * kw[b][:, None] + Wc.take(b, 0) * kw[a][:, None]
    return entry_matrix(fj, pair_products(QW, QM - 0.5 * QW, fj), QW.take(fj.flat["cc"]), Y)
