"""A plain, cell-by-cell reference for thresholds, polychoric correlations and their
asymptotic covariance, used by the tests and by tests/benchmarks/bench_polychoric.py.

Deliberately simple and independent of invariance.ordinal: every bivariate normal
probability is one call of scipy.stats.multivariate_normal.cdf, the correlation of
each pair is found by scipy.optimize.minimize_scalar on the pairwise likelihood
(Olsson 1979, two-step: thresholds from the marginals), and the asymptotic covariance
is the sandwich of the stacked estimating equations (thresholds: 1[x <= k] - Phi(tau_k);
correlation: the pairwise score), with every derivative taken by central differences
and the cross-information by the information identity (Muthen 1984; Muthen & Satorra 1995).
"""

from __future__ import annotations

import numpy as np
from scipy import optimize
from scipy.stats import multivariate_normal, norm

__all__ = ["ref_thresholds", "ref_cell_probs", "ref_rho", "ref_polychoric"]

_CAP = 9.0


def _cap(x):
    return float(np.clip(x, -_CAP, _CAP))


def ref_thresholds(x, K):
    """Thresholds of one item coded 0..K-1: inverse normal of cumulative proportions."""
    n = x.size
    cum = np.array([(x <= k).sum() / n for k in range(K - 1)])
    return norm.ppf(cum)


def ref_cell_probs(ti, tj, rho):
    """Cell probabilities, one multivariate_normal.cdf call per grid point."""
    d = multivariate_normal(mean=[0.0, 0.0], cov=[[1.0, rho], [rho, 1.0]])
    li = np.r_[-np.inf, ti, np.inf]
    lj = np.r_[-np.inf, tj, np.inf]
    F = np.empty((li.size, lj.size))
    for a, h in enumerate(li):
        for b, k in enumerate(lj):
            if h == -np.inf or k == -np.inf:
                F[a, b] = 0.0
            elif h == np.inf and k == np.inf:
                F[a, b] = 1.0
            elif h == np.inf:
                F[a, b] = norm.cdf(k)
            elif k == np.inf:
                F[a, b] = norm.cdf(h)
            else:
                F[a, b] = d.cdf([h, k])
    return np.diff(np.diff(F, axis=0), axis=1)


def ref_rho(table, ti, tj):
    """Pairwise ML correlation for a contingency table (cells may be fractional)."""

    def nll(r):
        P = np.clip(ref_cell_probs(ti, tj, r), 1e-300, None)
        return -float(np.sum(table * np.log(P)))

    res = optimize.minimize_scalar(nll, bounds=(-0.995, 0.995), method="bounded",
                                   options={"xatol": 1e-10})
    return float(res.x)


def _pair_influence(xi, xj, ti, tj, rho, h=1e-5):
    """Influence values of (rho) for one pair, by the stacked estimating equations."""
    Ki, Kj = ti.size + 1, tj.size + 1
    theta = np.r_[ti, tj, rho]

    def logp(th):
        return np.log(np.clip(ref_cell_probs(th[: Ki - 1], th[Ki - 1 : -1], th[-1]), 1e-300, None))

    P = np.exp(logp(theta))
    grads = np.empty((theta.size, Ki, Kj))
    for m in range(theta.size):
        e = np.zeros(theta.size)
        e[m] = h
        grads[m] = (logp(theta + e) - logp(theta - e)) / (2 * h)
    s_rho = grads[-1]                      # score of rho per cell
    # expected derivative of the rho equation (information identity)
    A_rho = -np.array([np.sum(P * s_rho * grads[m]) for m in range(theta.size)])
    # threshold equations psi_k = 1[x <= k] - Phi(tau_k): d/dtau_k = -phi(tau_k)
    n = xi.size
    psi_t = np.concatenate(
        [np.stack([(xi <= k) - norm.cdf(ti[k]) for k in range(Ki - 1)], 1),
         np.stack([(xj <= k) - norm.cdf(tj[k]) for k in range(Kj - 1)], 1)], axis=1)
    dens = np.r_[norm.pdf(ti), norm.pdf(tj)]
    if_t = psi_t / dens                    # = -A_tt^-1 psi_t
    psi_r = s_rho[xi, xj]
    return -(psi_r + if_t @ A_rho[:-1]) / A_rho[-1]


def ref_polychoric(codes, K, pairs=None):
    """Thresholds, correlations and influence values, pair by pair.

    Returns (thresholds list, dict pair -> rho, threshold influence (n, nt), dict pair ->
    rho influence (n,)).
    """
    n, p = codes.shape
    taus = [ref_thresholds(codes[:, i], K[i]) for i in range(p)]
    if pairs is None:
        pairs = [(i, j) for i in range(p) for j in range(i + 1, p)]
    rhos, infl = {}, {}
    for i, j in pairs:
        tab = np.zeros((K[i], K[j]))
        np.add.at(tab, (codes[:, i], codes[:, j]), 1.0)
        r = ref_rho(tab, taus[i], taus[j])
        rhos[(i, j)] = r
        infl[(i, j)] = _pair_influence(codes[:, i], codes[:, j], taus[i], taus[j], r)
    if_t = np.concatenate(
        [np.stack([((codes[:, i] <= k) - norm.cdf(taus[i][k])) / norm.pdf(taus[i][k])
                   for k in range(K[i] - 1)], 1) for i in range(p)], axis=1)
    return taus, rhos, if_t, infl
