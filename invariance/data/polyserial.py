"""Statistics of a mix of ordered and continuous items for one group: pure array kernels.

Ordered items contribute thresholds and polychoric correlations
(:mod:`invariance.ordinal.polychoric`); continuous items contribute their mean, their
variance (divisor N) and Pearson correlations; a continuous-ordered pair contributes the
two-step polyserial correlation (Olsson, Drasgow & Dorans 1982): with z the standardized
continuous item and the ordered item's thresholds from its marginal proportions, rho
maximizes sum_c log[Phi((tau_{y+1} - rho z) / r) - Phi((tau_y - rho z) / r)], r =
sqrt(1 - rho^2). The asymptotic covariance of everything comes from casewise influence
values (Muthen 1984): for the polyserial correlation IF = -A^-1 [s_c + A_tau IF_tau +
A_m IF_m + A_s IF_s], A the sample derivatives of the mean score with respect to rho,
the thresholds, the mean and the SD of the continuous item.

The statistic vector orders the thresholds of the ordered items, then the means and
then the variances of the continuous items, then all correlations in
``numpy.triu_indices(p, 1)`` order.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr

from ..errors import EstimationError
from .bivariate import BIG
from .polychoric import PolychoricFit, marginal_thresholds, polychoric

__all__ = ["mixed_statistics", "polyserial_pairs"]

_RHO_MAX = 0.9999
_PHI = 1.0 / np.sqrt(2.0 * np.pi)


def _log_prob(z, lo, hi, rho):
    """log P(y | z) for (n, q) arrays of z, lower and upper thresholds, rho (q,)."""
    r = np.sqrt(1.0 - rho * rho)
    p = ndtr((hi - rho * z) / r) - ndtr((lo - rho * z) / r)
    return np.log(np.clip(p, 1e-300, None))


def _score(z, lo, hi, rho):
    """d log P(y | z) / d rho, (n, q)."""
    r = np.sqrt(1.0 - rho * rho)
    ah, al = (hi - rho * z) / r, (lo - rho * z) / r
    p = np.clip(ndtr(ah) - ndtr(al), 1e-300, None)
    dh = _PHI * np.exp(-ah * ah / 2) * (rho * hi - z) / r**3
    dl = _PHI * np.exp(-al * al / 2) * (rho * lo - z) / r**3
    return (dh - dl) / p


def polyserial_pairs(z: np.ndarray, lo: np.ndarray, hi: np.ndarray, *, tol: float = 1e-10, max_iter: int = 100):
    """Two-step polyserial correlations, Newton steps vectorized over pairs.

    Parameters
    ----------
    z
        (n, q) standardized continuous item of each pair.
    lo, hi
        (n, q) lower and upper thresholds of each case's category (+-BIG at the ends).

    Returns
    -------
    rho : (q,) array
    """
    q = z.shape[1]
    rho = np.clip(np.mean(z * (lo + hi) / 2, axis=0) / np.maximum(np.std((lo + hi) / 2, axis=0), 1e-6), -0.9, 0.9)
    ll = _log_prob(z, lo, hi, rho).sum(0)
    for _ in range(max_iter):
        s = _score(z, lo, hi, rho).sum(0)
        h = 1e-6
        ds = (_score(z, lo, hi, rho + h).sum(0) - _score(z, lo, hi, rho - h).sum(0)) / (2 * h)
        opg = (_score(z, lo, hi, rho) ** 2).sum(0)
        curv = np.where(ds < 0, -ds, opg)         # Newton where concave, else outer product
        step = s / np.maximum(curv, 1e-300)
        t = np.ones(q)
        for _ in range(30):
            new = np.clip(rho + t * step, -_RHO_MAX, _RHO_MAX)
            ll_new = _log_prob(z, lo, hi, new).sum(0)
            bad = ll_new < ll - 1e-12 * np.abs(ll)
            if not bad.any():
                break
            t = np.where(bad, t / 2, t)
        done = np.abs(new - rho) < tol
        rho, ll = new, ll_new
        if done.all():
            return rho
    raise EstimationError(
        f"Polyserial correlations did not converge in {max_iter} iterations; check the continuous items for outliers."
    )


def mixed_statistics(x: np.ndarray, ordinal: np.ndarray, n_categories: np.ndarray) -> PolychoricFit:
    """Statistics and ACOV of one group with ordered and continuous items.

    Parameters
    ----------
    x
        (n, p) array: ordered items coded 0 .. K_i - 1, continuous items as measured;
        complete cases.
    ordinal
        (p,) booleans: the item is ordered.
    n_categories
        K_i of ordered items (ignored for continuous ones).

    Returns
    -------
    PolychoricFit
        ``n_categories`` is 1 for continuous items (no thresholds); ``continuous`` marks
        them; ``corr`` holds all correlations.
    """
    x = np.asarray(x, float)
    n, p = x.shape
    ordinal = np.asarray(ordinal, bool)
    oi, ci = np.flatnonzero(ordinal), np.flatnonzero(~ordinal)
    K = np.where(ordinal, np.asarray(n_categories, int), 1)
    corr = np.eye(p)
    tau_o, if_tau, corr_o, if_poly = _ordered_block(x, oi, K)
    if corr_o is not None:
        corr[np.ix_(oi, oi)] = corr_o
    kmax = max(int(K.max()), 2)
    tau = np.full((p, kmax - 1), np.nan)
    if oi.size:
        tau[oi, : tau_o.shape[1]] = tau_o
    cont = _continuous_block(x[:, ci])
    corr[np.ix_(ci, ci)] = cont.rc
    pairs = np.triu_indices(p, 1)
    if_ps = _polyserial_block(x, ordinal, K, tau, cont, if_tau, corr)
    if_pc = _pearson_influence(cont, ci)
    infl_corr, stats_corr = [], []
    for a, b in zip(*pairs):
        key = (int(a), int(b))
        infl_corr.append(if_poly.get(key, if_ps.get(key, if_pc.get(key))))
        stats_corr.append(corr[a, b])
    valid = ~np.isnan(tau)
    stats = np.concatenate([tau[valid], cont.m, cont.var, np.array(stats_corr)])
    infl = np.concatenate([if_tau, cont.if_m, cont.if_v, np.stack(infl_corr, 1) if infl_corr else np.zeros((n, 0))], 1)
    acov = infl.T @ infl / (n * n)
    return PolychoricFit(n, K, tau, corr, pairs, stats, acov, infl, 0, continuous=~ordinal)


def _ordered_block(x: np.ndarray, oi: np.ndarray, K: np.ndarray):
    """Thresholds, their influence values, the polychoric block and its influence values.

    Returns ``(tau_o, if_tau, corr_o, if_poly)``: ``corr_o`` is ``None`` with fewer than
    two ordered items; ``if_poly`` maps an item pair (a, b) to its influence column.
    """
    n = x.shape[0]
    if oi.size >= 2:
        pf = polychoric(x[:, oi].astype(np.int64), K[oi])
        po_i, po_j = pf.pairs
        if_poly = {(int(oi[a]), int(oi[b])): pf.influence[:, pf.n_thresholds + q] for q, (a, b) in enumerate(zip(po_i, po_j))}
        return pf.thresholds, pf.influence[:, : pf.n_thresholds], pf.corr, if_poly
    tau_o, _ = marginal_thresholds(x[:, oi].astype(np.int64), K[oi]) if oi.size else (np.zeros((0, 1)), None)
    if_tau = np.zeros((n, 0))
    if oi.size:
        codes = x[:, oi].astype(np.int64)
        cols = []
        for k in range(K[oi[0]] - 1):
            pi = np.mean(codes[:, 0] <= k)
            cols.append(((codes[:, 0] <= k) - pi) / (_PHI * np.exp(-tau_o[0, k] ** 2 / 2)))
        if_tau = np.stack(cols, 1)
    return tau_o, if_tau, None, {}


@dataclass(frozen=True)
class _Continuous:
    """Moments of the continuous items (divisor N), standardized values and influence values."""

    m: np.ndarray
    var: np.ndarray
    sd: np.ndarray
    d: np.ndarray
    z: np.ndarray
    if_m: np.ndarray
    if_v: np.ndarray
    if_s: np.ndarray
    rc: np.ndarray


def _continuous_block(xc: np.ndarray) -> _Continuous:
    """Means, variances, Pearson correlations and influence values of the continuous items."""
    n = xc.shape[0]
    m = xc.mean(0)
    d = xc - m
    var = (d * d).mean(0)
    sd = np.sqrt(var)
    z = d / sd
    if_v = d * d - var
    return _Continuous(m=m, var=var, sd=sd, d=d, z=z, if_m=d, if_v=if_v, if_s=if_v / (2 * sd), rc=(z.T @ z) / n)


def _polyserial_block(
    x: np.ndarray, ordinal: np.ndarray, K: np.ndarray, tau: np.ndarray, cont: _Continuous,
    if_tau: np.ndarray, corr: np.ndarray,
) -> dict:
    """Polyserial correlations (written into ``corr``) and their influence values by pair."""
    p = x.shape[1]
    oi, ci = np.flatnonzero(ordinal), np.flatnonzero(~ordinal)
    ps = [(a, b) for a, b in zip(*np.triu_indices(p, 1)) if ordinal[a] != ordinal[b]]
    if not ps:
        return {}
    kmax = tau.shape[1] + 1
    c_of = {int(c): k for k, c in enumerate(ci)}
    o_of = {int(o): k for k, o in enumerate(oi)}
    cc = np.array([c_of[int(a if not ordinal[a] else b)] for a, b in ps])
    oo = np.array([o_of[int(b if ordinal[b] else a)] for a, b in ps])
    ext = np.full((oi.size, kmax + 1), BIG)
    ext[:, 0] = -BIG
    ext[:, 1:-1] = np.where(np.isnan(tau[oi]), BIG, tau[oi])
    y = x[:, oi].astype(np.int64)[:, oo]
    lo = ext[oo[None, :], y]
    hi = ext[oo[None, :], y + 1]
    zz = cont.z[:, cc]
    rho = polyserial_pairs(zz, lo, hi)
    s_c = _score(zz, lo, hi, rho)
    h = 1e-6
    A = (_score(zz, lo, hi, rho + h).mean(0) - _score(zz, lo, hi, rho - h).mean(0)) / (2 * h)
    # derivative with respect to the continuous mean and SD (through z)
    d, sd = cont.d, cont.sd
    zp_m, zm_m = (d[:, cc] - h) / sd[cc], (d[:, cc] + h) / sd[cc]
    A_m = (_score(zp_m, lo, hi, rho).mean(0) - _score(zm_m, lo, hi, rho).mean(0)) / (2 * h)
    zp_s, zm_s = d[:, cc] / (sd[cc] + h), d[:, cc] / (sd[cc] - h)
    A_s = (_score(zp_s, lo, hi, rho).mean(0) - _score(zm_s, lo, hi, rho).mean(0)) / (2 * h)
    t_start = np.concatenate([[0], np.cumsum(K[oi] - 1)])
    if_ps = {}
    for q, (a, b) in enumerate(ps):
        o, c = oo[q], cc[q]
        corr_term = s_c[:, q] + A_m[q] * cont.if_m[:, c] + A_s[q] * cont.if_s[:, c]
        corr_term = _add_threshold_terms(corr_term, zz[:, q], y[:, q], ext[o], rho[q], if_tau[:, t_start[o]:], K[oi[o]], h)
        if_ps[(int(a), int(b))] = -corr_term / A[q]
        corr[a, b] = corr[b, a] = rho[q]
    return if_ps


def _add_threshold_terms(
    corr_term: np.ndarray, zq: np.ndarray, yq: np.ndarray, ext_o: np.ndarray, rho_q: float, if_tau_o: np.ndarray, k_o: int, h: float
) -> np.ndarray:
    """Add the thresholds' part of a polyserial influence value, sum_k dS/dtau_k IF_tau_k."""
    for k in range(k_o - 1):
        e = np.zeros(ext_o.size)
        e[k + 1] = h
        up = _score(zq, (ext_o + e)[yq], (ext_o + e)[yq + 1], rho_q).mean()
        dn = _score(zq, (ext_o - e)[yq], (ext_o - e)[yq + 1], rho_q).mean()
        corr_term = corr_term + (up - dn) / (2 * h) * if_tau_o[:, k]
    return corr_term


def _pearson_influence(cont: _Continuous, ci: np.ndarray) -> dict:
    """Influence values of the Pearson correlations among continuous items, by pair."""
    if_pc = {}
    for a in range(ci.size):
        for b in range(a + 1, ci.size):
            za, zb = cont.z[:, a], cont.z[:, b]
            r = cont.rc[a, b]
            if_pc[(int(ci[a]), int(ci[b]))] = za * zb - r * (za * za + zb * zb) / 2
    return if_pc
