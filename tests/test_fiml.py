"""Full-information ML and the missing-data statistics.

References: Holzinger & Swineford (1939) data shipped with semopy; the ML statistics
by school of METHODS section 12; scipy.stats.multivariate_normal for the casewise
likelihood; central finite differences for the analytic gradient.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import stats as sst

from invariance import DataError, Structure, build_level, fit, sample_stats
from invariance.data import em_saturated, missing_patterns, stats_from_arrays
from invariance.data.patterns import pattern_moments, pattern_terms
from invariance.estimate import FIMLObjective, MLObjective
from invariance.estimate.start import start_values

semopy_examples = pytest.importorskip("semopy.examples")

ITEMS = [f"x{i}" for i in range(1, 10)]
STRUCT = Structure(factors={"visual": ITEMS[:3], "textual": ITEMS[3:6], "speed": ITEMS[6:]}, family="correlated")


@pytest.fixture(scope="module")
def hs():
    return semopy_examples.holzinger39.get_data()


def _delete(frame, rate, seed, *, empty_rows=0):
    """Delete item values completely at random (seeded); blank ``empty_rows`` rows fully."""
    rng = np.random.default_rng(seed)
    d = frame.copy()
    X = d[ITEMS].to_numpy(dtype=float, copy=True)
    X[rng.random(X.shape) < rate] = np.nan
    if empty_rows:
        X[rng.choice(X.shape[0], empty_rows, replace=False)] = np.nan
    d[ITEMS] = X
    return d


# --- complete data: FIML is ML -----------------------------------------------------

@pytest.mark.parametrize(
    "level,chi2",
    # ML chi-square by school, METHODS section 12 (reproduced with semopy)
    [("configural", 115.851), ("metric", 124.044), ("scalar", 164.103), ("strict", 181.511)],
)
def test_fiml_equals_ml_on_complete_data(hs, level, chi2):
    s_ml = sample_stats(hs, ITEMS, "school")
    s_fi = sample_stats(hs, ITEMS, "school", missing="fiml")
    spec = build_level(STRUCT, s_ml.names, level)
    r_ml = fit(spec, s_ml)
    fi = FIMLObjective(spec, s_fi)
    assert fi.value(r_ml.theta) == pytest.approx(r_ml.fit.chi2, abs=1e-6)
    # fit the FIML objective itself from the same start: same optimum
    from invariance.estimate import minimize

    out = minimize(fi, start_values(spec, s_fi))
    assert out.fun == pytest.approx(r_ml.fit.chi2, abs=1e-6)
    assert np.max(np.abs(out.x - r_ml.theta)) < 1e-6
    assert r_ml.fit.chi2 == pytest.approx(chi2, abs=1e-3)
    # the EM saturated moments of complete data are the sample moments (divisor N)
    for a, b in zip(s_ml.groups, s_fi.groups):
        assert np.allclose(a.cov, b.cov, atol=1e-9) and np.allclose(a.mean, b.mean, atol=1e-10)


def test_fiml_fit_statistics_match_ml_on_complete_data(hs):
    s_ml = sample_stats(hs, ITEMS, "school")
    s_fi = sample_stats(hs, ITEMS, "school", missing="fiml")
    spec = build_level(STRUCT, s_ml.names, "metric")
    a = fit(spec, s_ml).fit
    # force the FIML path on complete data through the objective's fit statistics
    fi = FIMLObjective(spec, s_fi)
    from invariance.estimate.ml import _full_information_fit

    b = _full_information_fit(a, fi, spec)
    for k in ("loglik", "loglik_saturated", "baseline_chi2", "cfi", "tli", "aic", "bic"):
        assert getattr(b, k) == pytest.approx(getattr(a, k), rel=1e-9, abs=1e-9), k


# --- the casewise likelihood and its gradient ---------------------------------------

def test_fiml_likelihood_against_scipy_casewise(hs):
    d = _delete(hs, 0.2, 11)
    s = sample_stats(d, ITEMS, "school", missing="fiml")
    spec = build_level(STRUCT, s.names, "scalar")
    obj = FIMLObjective(spec, s)
    theta = start_values(spec, s)
    ll = 0.0
    for (sigma, mu), g in zip(obj.moments(theta), s.groups):
        for row in g.raw:
            o = ~np.isnan(row)
            # scipy.stats.multivariate_normal: independent casewise density
            ll += sst.multivariate_normal(mu[o], sigma[np.ix_(o, o)]).logpdf(row[o])
    assert obj.loglik(theta) == pytest.approx(ll, rel=1e-10)
    assert obj.value(theta) == pytest.approx(-2 * ll + 2 * obj.loglik_h1, rel=1e-10)


def test_fiml_gradient_against_finite_differences(hs):
    d = _delete(hs, 0.15, 5)
    s = sample_stats(d, ITEMS, "school", missing="fiml")
    spec = build_level(STRUCT, s.names, "metric")
    obj = FIMLObjective(spec, s)
    rng = np.random.default_rng(1)
    theta = start_values(spec, s) * (1 + 0.05 * rng.standard_normal(spec.n_params))
    _, grad, info = obj.derivatives(theta)
    h = 1e-6
    fd = np.array([
        (obj.value(theta + h * e) - obj.value(theta - h * e)) / (2 * h) for e in np.eye(spec.n_params)
    ])
    # central differences of the value (common practice: agreement to ~1e-5 relative)
    assert np.allclose(grad, fd, rtol=1e-5, atol=1e-4 * max(1.0, np.abs(fd).max()))
    assert np.allclose(info, info.T) and np.linalg.eigvalsh(info)[0] > 0


def test_em_solution_is_a_stationary_point_of_the_likelihood(hs):
    # the saturated ML estimate (EM) has zero score: central differences of the
    # casewise log-likelihood (scipy densities) in every mean and covariance entry
    X = _delete(hs, 0.2, 3)[ITEMS[:4]].to_numpy(dtype=float)[:150]
    X = X[~np.isnan(X).all(axis=1)]
    em = em_saturated(X)
    assert em.converged

    def ll(mean, cov):
        tot = 0.0
        for row in X:
            o = ~np.isnan(row)
            tot += sst.multivariate_normal(mean[o], cov[np.ix_(o, o)]).logpdf(row[o])
        return tot

    h = 1e-5
    for j in range(4):
        e = np.zeros(4); e[j] = h
        assert abs(ll(em.mean + e, em.cov) - ll(em.mean - e, em.cov)) / (2 * h) < 1e-3
        E = np.zeros((4, 4)); E[j, (j + 1) % 4] = E[(j + 1) % 4, j] = h
        assert abs(ll(em.mean, em.cov + E) - ll(em.mean, em.cov - E)) / (2 * h) < 1e-3
    assert em.loglik == pytest.approx(ll(em.mean, em.cov), rel=1e-10)


# --- Holzinger & Swineford with values deleted completely at random -------------------

def test_mcar_deletion_estimates_close_and_counts_right(hs):
    d = _delete(hs, 0.10, 20261201, empty_rows=4)
    X = d[ITEMS].to_numpy(dtype=float)
    s = sample_stats(d, ITEMS, "school", missing="fiml")
    s_full = sample_stats(hs, ITEMS, "school")
    for g in s.groups:
        rows = (d["school"] == g.name).to_numpy()
        Xg = X[rows]
        used = ~np.isnan(Xg).all(axis=1)
        assert g.n == used.sum()
        assert g.missing.n_input == rows.sum()
        assert g.missing.n_dropped == (~used).sum()
        assert g.missing.pattern_counts.sum() == g.n
        assert g.missing.n_patterns == len({tuple(r) for r in np.isnan(Xg[used])})
        assert np.allclose(g.missing.coverage, (~np.isnan(Xg[used])).mean(axis=0))
    assert sum(g.missing.n_dropped for g in s.groups) == 4
    for level in ("configural", "scalar"):
        spec = build_level(STRUCT, s.names, level)
        r = fit(spec, s)
        r0 = fit(spec, s_full)
        assert r.converged and r.extra["likelihood"] == "full_information"
        est, est0 = r.estimates(), r0.estimates()
        free = est["free"].to_numpy()
        diff = np.abs(est["estimate"] - est0["estimate"]).to_numpy()[free]
        se0 = est0["se"].to_numpy()[free]
        z = diff / se0
        # 10% of values deleted at random moves an estimate by sampling noise of about
        # sqrt(0.1/0.9) ~ 0.33 complete-data SEs (common practice reasoning; the largest of
        # ~60 such shifts stays within 2.5 SEs)
        assert np.median(z) < 0.5 and np.percentile(z, 90) < 1.25 and z.max() < 2.5, z
        # and SEs grow, not shrink, with less information (up to small sampling noise)
        assert np.median(est["se"].to_numpy()[free] / se0) > 1.0
        rep = r.extra["missing"]
        assert set(rep) == set(s.names) and all("little" in v for v in rep.values())


@pytest.mark.filterwarnings("ignore::invariance.ImproperSolutionWarning")
def test_listwise_is_the_default_and_reported(hs):
    d = _delete(hs, 0.05, 9)
    X = d[ITEMS].to_numpy(dtype=float)
    s = sample_stats(d, ITEMS, "school")
    assert all(g.missing.method == "listwise" for g in s.groups)
    assert s.n_total == int((~np.isnan(X).any(axis=1)).sum())
    assert sum(g.missing.n_dropped for g in s.groups) == int(np.isnan(X).any(axis=1).sum())
    r = fit(build_level(STRUCT, s.names, "configural"), s)
    assert "likelihood" not in r.extra and r.extra["missing"][s.names[0]]["method"] == "listwise"


def test_missing_data_errors_are_one_line():
    rng = np.random.default_rng(0)
    X = rng.standard_normal((50, 3))
    X[:25, 0] = np.nan
    X[25:, 1] = np.nan
    with pytest.raises(DataError, match="never observed together"):
        stats_from_arrays([X], ["g"], ["a", "b", "c"], missing="fiml")
    with pytest.raises(DataError, match="missing-data method"):
        stats_from_arrays([X], ["g"], ["a", "b", "c"], missing="pairwise")


def test_patterns_bookkeeping():
    X = np.array([[1, 2, np.nan], [1, np.nan, np.nan], [3, 4, 5], [np.nan, 1, 2], [2, 2, np.nan.__float__()]])
    pat = missing_patterns(X)
    assert pat.n_patterns == 4
    assert pat.counts.sum() == 5
    assert pat.observed[0].all()  # most-observed pattern first
    for k, rows in enumerate(pat.rows):
        assert np.array_equal(~np.isnan(X[rows]), np.repeat(pat.observed[k][None], rows.size, 0))


def test_pattern_moments_equal_numpy_per_pattern(hs):
    X = _delete(hs, 0.15, 3, empty_rows=2)[ITEMS].to_numpy(dtype=float)
    pm = pattern_moments(X)
    pat = missing_patterns(X)
    ref = [(o, X[rows][:, o]) for o, rows in zip(pat.observed, pat.rows) if o.any()]
    assert pm.observed.shape[0] == len(ref) and pm.n == X.shape[0] - 2
    for k, (o, xo) in enumerate(ref):
        assert np.array_equal(pm.observed[k], o) and pm.counts[k] == xo.shape[0]
        # numpy mean and covariance (divisor n) of each pattern's observed block
        assert np.allclose(pm.means[k][o], xo.mean(axis=0), rtol=1e-12, atol=1e-12)
        assert np.allclose(pm.covs[k][np.ix_(o, o)], np.atleast_2d(np.cov(xo.T, ddof=0)), rtol=1e-10, atol=1e-12)
        assert not pm.means[k][~o].any() and not pm.covs[k][~o].any() and not pm.covs[k][:, ~o].any()


def test_pattern_terms_through_always_observed_items_equal_each_block(hs):
    # values missing on x2, x5, x8 only: the other six items are observed in every
    # pattern, so the blocks go through their Schur complement (interleaved item order)
    rng = np.random.default_rng(5)
    X = hs[ITEMS].to_numpy(dtype=float, copy=True)
    for j in (1, 4, 7):
        X[rng.random(X.shape[0]) < 0.25, j] = np.nan
    pm = pattern_moments(X)
    assert pm.blocks.schur and pm.observed.shape[0] == 8
    mean = np.nanmean(X, axis=0)
    cov = np.cov(np.where(np.isnan(X), mean, X).T) + 0.1 * np.eye(9)
    W, logdet, _ = pattern_terms(pm, mean, cov)
    for k, o in enumerate(pm.observed):
        block = cov[np.ix_(o, o)]
        # numpy.linalg inv and slogdet of each observed block: the direct computation
        assert np.allclose(W[k][np.ix_(o, o)], np.linalg.inv(block), rtol=1e-10, atol=1e-12)
        assert np.all(W[k][~o] == 0) and np.all(W[k][:, ~o] == 0)
        assert logdet[k] == pytest.approx(np.linalg.slogdet(block)[1], rel=1e-12)
    # a covariance whose x2 block is not positive definite fails like the direct blocks
    bad = cov.copy()
    bad[1, 1] = 0.01 * bad[1, 1]
    assert any(np.linalg.eigvalsh(bad[np.ix_(o, o)])[0] <= 0 for o in pm.observed)
    with pytest.raises(np.linalg.LinAlgError):
        pattern_terms(pm, mean, bad)


@pytest.mark.parametrize("level", ["configural", "scalar"])
def test_fiml_hessian_against_finite_differences_of_the_gradient(hs, level):
    d = _delete(hs, 0.15, 5)
    s = sample_stats(d, ITEMS, "school", missing="fiml")
    spec = build_level(STRUCT, s.names, level)
    obj = FIMLObjective(spec, s)
    theta = start_values(spec, s) * 1.05
    H = obj.hessian(theta)
    h = 1e-6
    cols = np.linspace(0, spec.n_params - 1, 12).astype(int)  # a spread of parameters of every kind
    fd = np.column_stack([
        (obj.derivatives(theta + h * e, information=False)[1] - obj.derivatives(theta - h * e, information=False)[1]) / (2 * h)
        for e in np.eye(spec.n_params)[cols]
    ])
    # central differences of the analytic gradient (checked above against the value)
    assert np.allclose(H[:, cols], fd, rtol=1e-5, atol=1e-6 * np.abs(fd).max())
    # with complete data it is the complete-data ML Hessian
    full = FIMLObjective(spec, sample_stats(hs, ITEMS, "school", missing="fiml")).hessian(theta)
    ref = MLObjective(spec, sample_stats(hs, ITEMS, "school")).hessian(theta)
    assert np.allclose(full, ref, rtol=1e-9, atol=1e-9)


def test_fiml_observed_information_standard_errors(hs):
    d = _delete(hs, 0.15, 8)
    s = sample_stats(d, ITEMS, "school", missing="fiml")
    spec = build_level(STRUCT, s.names, "metric")
    r_obs = fit(spec, s, information="observed")
    r_exp = fit(spec, s)
    obj = FIMLObjective(spec, s)
    assert np.allclose(r_obs.acov, 2 * np.linalg.inv(obj.hessian(r_obs.theta)), rtol=1e-8)
    assert not np.allclose(r_obs.se, r_exp.se, rtol=1e-3)  # a different information was used
    # complete data: FIML observed SEs are the complete-data ML observed SEs
    a = fit(spec, sample_stats(hs, ITEMS, "school"), information="observed")
    b = FIMLObjective(spec, sample_stats(hs, ITEMS, "school", missing="fiml"))
    assert np.allclose(a.se, np.sqrt(np.diag(2 * np.linalg.inv(b.hessian(a.theta)))), rtol=1e-7)
