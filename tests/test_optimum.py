"""Optimization on multi-group bifactor models: global optimum, configural as separate
group fits, full-information ML, run-away solutions, variance bounds, identification.

References outside the project: the ML discrepancy of METHODS section 2 (Joreskog 1969;
Sorbom 1974) written here and minimized by scipy.optimize from many starts; the casewise
normal log-likelihood of scipy.stats.multivariate_normal; semopy fits of Holzinger &
Swineford (1939) by school. The bifactor data are simulated (tests/optimum_sim.py).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import optimize, stats

from invariance.data.moments import sample_stats
from invariance.estimate.ml import fit
from invariance.estimate.objective import MLObjective
from invariance.estimate.separate import group_spec
from invariance.model.levels import build_level
from invariance.model.structure import Structure

import optimum_sim as sim

P = len(sim.ITEMS)


def _bifactor_t(x: np.ndarray, S: np.ndarray, m: np.ndarray, n: int) -> float:
    """T = N [log|Sigma| + tr(S Sigma^-1) - log|S| - p + (m - mu)' Sigma^-1 (m - mu)]
    (METHODS section 2) for one group of the bifactor model: general loadings x[0:12],
    specific loadings x[12:24] (crew on items 1-6, tools on 7-12), residual variances
    x[24:36], intercepts x[36:48]; factor variances 1, covariances 0, means 0."""
    lam = np.zeros((P, 3))
    lam[:, 0] = x[:12]
    lam[:6, 1] = x[12:18]
    lam[6:, 2] = x[18:24]
    sigma = lam @ lam.T + np.diag(x[24:36])
    sign, logdet = np.linalg.slogdet(sigma)
    if sign <= 0 or np.any(x[24:36] <= 0):
        return 1e10
    d = m - x[36:48]
    w = np.linalg.inv(sigma)
    return float(n * (logdet + np.sum(S * w) - np.linalg.slogdet(S)[1] - P + d @ w @ d))


def _scipy_global(S, m, n, *, starts: int = 12, bounds=None) -> float:
    """Lowest T over ``starts`` random starts of scipy's L-BFGS-B (numerical gradient)."""
    rng = np.random.default_rng(7)
    best = np.inf
    sd = np.sqrt(np.diag(S))
    for _ in range(starts):
        x0 = np.concatenate([rng.uniform(0.1, 0.9, 24) * np.tile(sd, 2), 0.5 * np.diag(S), m])
        r = optimize.minimize(_bifactor_t, x0, args=(S, m, n), method="L-BFGS-B", bounds=bounds,
                              options={"maxiter": 20000, "maxfun": 200000, "ftol": 1e-14, "gtol": 1e-8})
        best = min(best, r.fun)
    return best


@pytest.fixture(scope="module")
def two_optima():
    """Seed 17: in group harbor the analytic start alone stops at a local optimum."""
    st = sample_stats(sim.bifactor_frame(seed=17), list(sim.ITEMS), "site")
    return st, build_level(sim.STRUCTURE, st.names, "configural")


def test_global_minimum_matches_scipy_multistart(two_optima):
    st, spec = two_optima
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit(spec, st)
        one_start = fit(spec, st, starts=0)
    g = st.groups[st.names.index("harbor")]
    ref = _scipy_global(g.cov, g.mean, g.n)  # independent reference: scipy from 12 starts
    harbor = res.extra["groups"]["harbor"]
    assert harbor.fit.chi2 == pytest.approx(ref, abs=1e-3)
    # the analytic start alone lands on the other optimum, about 2 points higher
    assert one_start.extra["groups"]["harbor"].fit.chi2 > ref + 1.0
    assert res.fit.chi2 < one_start.fit.chi2 - 1.0
    rec = harbor.extra["estimation"]["starts"]
    assert rec["distinct_optima"] == 2 and rec["chi2_gap"] > 1.0 and rec["tried"] == 4
    assert res.extra["estimation"]["starts"]["harbor"] == rec


def test_configural_is_the_sum_of_group_fits_and_a_joint_optimum(two_optima):
    st, spec = two_optima
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit(spec, st)
    parts = res.extra["groups"]
    for k in ("chi2", "df", "loglik", "n_params", "baseline_chi2"):
        assert getattr(res.fit, k) == pytest.approx(sum(getattr(p.fit, k) for p in parts.values()), rel=1e-12)
    # the joint objective at the combined estimates: same value, zero gradient (a joint optimum)
    obj = MLObjective(spec, st)
    t, grad, _ = obj.derivatives(res.theta)
    assert t == pytest.approx(res.fit.chi2, rel=1e-10)
    assert np.max(np.abs(grad)) < 1e-4
    # the single-group model of a group holds exactly that group's entries
    sub = group_spec(spec, 1)
    assert sub.groups == ("ridge",) and sub.n_params == spec.n_params // 3


def test_robust_configural_traces_add_up(two_optima):
    from invariance.estimate.robust import H1Moments, scaling_trace

    st, spec = two_optima
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit(spec, st, estimator="ml_robust")
    # scaling factor of the joint model computed in one piece (Satorra & Bentler 1994)
    c = scaling_trace(spec, res.theta, H1Moments(st)) / spec.df
    assert res.extra["scaling_factor"] == pytest.approx(c, rel=1e-8)
    assert res.extra["chi2_scaled"] == pytest.approx(res.fit.chi2 / c, rel=1e-8)


def test_holzinger_swineford_by_school_equals_semopy_per_school(hs_frame):
    import semopy

    structure = Structure({"visual": ["x1", "x2", "x3"], "textual": ["x4", "x5", "x6"], "speed": ["x7", "x8", "x9"]})
    items = list(structure.items)
    st = sample_stats(hs_frame, items, "school")
    res = fit(build_level(structure, st.names, "configural"), st)
    desc = "visual =~ x1 + x2 + x3\ntextual =~ x4 + x5 + x6\nspeed =~ x7 + x8 + x9"
    total = 0.0
    for school, part in hs_frame.groupby("school"):
        m = semopy.Model(desc)
        m.fit(part[items])
        t = semopy.calc_stats(m)["chi2"].iloc[0]
        total += t
        assert res.extra["groups"][school].fit.chi2 == pytest.approx(t, rel=2e-4)
    assert res.fit.chi2 == pytest.approx(total, rel=2e-4)
    assert res.fit.df == 48  # METHODS section 12: 24 df per school
    whole = fit(build_level(structure, ("all",), "configural"),
                sample_stats(hs_frame.assign(all="all"), items, "all"))
    assert whole.fit.chi2 == pytest.approx(85.306, abs=1e-3) and whole.fit.df == 24  # METHODS section 12


def test_fiml_equals_casewise_scipy_maximum():
    rng = np.random.default_rng(11)
    items = ["a1", "a2", "a3", "a4"]
    lam, theta, nu = np.array([0.8, 0.7, 0.6, 0.5]), np.array([0.4, 0.5, 0.6, 0.7]), np.array([1.0, 2.0, 1.5, 0.5])
    sigma = np.outer(lam, lam) + np.diag(theta)
    x = rng.multivariate_normal(nu, sigma, size=160)
    x[rng.random(x.shape) < 0.15] = np.nan
    x = x[~np.all(np.isnan(x), axis=1)]
    import pandas as pd

    frame = pd.DataFrame(x, columns=items).assign(site="one")
    st = sample_stats(frame, items, "site", missing="fiml")
    res = fit(build_level(Structure({"f": items}), st.names, "configural"), st)
    mats = res.group_matrices("one")

    observed = ~np.isnan(x)
    pats = {tuple(o) for o in observed}
    blocks = [(np.array(o), x[np.all(observed == np.array(o), axis=1)][:, np.array(o)]) for o in pats]

    def m2ll(z):  # -2 log-likelihood, casewise (scipy.stats.multivariate_normal), cases of a pattern at once
        sig = np.outer(z[:4], z[:4]) + np.diag(z[4:8])
        if np.any(z[4:8] <= 0):
            return 1e10
        total = 0.0
        for o, rows in blocks:
            total += np.sum(np.atleast_1d(stats.multivariate_normal.logpdf(rows, z[8:][o], sig[np.ix_(o, o)])))
        return -2.0 * total

    z0 = np.concatenate([np.full(4, 0.5), np.full(4, 0.5), np.nanmean(x, axis=0)])
    ref = optimize.minimize(m2ll, z0, method="BFGS", options={"gtol": 1e-6})
    est = np.concatenate([np.abs(mats["lambda"][:, 0]), np.diag(mats["theta"]), mats["nu"]])
    assert est == pytest.approx(np.concatenate([np.abs(ref.x[:4]), ref.x[4:]]), abs=2e-3)
    assert -2.0 * res.fit.loglik == pytest.approx(ref.fun, abs=1e-3)


def test_warm_start_that_fails_falls_back_to_cold_start(two_optima):
    st, spec = two_optima
    metric = build_level(sim.STRUCTURE, st.names, "metric")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cold = fit(metric, st)
        warm = fit(metric, st, start=np.zeros(metric.n_params))  # implied covariance singular
    assert warm.converged and warm.fit.chi2 == pytest.approx(cold.fit.chi2, abs=1e-6)
    assert warm.extra["estimation"]["starts"]["chosen"] != "warm"


def test_running_away_tells_divergence_from_slow_convergence():
    from invariance.estimate.optimize import RUNAWAY_WINDOW, running_away

    k = np.arange(RUNAWAY_WINDOW + 5)[:, None]
    slow = 1.0 + 0.9**k * np.array([[1.0, -2.0]])  # linear convergence, rate 0.9
    away = np.hstack([-0.5 - 0.01 * k * (1 + 0.02 * k), 0.3 + 0.002 * k * (1 + 0.01 * k)])  # steps that grow
    assert running_away(list(slow)).size == 0
    assert running_away(list(away)).tolist() == [0, 1]
    assert running_away(list(away[:RUNAWAY_WINDOW])).size == 0  # not judged before a full window


def test_ordinal_collapse_is_caught_early_and_named():
    import pandas as pd

    from invariance.data.ordinal_stats import ordinal_stats
    from invariance.estimate.dwls_robust import fit_dwls
    from invariance.model.ordinal_levels import build_ordinal_level
    from ordinal_sim import simulate_bifactor

    rng = np.random.default_rng(4)
    blocks, cuts = np.array([0] * 6 + [1] * 6), np.tile([-1.0, 0.0, 1.0], (12, 1))
    parts = []
    for name in sim.GROUPS:
        lg, ls = np.full(12, 0.6), np.full(12, 0.4)
        if name == "ridge":
            lg[8], ls[8] = 0.25, 0.96  # so09 nearly all specific: a collapse waiting to happen
        y = simulate_bifactor(rng, 800, loads_g=lg, loads_s=ls, blocks=blocks, cuts=cuts)
        parts.append(pd.DataFrame(y, columns=sim.ITEMS).assign(site=name))
    st = ordinal_stats(pd.concat(parts, ignore_index=True), list(sim.ITEMS), "site")
    spec = build_ordinal_level(sim.STRUCTURE, st.names, "configural", st.n_categories)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit_dwls(spec, st)
    assert not res.converged and res.status.startswith("estimates diverge")
    said = [p for p in res.problems if "collapses onto item" in p]
    assert said and said[0].startswith("in group ") and "grow without bound" in said[0]
    assert res.extra["estimation"]["optimum"].startswith("no finite optimum")
    assert np.abs(res.theta).max() < 20  # stopped within tens of iterations, long before loadings near 200
