"""Full-information kernels in the coordinates of the items every case observes.

Split the items into A, observed in every missingness pattern, and R, the others
(either may be empty). With P = Sigma_AA^-1, G = P Sigma_AR, Z = Sigma_RR - Sigma_RA G,
B = [-G', I] and Y_k the inverse of Z over pattern k's observed items of R (zero
elsewhere), the inverse of pattern k's block is (items ordered A, R)

    W_k = J'PJ + B'Y_kB,        J = [I, 0],

and log|Sigma_oo| = log|Sigma_AA| + log|Z_oo| (the partitioned inverse, Harville 1997,
section 8.5). Only Y_k changes from pattern to pattern, and it has |R| rows. So the
value, the gradient and the weighted sums over patterns that the expected information
and the exact Hessian need reduce to sums over the small matrices Y_k:

    sum_k n_k (x'Y_k y)(z'Y_k w) = (x (x) z)' T (y (x) w),   T = sum_k n_k Y_k (x) Y_k,

a (|R|^2 x |R|^2) matrix formed once per point, instead of sums of entrywise products
of one Gram matrix per pattern. Every function here is a pure function of arrays; the
objective in :mod:`invariance.estimate.fiml` keeps the results of one point.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from ..data.patterns import PatternMoments
from .kernels import entry_matrix, pair_products
from .linalg import factor_solve, pd_factor

__all__ = ["PatternSplit", "PatternPoint", "pattern_point", "gradient_terms", "information_terms",
           "hessian_terms"]

_LOG2PI = float(np.log(2 * np.pi))


@dataclass(frozen=True, eq=False)
class PatternSplit:
    """The data of one group in the split coordinates (items ordered A, R): fixed for
    a fit.

    Attributes
    ----------
    order, back
        Item order A then R, and its inverse permutation.
    a, r
        Sizes of A and R.
    n, N
        Cases per pattern (K,) and their total.
    const
        sum_k n_k p_k log 2pi.
    mask, eye
        (K, r, r): observed pairs of R items per pattern, and the identity on the
        unobserved items (the padding that keeps every block invertible).
    means, obs
        Pattern means (K, p) and observed items (K, p, as 0/1), in the split order.
    s_ax, s_rx, s_aa
        The rows of A and of R of the pattern covariances (K, p, p) in the split order,
        and their A x A block.
    saa_total
        sum_k n_k S_AA,k.
    """

    order: np.ndarray
    back: np.ndarray
    a: int
    r: int
    n: np.ndarray
    N: float
    const: float
    mask: np.ndarray
    eye: np.ndarray
    means: np.ndarray
    obs: np.ndarray
    saa_total: np.ndarray
    s_ax: np.ndarray
    s_rx: np.ndarray
    s_aa: np.ndarray
    #: rows of the identity in the split order (the item block of the basis)
    perm: np.ndarray

    @classmethod
    def of(cls, pm: PatternMoments) -> "PatternSplit":
        blk = pm.blocks                                   # the split A, R of the pattern statistics
        order, a, mask = blk.order, blk.n_always, blk.oo_rest
        eye = np.eye(mask.shape[1])[None] * ~mask
        covs = np.ascontiguousarray(pm.covs[:, order][:, :, order])
        n = pm.counts
        return cls(order, blk.back, a, mask.shape[1], n, float(n.sum()),
                   float(n @ (pm.observed.sum(axis=1) * _LOG2PI)), mask, eye,
                   pm.means[:, order], pm.observed[:, order].astype(float),
                   np.tensordot(n, covs[:, :a, :a], axes=1), np.ascontiguousarray(covs[:, :a]),
                   np.ascontiguousarray(covs[:, a:]), np.ascontiguousarray(covs[:, :a, :a]),
                   np.eye(order.size)[order])


@dataclass(eq=False)
class PatternPoint:
    """One group at one implied (Sigma, mu), in the split order.

    ``value`` is -2 logL; ``la`` the Cholesky factor of Sigma_AA, P (from it, on first
    use), G, Y as in the module text; d the mean residuals of the patterns (K, p),
    e = B d_k (K, r), U_k' = S_RA,k - G'S_AA,k (stored as U_k', (K, r, a)),
    E_k = B C_k B' with C_k = S_k + d_k d_k', and CA = sum_k n_k C_AA,k. The gradient
    terms are filled by :func:`gradient_terms`.
    """

    value: float
    la: np.ndarray
    G: np.ndarray
    Y: np.ndarray
    d: np.ndarray
    e: np.ndarray
    U: np.ndarray
    E: np.ndarray
    CA: np.ndarray
    #: filled by :func:`gradient_terms` and reused by the information and the Hessian:
    #: Gs and w, n_k Y_k, their sum, Y_k e_k, the bases, the Y-tensor
    more: dict = field(default_factory=dict)

    @cached_property
    def P(self) -> np.ndarray:
        """Sigma_AA^-1."""
        return factor_solve(self.la, np.eye(self.la.shape[0])) if self.la.size else self.la


def pattern_point(sp: PatternSplit, sigma: np.ndarray, mu: np.ndarray) -> PatternPoint:
    """-2 logL of one group and the pieces its derivatives reuse.

    -2 logL = sum_k n_k [p_k log 2pi + log|Sigma_oo| + tr(W_k C_k)] with
    sum_k n_k tr(W_k C_k) = tr(P CA) + sum_k n_k tr(Y_k E_k).

    Raises
    ------
    numpy.linalg.LinAlgError
        When Sigma_AA or some pattern's Z_oo (so some Sigma_oo) is not positive definite.
    """
    o, a = sp.order, sp.a
    c = sigma.take(o, 0).take(o, 1)
    la, logdet_a = pd_factor(c[:a, :a]) if a else (np.zeros((0, 0)), 0.0)
    G = factor_solve(la, c[:a, a:]) if a else np.zeros((0, sp.r))
    Z = c[a:, a:] - c[:a, a:].T @ G
    pad = np.where(sp.mask, (Z + Z.T) / 2, sp.eye)
    logdet = 2.0 * np.log(np.diagonal(np.linalg.cholesky(pad), axis1=1, axis2=2)).sum(axis=1)
    Y = np.linalg.inv(pad)
    Y *= sp.mask
    d = (sp.means - mu[o]) * sp.obs
    dA = d[:, :a]
    e = d[:, a:] - dA @ G
    bs = sp.s_rx - G.T @ sp.s_ax                                # B S_k, rows of R
    U = bs[:, :, :a]
    E = bs[:, :, a:] - U @ G + e[:, :, None] * e[:, None, :]
    CA = sp.saa_total + (dA.T * sp.n) @ dA
    trace_a = float(np.trace(factor_solve(la, CA))) if a else 0.0          # tr(P CA)
    value = (sp.const + sp.N * logdet_a + float(sp.n @ logdet) + trace_a
             + float(np.einsum("k,kij,kij->", sp.n, Y, E)))
    return PatternPoint(value, la, G, Y, d, e, U, E, CA)


def _wsum(n: np.ndarray, X: np.ndarray) -> np.ndarray:
    """sum_k n_k X_k over the leading axis (one matrix product)."""
    return (n @ X.reshape(X.shape[0], -1)).reshape(X.shape[1:])


def _blocks(sp: PatternSplit, aa: np.ndarray, ar: np.ndarray, rr: np.ndarray) -> np.ndarray:
    """The symmetric p x p matrix [[aa, ar], [ar', rr]] in the split order."""
    out = np.empty((sp.a + sp.r, sp.a + sp.r))
    out[:sp.a, :sp.a], out[:sp.a, sp.a:] = aa, ar
    out[sp.a:, :sp.a], out[sp.a:, sp.a:] = ar.T, rr
    return out


def gradient_terms(sp: PatternSplit, pt: PatternPoint) -> tuple[np.ndarray, np.ndarray]:
    """Gs = sum_k n_k (W_k - W_k C_k W_k) and w = sum_k n_k W_k d_k, in the original item
    order (the gradient of -2 logL is tr(Gs dSigma) - 2 w' dmu).

    With Ybar = sum n_k Y_k, Xi = sum n_k Y_k E_k Y_k, F = sum n_k (U_k + dA_k e_k') Y_k
    and Phi = P F: sum n_k W_k C_k W_k = J'P CA P J + J'Phi B + B'Phi'J + B'Xi B.
    """
    if "Gs" in pt.more:
        return pt.more["Gs"], pt.more["w"]
    n, a, P, G, Y = sp.n, sp.a, pt.P, pt.G, pt.Y
    K, r = Y.shape[:2]
    dA = pt.d[:, :a]
    ny = Y * n[:, None, None]
    ybar = ny.sum(axis=0)
    yey = Y @ pt.E @ Y
    xi = _wsum(n, yey)
    h = (Y @ pt.e[:, :, None])[:, :, 0]                          # Y_k e_k
    phi = P @ (pt.U.reshape(K * r, a).T @ ny.reshape(K * r, r) + (dA.T * n) @ h)
    yt = ybar - xi
    gyt = G @ yt
    pg = phi @ G.T
    gs = _blocks(sp, sp.N * P - P @ pt.CA @ P + gyt @ G.T + pg + pg.T, -gyt - phi, yt)
    ebar = n @ h
    w = np.concatenate([P @ (n @ dA) - G @ ebar, ebar])
    back = sp.back
    pt.more.update(ny=ny, ybar=ybar, h=h, yey=yey, Gs=gs.take(back, 0).take(back, 1), w=w.take(back))
    return pt.more["Gs"], pt.more["w"]


def _bases(sp: PatternSplit, pt: PatternPoint, H: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(L, Q0): L = T Ko = [KA; V] for the basis Ko = [I | H] in the split order (KA its
    rows of A, V = B Ko) and Q0 = KA' P KA."""
    if "L" not in pt.more:
        p, a = sp.perm.shape[0], sp.a
        lam = np.empty((p, p + H.shape[1]))
        lam[:, :p] = sp.perm
        lam[:, p:] = H.take(sp.order, 0)
        lam[a:] -= pt.G.T @ lam[:a]
        pt.more.update(L=lam, Q0=lam[:a].T @ pt.P @ lam[:a])
    return pt.more["L"], pt.more["Q0"]


def _y_tensor(sp: PatternSplit, pt: PatternPoint) -> np.ndarray:
    """T[(x, y), (z, w)] = sum_k n_k Y_k[x, z] Y_k[y, w]."""
    if "T" not in pt.more:
        r = sp.r
        yf = pt.Y.reshape(pt.Y.shape[0], r * r)
        t0 = (yf.T * sp.n) @ yf
        pt.more["T"] = t0.reshape(r, r, r, r).transpose(0, 2, 1, 3).reshape(r * r, r * r)
    return pt.more["T"]


def information_terms(sp: PatternSplit, pt: PatternPoint, fj) -> tuple[np.ndarray, np.ndarray]:
    """(cov, mean) of the expected information: over the entries with a covariance part
    (``fj.flat``), cov[u, v] = sum_k n_k (Q_k[a_u, a_v] Q_k[b_u, b_v] + Q_k[a_u, b_v]
    Q_k[b_u, a_v]); over all free entries mean[u, v] = Qbar[c_u, c_v]; Qbar = sum_k n_k Q_k
    with Q_k = K'W_kK = Q0 + V'Y_kV.

    The cross terms with Q0 are single-matrix products; the Y part is
    Phi T (Phi + Phi~)' with Phi_u = v_{a_u} (x) v_{b_u}, Phi~_u = v_{b_u} (x) v_{a_u}.
    """
    if "cov" in pt.more:
        return pt.more["cov"], pt.more["mean"]
    gradient_terms(sp, pt)
    lam, Q0 = _bases(sp, pt, fj.H)
    V = lam[sp.a:]
    N, u = sp.N, fj.flat["cs"].size
    rbar = V.T @ pt.more["ybar"] @ V
    qbar = N * Q0 + rbar
    # N S(Q0, Q0) + S(Q0, Rbar) + S(Rbar, Q0), S(X, Y) = X_aa Y_bb + X_ab Y_ba
    cov = pair_products(Q0, 0.5 * N * Q0 + rbar, fj)
    va, vb = V[:, fj.flat["a"]].T, V[:, fj.flat["b"]].T
    phi = (va[:, :, None] * vb[:, None, :]).reshape(u, sp.r * sp.r)
    phit = (vb[:, :, None] * va[:, None, :]).reshape(u, sp.r * sp.r)
    cov += phi @ _y_tensor(sp, pt) @ (phi + phit).T
    mean = qbar.take(fj.flat["cc"])
    pt.more.update(cov=cov, mean=mean)
    return cov, mean


def hessian_terms(sp: PatternSplit, pt: PatternPoint, fj) -> np.ndarray:
    """First-derivative part of the exact Hessian of -2 logL over free entries (as
    :func:`~invariance.estimate.kernels.factored_moment_hessian` with pattern weights).

    cross = sum_k n_k [QM_k(b_u, a_v) Q_k(a_u, b_v) + QM_k(b_u, b_v) Q_k(a_u, a_v)
    + QM_k(a_u, a_v) Q_k(b_u, b_v) + QM_k(a_u, b_v) Q_k(b_u, a_v)] with QM_k = K'M_kK,
    M_k = W_k C_k W_k = T'M~_kT (:func:`_split_products`), so QM_k(i, j) =
    l_i' M~_k l_j with l_i the columns of L = T Ko = [KA; V]. Its Q0 part needs
    sum_k n_k M~_k only; its Y part is Psi N Psi' with N = sum_k n_k M~_k (x) Y_k and
    Psi_u = l_{b_u} (x) v_{a_u} + l_{a_u} (x) v_{b_u}.
    """
    cov, mean = information_terms(sp, pt, fj)
    lam, Q0 = _bases(sp, pt, fj.H)
    m = pt.more
    u, p, r, a, K = fj.flat["cs"].size, lam.shape[0], sp.r, sp.a, pt.Y.shape[0]
    ea, eb = fj.flat["a"], fj.flat["b"]
    V = lam[a:]
    mt = _split_products(sp, pt)
    cross = pair_products(Q0, lam.T @ _wsum(sp.n, mt) @ lam, fj)
    n0 = (mt.reshape(K, p * p).T * sp.n) @ pt.Y.reshape(K, r * r)
    nt = n0.reshape(p, p, r, r).transpose(0, 2, 1, 3).reshape(p * r, p * r)
    la, lb = lam[:, ea].T, lam[:, eb].T
    va, vb = V[:, ea].T, V[:, eb].T
    psi = (lb[:, :, None] * va[:, None, :] + la[:, :, None] * vb[:, None, :]).reshape(u, p * r)
    cross += psi @ nt @ psi.T
    # sum_k n_k (Q_k[a_u, c_v] kw_k[b_u] + Q_k[b_u, c_v] kw_k[a_u]), kw_k = Ko' W_k d_k
    kw = (pt.d[:, :a] @ pt.P) @ lam[:a] + m["h"] @ V
    kwbar = sp.n @ kw
    qc = Q0.take(fj.ic, 1)
    yh = qc.take(ea, 0) * kwbar[eb][:, None] + qc.take(eb, 0) * kwbar[ea][:, None]
    # its Y part: S[b_u, a_u, v] + S[a_u, b_u, v], S[l, i, v] = sum_k n_k kw_k[l] v_i' Y_k v_{c_v}
    nb = kw.shape[1]
    yv = m["ny"] @ V.take(fj.ic, 1)                                     # (K, r, k)
    k = fj.ic.size
    S = (V.T @ (kw.T @ yv.reshape(K, -1)).reshape(nb, r, k)).reshape(nb * nb, k)
    yh += S.take(eb * nb + ea, 0) + S.take(ea * nb + eb, 0)
    return entry_matrix(fj, cross - cov, mean, yh)


def _split_products(sp: PatternSplit, pt: PatternPoint) -> np.ndarray:
    """M~_k = D_k (T C_k T') D_k (K, p, p) with D_k = diag(P, Y_k), T = [[I, 0], [-G', I]]:
    [[P C_AA,k P, P (U_k + dA_k e_k') Y_k], [., Y_k E_k Y_k]]; W_k = T'D_kT, so
    W_k C_k W_k = T'M~_kT."""
    a, P, m = sp.a, pt.P, pt.more
    g = pt.d[:, :a] @ P                                                # P dA_k
    ft = (pt.Y @ pt.U) @ P + m["h"][:, :, None] * g[:, None, :]         # F_k' = Y_k (U_k' + e_k dA_k') P
    out = np.empty((pt.Y.shape[0], sp.a + sp.r, sp.a + sp.r))
    out[:, :a, :a] = P @ sp.s_aa @ P + g[:, :, None] * g[:, None, :]
    out[:, a:, :a] = ft
    out[:, :a, a:] = ft.transpose(0, 2, 1)
    out[:, a:, a:] = m["yey"]
    return out
