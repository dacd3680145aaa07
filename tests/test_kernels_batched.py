"""Batched and factored kernels against straightforward references written here.

References: per-pattern loops over np.ix_ sub-matrices (the textbook casewise form of
full-information ML, METHODS sections 6 and 14); dense (u, p, p) Jacobian contractions
(METHODS section 2); central finite differences; scipy.stats.multivariate_normal with
scipy.optimize (independent casewise maximum likelihood); scipy.stats.ncx2 with
scipy.optimize.brentq (RMSEA interval, METHODS sections 4 and 14). Data: Holzinger &
Swineford (1939) shipped with semopy, values deleted at random by a seeded generator.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize as sopt
from scipy import stats as sst

import invariance as inv
from invariance.data.patterns import CACHE, missing_patterns, pattern_moments
from invariance.effects.latent import compare_latent, latent_moments
from invariance.estimate import FIMLObjective
from invariance.estimate.indices import rmsea, rmsea_interval
from invariance.estimate.kernels import (
    compile_spec,
    factor_jacobian,
    factored_information,
    gram,
    group_matrices,
    implied_moments,
    moment_jacobian,
)
from invariance.estimate.objective import MLObjective
from invariance.estimate.robust import (
    H1Moments,
    saturated_observed_information,
    saturated_scores,
    vech_permutation,
)
from invariance.estimate.start import start_values

semopy_examples = pytest.importorskip("semopy.examples")

ITEMS = [f"x{i}" for i in range(1, 10)]
F = {"visual": ITEMS[:3], "textual": ITEMS[3:6], "speed": ITEMS[6:]}
STRUCTURES = {
    "correlated": inv.Structure(F, family="correlated"),
    "second_order": inv.Structure(F, family="second_order", general="g"),
    "bifactor": inv.Structure(F, family="bifactor", general="g"),
    "paths": inv.Structure(F, family="correlated", regressions=(("textual", "visual"),),
                           residual_covariances=(("x1", "x4"),)),
}
LOG2PI = np.log(2 * np.pi)


@pytest.fixture(scope="module")
def hs():
    return semopy_examples.holzinger39.get_data()


def _deleted(hs, rate=0.15, seed=7, *, columns=None):
    """Values deleted at random (only in ``columns``, item positions, when given)."""
    rng = np.random.default_rng(seed)
    d = hs.copy()
    X = d[ITEMS].to_numpy(dtype=float, copy=True)
    hit = rng.random(X.shape) < rate
    if columns is not None:
        hit[:, [j for j in range(X.shape[1]) if j not in columns]] = False
    X[hit] = np.nan
    d[ITEMS] = X
    return d


def _point(spec, stats, seed):
    rng = np.random.default_rng(seed)
    return start_values(spec, stats) * (1 + 0.05 * rng.standard_normal(spec.n_params))


def _loop_reference(obj, theta):
    """Value, gradient and expected information by an explicit loop over patterns."""
    q = obj.n_params
    val, grad, info = 2.0 * obj.loglik_h1, np.zeros(q), np.zeros((q, q))
    for lay, d in zip(obj.layouts, obj.data):
        mats = group_matrices(lay, theta)
        sigma, mu, G, A = implied_moments(mats)
        dS, dm = moment_jacobian(lay, mats, G, A)
        u = lay.params
        pat = missing_patterns(d.x)
        for k, rows in enumerate(pat.rows):
            o = pat.observed[k]
            xo = d.x[np.ix_(rows, o)]
            n, m = rows.size, xo.mean(axis=0)
            S = (xo - m).T @ (xo - m) / n
            W = np.linalg.inv(sigma[np.ix_(o, o)])
            e = m - mu[o]
            val += n * (o.sum() * LOG2PI + np.linalg.slogdet(sigma[np.ix_(o, o)])[1] + np.sum(S * W) + e @ W @ e)
            dSo, dmo = dS[:, o][:, :, o], dm[:, o]
            Gs = W - W @ (S + np.outer(e, e)) @ W
            grad[u] += n * (np.einsum("uij,ij->u", dSo, Gs) - 2.0 * dmo @ W @ e)
            WS = W @ dSo
            info[np.ix_(u, u)] += n * (np.einsum("uij,vji->uv", WS, WS) + 2.0 * dmo @ W @ dmo.T)
    return val, grad, info


@pytest.mark.parametrize("family", sorted(STRUCTURES))
@pytest.mark.parametrize("level", ["configural", "scalar"])
def test_batched_fiml_equals_pattern_loop(hs, family, level):
    s = inv.sample_stats(_deleted(hs), ITEMS, "school", missing="fiml")
    spec = inv.build_level(STRUCTURES[family], s.names, level)
    obj = FIMLObjective(spec, s)
    theta = _point(spec, s, 3)
    val, grad, info = obj.derivatives(theta)
    rv, rg, ri = _loop_reference(obj, theta)
    # before/after agreement of the batched kernels with the per-pattern loop (1e-6)
    assert val == pytest.approx(rv, rel=1e-9, abs=1e-6)
    assert obj.value(theta) == pytest.approx(rv, rel=1e-9, abs=1e-6)
    assert np.allclose(grad, rg, rtol=1e-8, atol=1e-6)
    assert np.allclose(info, ri, rtol=1e-8, atol=1e-6)


@pytest.mark.parametrize("family", sorted(STRUCTURES))
def test_factored_information_equals_dense_jacobian_contraction(hs, family):
    s = inv.sample_stats(hs, ITEMS, "school")
    spec = inv.build_level(STRUCTURES[family], s.names, "strict")
    theta = _point(spec, s, 5)
    for lay in compile_spec(spec):
        mats = group_matrices(lay, theta)
        sigma, mu, G, A = implied_moments(mats)
        dS, dm = moment_jacobian(lay, mats, G, A)
        W = np.linalg.inv(sigma)
        WS = W @ dS
        dense = np.einsum("uij,vji->uv", WS, WS) + 2.0 * dm @ W @ dm.T
        fj = factor_jacobian(lay, mats, G, A)
        assert np.allclose(factored_information(fj, gram(fj.H, W)), dense, rtol=1e-10, atol=1e-10)


def _fd_hessian(obj, theta, h=1e-6):
    """Central differences of the analytic gradient."""
    return np.column_stack([
        (obj.derivatives(theta + h * e, information=False)[1] - obj.derivatives(theta - h * e, information=False)[1]) / (2 * h)
        for e in np.eye(theta.size)
    ])


def test_fiml_hessian_second_order_against_finite_differences(hs):
    s = inv.sample_stats(_deleted(hs, 0.2, 12), ITEMS, "school", missing="fiml")
    spec = inv.build_level(STRUCTURES["second_order"], s.names, "scalar")
    obj = FIMLObjective(spec, s)
    theta = _point(spec, s, 9)
    H, fd = obj.hessian(theta), _fd_hessian(obj, theta)
    # central differences of the analytic gradient (itself checked against the loop above)
    assert np.allclose(H, fd, rtol=1e-5, atol=1e-6 * np.abs(fd).max())


#: items with holes: none always observed (all nine), some always observed (split
#: coordinates of fiml_kernels), and holes in one school only (the other school complete)
_HOLES = {"all": dict(columns=None), "some": dict(columns=(1, 3, 4, 7)), "one_group": dict(columns=(0, 5))}


def _holes(hs, kind, seed):
    d = _deleted(hs, 0.2, seed, **_HOLES[kind])
    if kind == "one_group":
        keep = d["school"] == d["school"].iloc[0]
        d.loc[keep, ITEMS] = hs.loc[keep, ITEMS]
    return d


@pytest.mark.parametrize("kind", sorted(_HOLES))
@pytest.mark.parametrize("family", ["bifactor", "paths"])
def test_fiml_kernels_against_loop_and_finite_differences(hs, kind, family):
    s = inv.sample_stats(_holes(hs, kind, 31), ITEMS, "school", missing="fiml")
    spec = inv.build_level(STRUCTURES[family], s.names, "scalar")
    obj = FIMLObjective(spec, s)
    theta = _point(spec, s, 13)
    val, grad, info = obj.derivatives(theta)
    rv, rg, ri = _loop_reference(obj, theta)
    # the per-pattern loop written above (textbook casewise form, METHODS section 14)
    assert val == pytest.approx(rv, rel=1e-9, abs=1e-6)
    assert np.allclose(grad, rg, rtol=1e-8, atol=1e-6)
    assert np.allclose(info, ri, rtol=1e-8, atol=1e-6)
    H, fd = obj.hessian(theta), _fd_hessian(obj, theta)
    # central differences of the analytic gradient
    assert np.allclose(H, fd, rtol=1e-5, atol=1e-6 * np.abs(fd).max())


def test_fiml_estimates_equal_casewise_scipy_maximum():
    # independent reference: -sum of scipy.stats.multivariate_normal.logpdf over cases,
    # each on its observed items, minimized by scipy.optimize (one factor, four items)
    rng = np.random.default_rng(20261202)
    lam, th, nu = np.array([0.9, 0.7, 0.8, 0.6]), np.array([0.5, 0.6, 0.4, 0.7]), np.array([1.0, 2.0, 0.5, 1.5])
    X = rng.multivariate_normal(nu, np.outer(lam, lam) + np.diag(th), size=120)
    X[rng.random(X.shape) < np.array([0.0, 0.0, 0.2, 0.25])] = np.nan
    items = ["a", "b", "c", "d"]
    stats = inv.data.stats_from_arrays([X], ["all"], items, missing="fiml")
    res = inv.fit(inv.build_level(inv.Structure({"f": items}), stats.names, "configural"), stats)

    def nll(z):
        sig = np.outer(z[:4], z[:4]) + np.diag(np.exp(z[4:8]))
        tot = 0.0
        for row in X:
            o = ~np.isnan(row)
            tot -= sst.multivariate_normal(z[8:][o], sig[np.ix_(o, o)]).logpdf(row[o])
        return tot

    z0 = np.concatenate([np.full(4, 0.5), np.log(np.nanvar(X, axis=0) / 2), np.nanmean(X, axis=0)])
    ref = sopt.minimize(nll, z0, method="BFGS", options={"gtol": 1e-8})
    sig_ref = np.outer(ref.x[:4], ref.x[:4]) + np.diag(np.exp(ref.x[4:8]))
    assert res.fit.loglik == pytest.approx(-ref.fun, abs=1e-6)
    assert np.allclose(res.sigma[0], sig_ref, atol=1e-4)
    assert np.allclose(res.mu[0], ref.x[8:], atol=1e-4)


def _fd_observed_information(x, mean, cov, h=1e-5):
    """Central differences of the summed casewise scores (the pre-analytic method)."""
    pat = missing_patterns(x)
    p = cov.shape[0]
    r, c = np.tril_indices(p)
    k = p + r.size
    out = np.empty((k, k))
    for j in range(k):
        sc = []
        for sgn in (1.0, -1.0):
            m, S = mean.copy(), cov.copy()
            if j < p:
                m[j] += sgn * h
            else:
                S[r[j - p], c[j - p]] += sgn * h
                S[c[j - p], r[j - p]] = S[r[j - p], c[j - p]]
            sc.append(saturated_scores(x, pat, m, S).sum(axis=0))
        out[:, j] = -(sc[0] - sc[1]) / (2 * h)
    return (out + out.T) / 2


def test_saturated_observed_information_against_finite_differences(hs):
    s = inv.sample_stats(_deleted(hs, 0.2, 4), ITEMS[:5], "school", missing="fiml")
    g = s.groups[0]
    A = saturated_observed_information(pattern_moments(g.raw), g.mean, g.cov)
    B = _fd_observed_information(g.raw, g.mean, g.cov)
    assert np.allclose(A, B, rtol=1e-5, atol=1e-5 * np.abs(A).max())
    # away from the H1 estimates too (the residual terms then matter)
    A2 = saturated_observed_information(pattern_moments(g.raw), g.mean + 0.1, g.cov * 1.1)
    B2 = _fd_observed_information(g.raw, g.mean + 0.1, g.cov * 1.1)
    assert np.allclose(A2, B2, rtol=1e-5, atol=1e-5 * np.abs(A2).max())


def test_h1_cache_is_hit_after_reordering_items(hs):
    s = inv.sample_stats(_deleted(hs, 0.1, 21), ITEMS, "school", missing="fiml")
    a = H1Moments(s)
    n_before = len(CACHE._store)
    order = ITEMS[::-1]
    b = H1Moments(s.reorder_items(order))
    assert len(CACHE._store) == n_before   # no new entry: the reordered items hit
    k = vech_permutation(np.array([ITEMS.index(i) for i in order]))
    for Va, Vb, Ga, Gb in zip(a.V, b.V, a.gamma, b.gamma):
        assert np.allclose(Vb, Va[np.ix_(k, k)]) and np.allclose(Gb, Ga[np.ix_(k, k)])
    # and the permuted result is what a fresh computation in that order gives
    CACHE.clear()
    c = H1Moments(s.reorder_items(order))
    assert all(np.allclose(x, y, rtol=1e-9, atol=1e-12) for x, y in zip(b.V + b.gamma, c.V + c.gamma))


def _ncx2_interval(t, df, n, G, level=0.90):
    """The interval by root finding over scipy.stats.ncx2.cdf (the pre-chndtrinc method)."""
    def root(q):
        if sst.chi2.cdf(t, df) < q:
            return 0.0
        f = lambda lam: sst.ncx2.cdf(t, df, lam) - q
        hi = max(t, 1.0)
        while f(hi) > 0:
            hi *= 2.0
        return sopt.brentq(f, 1e-12, hi, xtol=1e-12)

    lo, hi = root((1 + level) / 2), root((1 - level) / 2)
    return tuple(np.sqrt(G) * np.sqrt(v / (df * n)) for v in (lo, hi))


@pytest.mark.parametrize("t,df,n,G", [(85.306, 24, 301, 1), (115.851, 48, 301, 2), (30.0, 24, 301, 1),
                                      (10.0, 24, 301, 1), (2500.0, 300, 6400, 64), (52.0, 50, 150, 3)])
def test_rmsea_interval_equals_ncx2_root_finding(t, df, n, G):
    lo, hi = rmsea_interval(t, df, n, G)
    rlo, rhi = _ncx2_interval(t, df, n, G)
    assert lo == pytest.approx(rlo, abs=1e-8) and hi == pytest.approx(rhi, abs=1e-8)
    assert lo <= rmsea(t, df, n, G) <= hi


def test_holzinger_rmsea_check_value_unchanged(hs):
    # METHODS section 12: chi-square 85.306 on 24 df, RMSEA .092 (widely published)
    s = inv.sample_stats(hs, ITEMS)
    r = inv.fit(inv.build_level(STRUCTURES["correlated"], s.names, "configural"), s)
    assert r.fit.rmsea == pytest.approx(0.092, abs=5e-4)
    assert r.fit.rmsea_ci90[0] < 0.092 < r.fit.rmsea_ci90[1]


@pytest.mark.parametrize("family", ["correlated", "second_order"])
def test_latent_moments_jacobian_against_finite_differences(hs, family):
    s = inv.sample_stats(hs, ITEMS, "school")
    spec = inv.build_level(STRUCTURES[family], s.names, "scalar")
    theta = _point(spec, s, 2)
    h = 1e-6
    for lay in compile_spec(spec):
        mean, var, cols, dmean, dvar = latent_moments(lay, theta)
        for j, col in enumerate(cols):
            e = np.zeros(theta.size)
            e[col] = h
            mp, vp, *_ = latent_moments(lay, theta + e)
            mm, vm, *_ = latent_moments(lay, theta - e)
            assert np.allclose(dmean[:, j], (mp - mm) / (2 * h), atol=1e-7)
            assert np.allclose(dvar[:, j], (vp - vm) / (2 * h), atol=1e-7)


def test_latent_comparison_se_equal_finite_difference_delta_method(hs):
    s = inv.sample_stats(hs, ITEMS, "school")
    spec = inv.build_level(STRUCTURES["second_order"], s.names, "scalar")
    res = inv.fit(spec, s)
    lc = compare_latent(res)
    lays = compile_spec(spec)

    def stat(theta):
        mv = [latent_moments(lay, theta)[:2] for lay in lays]
        (m0, v0), (m1, v1) = mv
        return np.concatenate([m1 - m0, (m1 - m0) / np.sqrt(v0), np.log(v1 / v0)])

    h = 1e-6
    J = np.column_stack([(stat(res.theta + h * e) - stat(res.theta - h * e)) / (2 * h) for e in np.eye(spec.n_params)])
    se = np.sqrt(np.einsum("ij,jk,ik->i", J, res.acov, J))
    m = len(spec.factors)
    for d in lc.means:
        f = spec.factors.index(d.factor)
        assert d.se == pytest.approx(se[f], rel=1e-5)
        assert d.standardized_se == pytest.approx(se[m + f], rel=1e-5)
    for v in lc.variances:
        f = spec.factors.index(v.factor)
        assert v.se == pytest.approx(v.ratio * se[2 * m + f], rel=1e-5)
