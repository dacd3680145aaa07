"""Thresholds, polychoric correlations and their asymptotic covariance for one group.

Pure array kernels (METHODS section 7). Input is an integer code matrix (n, p) with
item i coded 0 .. K_i - 1 and every code observed (see
:mod:`invariance.ordinal.categories` for the checks with item and group names).

* Thresholds: tau_ik = Phi^-1(P(x_i <= k)), from the marginal proportions.
* Polychoric correlation of each pair: the two-step pairwise ML of Olsson (1979),
  thresholds held at their marginal estimates; Fisher scoring on rho, all pairs at once
  (cell probabilities from :func:`invariance.ordinal.bivariate.bvn_cdf` on every
  threshold grid point of every pair in one call).
* Asymptotic covariance of (thresholds, correlations) from casewise influence values
  (Muthen 1984; Muthen & Satorra 1995): the threshold influence is
  (1[x_i <= k] - pi_ik) / phi(tau_ik); the correlation influence is
  I_rho^-1 [s_c + H_rho,tau IF_tau,c], with s_c the case's score for rho, I_rho the
  expected information per case and H_rho,tau = -sum_cells (dP/drho)(dP/dtau) / P the
  expected cross derivative of the score. ACOV = sum_c IF_c IF_c' / N^2.

The statistic vector orders all thresholds first (item by item, k = 1 .. K_i - 1), then
the correlations of the pairs (i, j), i < j, in ``numpy.triu_indices(p, 1)`` order.
"""

from __future__ import annotations

from contextlib import nullcontext
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtri

from ..errors import DataError, EstimationError
from .bivariate import BIG, bvn_cdf, bvn_dcdf_dh, bvn_pdf

try:  # small matrix products: BLAS threads only cost time (and thrash a shared machine)
    from threadpoolctl import threadpool_limits as _limits
except ImportError:  # pragma: no cover
    _limits = None


def _single_thread():
    return _limits(limits=1, user_api="blas") if _limits is not None else nullcontext()

__all__ = [
    "PolychoricFit",
    "marginal_thresholds",
    "pair_tables",
    "cell_probabilities",
    "polychoric_pairs",
    "polychoric",
]

_RHO_MAX = 0.9999


@dataclass(frozen=True, eq=False)
class PolychoricFit:
    """Thresholds and polychoric correlations of one group, with their ACOV.

    Attributes
    ----------
    n
        Cases used.
    n_categories
        Categories per item, shape (p,).
    thresholds
        Shape (p, Kmax - 1); entries beyond an item's K_i - 1 thresholds are ``nan``.
    corr
        Polychoric correlation matrix (p, p), unit diagonal.
    pairs
        (i, j) index arrays of the pairs, ``numpy.triu_indices(p, 1)`` order.
    stats
        The statistic vector: thresholds, then correlations (see module docstring).
    acov
        Asymptotic covariance of ``stats`` (already divided by ``n``).
    influence
        Casewise influence values (n, len(stats)); ``acov = influence' influence / n^2``.
    iterations
        Scoring iterations used by the correlations.
    continuous
        Mixed statistics only: (p,) booleans marking continuous items, whose means and
        variances follow the thresholds in ``stats`` (``None``: all items ordered).
    """

    n: int
    n_categories: np.ndarray
    thresholds: np.ndarray
    corr: np.ndarray
    pairs: tuple[np.ndarray, np.ndarray]
    stats: np.ndarray
    acov: np.ndarray
    influence: np.ndarray
    iterations: int
    continuous: np.ndarray | None = None

    @property
    def n_thresholds(self) -> int:
        return int(np.sum(self.n_categories - 1))

    @property
    def n_continuous(self) -> int:
        """Continuous items (mixed statistics, :mod:`invariance.ordinal.polyserial`)."""
        return 0 if self.continuous is None else int(np.sum(self.continuous))

    @property
    def corr_start(self) -> int:
        """Index of the first correlation in ``stats``."""
        return self.n_thresholds + 2 * self.n_continuous


def marginal_thresholds(codes: np.ndarray, n_categories: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Thresholds from cumulative marginal proportions.

    Returns
    -------
    tau : (p, Kmax - 1) array, ``nan`` padded
    cum : (p, Kmax - 1) array of cumulative proportions P(x_i <= k), ``nan`` padded
    """
    n, p = codes.shape
    kmax = int(n_categories.max())
    counts = np.zeros((p, kmax))
    for i in range(p):
        counts[i] = np.bincount(codes[:, i], minlength=kmax)[:kmax]
    cum = np.cumsum(counts, axis=1)[:, :-1] / n
    valid = np.arange(kmax - 1)[None, :] < (n_categories - 1)[:, None]
    if np.any(counts[:, :kmax][np.arange(kmax)[None, :] < n_categories[:, None]] == 0):
        raise DataError("A category has no responses; check the categories before computing thresholds.")
    cum = np.where(valid, cum, np.nan)
    return ndtri(cum), cum


def _extended(tau: np.ndarray, n_categories: np.ndarray) -> np.ndarray:
    """(p, Kmax + 1) limits: -BIG, tau_1 .. tau_{K-1}, then +BIG (padding included)."""
    p, km1 = tau.shape
    ext = np.full((p, km1 + 2), BIG)
    ext[:, 0] = -BIG
    ext[:, 1:-1] = np.where(np.isnan(tau), BIG, tau)
    return ext


def pair_tables(codes: np.ndarray, kmax: int, pairs: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    """Contingency tables of all pairs at once, shape (n_pairs, Kmax, Kmax)."""
    i, j = pairs
    npair = i.size
    flat = (np.arange(npair)[None, :] * kmax * kmax + codes[:, i] * kmax + codes[:, j]).ravel()
    return np.bincount(flat, minlength=npair * kmax * kmax).reshape(npair, kmax, kmax).astype(float)


def cell_probabilities(
    lim_i: np.ndarray, lim_j: np.ndarray, rho: np.ndarray, *, derivatives: bool = False
):
    """Cell probabilities of the bivariate normal over threshold grids, all pairs at once.

    Parameters
    ----------
    lim_i, lim_j
        (n_pairs, K + 1) limits (first -BIG, last +BIG).
    rho
        (n_pairs,) correlations.
    derivatives
        Also return dP/drho and the threshold derivatives.

    Returns
    -------
    P : (n_pairs, K, K)
    dP : (n_pairs, K, K), only with ``derivatives``
    Gi, Gj : (n_pairs, K + 1, K + 1), only with ``derivatives``: dF/dh and dF/dk of the
        CDF grid F[a, b] = Phi2(lim_i[a], lim_j[b]).
    """
    h = lim_i[:, :, None]
    k = lim_j[:, None, :]
    r = rho[:, None, None]
    F = bvn_cdf(h, k, r)
    P = np.diff(np.diff(F, axis=1), axis=2)
    P = np.clip(P, 0.0, None)
    if not derivatives:
        return P
    f = bvn_pdf(h, k, r)
    dP = np.diff(np.diff(f, axis=1), axis=2)
    Gi = bvn_dcdf_dh(h, k, r)
    Gj = bvn_dcdf_dh(k, h, r)
    return P, dP, Gi, Gj


def polychoric_pairs(
    tables: np.ndarray,
    lim_i: np.ndarray,
    lim_j: np.ndarray,
    *,
    start: np.ndarray | None = None,
    tol: float = 1e-10,
    max_iter: int = 100,
) -> tuple[np.ndarray, int]:
    """Pairwise ML correlations with thresholds fixed (Olsson 1979, two-step).

    Fisher scoring on rho, vectorized over pairs; one evaluation of the cell
    probabilities (and their rho derivatives) per iteration. A step that lowers a
    pair's likelihood is halved for that pair.

    Returns
    -------
    rho : (n_pairs,) array
    iterations : int
    """
    npair = tables.shape[0]
    n = tables.sum(axis=(1, 2))
    rho = np.zeros(npair) if start is None else np.clip(np.asarray(start, float), -0.95, 0.95)
    prev_rho = rho.copy()
    prev_ll = np.full(npair, -np.inf)
    step = np.zeros(npair)
    active = np.ones(npair, dtype=bool)
    halvings = np.zeros(npair, dtype=int)
    for it in range(1, max_iter + 1):
        P = cell_probabilities(lim_i, lim_j, rho)
        f = bvn_pdf(lim_i[:, :, None], lim_j[:, None, :], rho[:, None, None])
        dP = np.diff(np.diff(f, axis=1), axis=2)
        pos = P > 0
        Ps = np.where(pos, P, 1.0)
        with np.errstate(invalid="ignore"):
            ll = np.where(tables > 0, tables * np.where(pos, np.log(Ps), -np.inf), 0.0).sum(axis=(1, 2))
        worse = active & (ll < prev_ll - 1e-12 * np.abs(prev_ll)) & (halvings < 30)
        if worse.any():
            # back-track the pairs whose likelihood fell, keep the others
            step = np.where(worse, step / 2.0, step)
            halvings = np.where(worse, halvings + 1, halvings)
            rho = np.where(worse, np.clip(prev_rho + step, -_RHO_MAX, _RHO_MAX), rho)
            continue
        halvings[:] = 0
        score = np.where(pos, tables * dP / Ps, 0.0).sum(axis=(1, 2))
        info = n * np.where(pos, dP * dP / Ps, 0.0).sum(axis=(1, 2))
        step = np.where(active, score / np.maximum(info, 1e-300), 0.0)
        # a pair pushed against |rho| = _RHO_MAX stays there (reported by the caller)
        edge = (np.abs(rho) >= _RHO_MAX - 1e-12) & (np.sign(step) == np.sign(rho))
        active &= (np.abs(step) >= tol) & ~edge
        if not active.any():
            return rho, it
        prev_rho, prev_ll = rho, ll
        rho = np.clip(rho + step, -_RHO_MAX, _RHO_MAX)
    raise EstimationError(
        f"Polychoric correlations did not converge in {max_iter} iterations; "
        "check for items with nearly empty categories and merge them."
    )


def polychoric(codes: np.ndarray, n_categories) -> PolychoricFit:
    """Thresholds, polychoric correlations and their asymptotic covariance.

    Parameters
    ----------
    codes
        (n, p) integer array, item i coded 0 .. K_i - 1, complete cases, every code observed.
    n_categories
        K_i per item.

    Returns
    -------
    PolychoricFit
    """
    with _single_thread():
        return _polychoric(codes, n_categories)


def _polychoric(codes, n_categories) -> PolychoricFit:
    codes = np.asarray(codes)
    if not np.issubdtype(codes.dtype, np.integer):
        codes = codes.astype(np.int64)
    K = np.asarray(n_categories, dtype=np.int64)
    n, p = codes.shape
    kmax = int(K.max())
    tau, cum = marginal_thresholds(codes, K)
    ext = _extended(tau, K)
    pairs = np.triu_indices(p, 1)
    i, j = pairs
    tables = pair_tables(codes, kmax, pairs)
    # start: Pearson correlation of the codes (a slight underestimate; scoring fixes it)
    x = codes.astype(float)
    xc = x - x.mean(axis=0)
    sd = np.sqrt((xc * xc).mean(axis=0))
    pear = (xc.T @ xc / n) / np.outer(sd, sd)
    rho, iters = polychoric_pairs(tables, ext[i], ext[j], start=pear[i, j])
    corr = np.eye(p)
    corr[i, j] = rho
    corr[j, i] = rho
    infl = _influence(codes, K, tau, cum, ext, pairs, rho)
    valid = ~np.isnan(tau)
    stats = np.concatenate([tau[valid], rho])
    acov = infl.T @ infl / (n * n)
    return PolychoricFit(n, K, tau, corr, pairs, stats, acov, infl, iters)


def _influence(codes, K, tau, cum, ext, pairs, rho) -> np.ndarray:
    """Casewise influence values of (thresholds, correlations), shape (n, q)."""
    n, p = codes.shape
    i, j = pairs
    npair = i.size
    kmax = int(K.max())
    valid = ~np.isnan(tau)                       # (p, Kmax-1)
    nt = int(valid.sum())
    # threshold index of (item, k) in the statistic vector
    tix = np.full(tau.shape, -1)
    tix[valid] = np.arange(nt)
    # thresholds: (1[x <= k] - pi_k) / phi(tau_k)
    ind = (codes[:, :, None] <= np.arange(kmax - 1)[None, None, :]).astype(float)
    dens = np.exp(-np.where(valid, tau, 0.0) ** 2 / 2.0) / np.sqrt(2.0 * np.pi)
    if_tau = (ind - np.where(valid, cum, 0.0)[None]) / np.where(valid, dens, 1.0)[None]
    if_tau = if_tau[:, valid]                    # (n, nt), item-major order
    # correlations
    P, dP, Gi, Gj = cell_probabilities(ext[i], ext[j], rho, derivatives=True)
    pos = P > 0
    Ps = np.where(pos, P, 1.0)
    ratio = np.where(pos, dP / Ps, 0.0)          # d log P / d rho per cell
    info = np.where(pos, dP * dP / Ps, 0.0).sum(axis=(1, 2))   # per case
    s_case = ratio[np.arange(npair)[None, :], codes[:, i], codes[:, j]]   # (n, npair)
    # dP_ab / d tau_i,t for t = 1 .. K-1: F grid rows a = t; P_ab uses rows a+1 (+) and a (-)
    # column differences of Gi give dF-row contributions per cell column b
    dGi = np.diff(Gi, axis=2)                    # (npair, K+1, K): d/dh of [F(a,b+1)-F(a,b)]
    dGj = np.diff(Gj, axis=1)                    # (npair, K, K+1)
    H_i = np.zeros((npair, kmax - 1))
    H_j = np.zeros((npair, kmax - 1))
    for t in range(1, kmax):
        # cells with a + 1 == t get +dGi[t], cells with a == t get -dGi[t]
        dp_t = np.zeros((npair, kmax, kmax))
        dp_t[:, t - 1, :] += dGi[:, t, :]
        dp_t[:, t, :] -= dGi[:, t, :]
        H_i[:, t - 1] = -(ratio * dp_t).sum(axis=(1, 2))
        dq_t = np.zeros((npair, kmax, kmax))
        dq_t[:, :, t - 1] += dGj[:, :, t]
        dq_t[:, :, t] -= dGj[:, :, t]
        H_j[:, t - 1] = -(ratio * dq_t).sum(axis=(1, 2))
    # combine: IF_rho = (s + H_i . IF_tau_i + H_j . IF_tau_j) / info
    if_full = np.zeros((n, p, kmax - 1))
    if_full[:, valid] = if_tau
    vi = valid[i]                                # (npair, Kmax-1)
    vj = valid[j]
    corr_term = np.einsum("nqk,qk->nq", if_full[:, i, :], np.where(vi, H_i, 0.0))
    corr_term += np.einsum("nqk,qk->nq", if_full[:, j, :], np.where(vj, H_j, 0.0))
    if_rho = (s_case + corr_term) / info[None, :]
    return np.concatenate([if_tau, if_rho], axis=1)
