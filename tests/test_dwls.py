"""DWLS estimator for ordered items: derivatives, an analytic just-identified case,
the sandwich against the delta method, calibration of the scale-shift statistic."""

import os
import sys

import numpy as np
import pytest

sys.path.insert(0, os.path.dirname(__file__))
from ordinal_sim import simulate_one_factor  # noqa: E402

from invariance.estimate.dwls import DWLSObjective, ordinal_start_values
from invariance.estimate.dwls_robust import fit_dwls
from invariance.model import Structure
from invariance.data.ordinal_stats import ordinal_stats_from_arrays
from invariance.model.ordinal_levels import build_ordinal_level

CUTS4 = np.array([[-1.0, 0.0, 0.9], [-0.6, 0.3, 1.2], [-1.3, -0.2, 0.6],
                  [-0.8, 0.1, 1.0], [-1.1, -0.4, 0.8], [-0.5, 0.5, 1.4]])


def _one_factor(p):
    items = [f"y{i + 1}" for i in range(p)]
    return Structure(factors={"f": tuple(items)}, family="single"), items


def test_gradient_matches_finite_differences():
    # analytic Jacobian of the standardized thresholds and correlations
    rng = np.random.default_rng(11)
    st, items = _one_factor(6)
    loads = np.array([0.7, 0.6, 0.5, 0.65, 0.55, 0.6])
    arrs = [simulate_one_factor(rng, 500, loads, CUTS4), simulate_one_factor(rng, 500, loads, CUTS4, mean=0.3)]
    ost = ordinal_stats_from_arrays(arrs, ["a", "b"], items)
    for level in ("thresholds", "scalar"):
        spec = build_ordinal_level(st, ["a", "b"], level, ost.n_categories)
        obj = DWLSObjective(spec, ost)
        x = ordinal_start_values(spec, ost) + rng.normal(0, 0.05, spec.n_params)
        _, g, _ = obj.derivatives(x)
        e = 1e-6
        num = np.array([(obj.value(x + e * np.eye(x.size)[k]) - obj.value(x - e * np.eye(x.size)[k])) / (2 * e)
                        for k in range(x.size)])
        np.testing.assert_allclose(g, num, rtol=1e-5, atol=1e-5)


def _closed_form(s, nt, K):
    """Theta-parameterization estimates of a one-factor model on three items from its
    statistics: lambda*_1 = sqrt(r12 r13 / r23) (Spearman's triad), lambda =
    lambda* / sqrt(1 - lambda*^2), tau = tau* / sqrt(1 - lambda*^2)."""
    r12, r13, r23 = s[nt:]
    ls = np.sqrt(np.array([r12 * r13 / r23, r12 * r23 / r13, r13 * r23 / r12]))
    sc = 1 / np.sqrt(1 - ls**2)
    taus, k = [], 0
    for i in range(3):
        taus.append(s[k:k + K[i] - 1] * sc[i])
        k += K[i] - 1
    return ls * sc, np.concatenate(taus)


def test_just_identified_closed_form_and_delta_method():
    rng = np.random.default_rng(3)
    st, items = _one_factor(3)
    loads = np.array([0.75, 0.6, 0.5])
    x = simulate_one_factor(rng, 800, loads, CUTS4[:3])
    ost = ordinal_stats_from_arrays([x], ["all"], items)
    spec = build_ordinal_level(st, ["all"], "configural", ost.n_categories)
    res = fit_dwls(spec, ost)
    assert spec.df == 0 and res.fit.chi2 < 1e-12
    f = ost.fits[0]
    lam, tau = _closed_form(f.stats, f.n_thresholds, ost.n_categories)
    labels = spec.param_labels
    est_l = np.array([res.theta[labels.index(f"loading:{it}<-f|all")] for it in items])
    np.testing.assert_allclose(est_l, lam, rtol=1e-6)
    # robust (sandwich) ACOV = delta method J V J' for a just-identified model
    order = [labels.index(f"loading:{it}<-f|all") for it in items]
    order += [labels.index(f"threshold:{it}#{k + 1}|all") for it in items for k in range(3)]
    def mapping(s):
        l_, t_ = _closed_form(s, f.n_thresholds, ost.n_categories)
        return np.concatenate([l_, t_])
    e = 1e-6
    J = np.stack([(mapping(f.stats + e * np.eye(f.stats.size)[k]) - mapping(f.stats - e * np.eye(f.stats.size)[k])) / (2 * e)
                  for k in range(f.stats.size)], 1)
    delta_acov = J @ f.acov @ J.T
    np.testing.assert_allclose(res.acov[np.ix_(order, order)], delta_acov, rtol=1e-4, atol=1e-10)


def test_scale_shift_statistic_is_calibrated():
    # Monte Carlo under a correct model: the mean-and-variance adjusted statistic has
    # mean close to its df (Asparouhov & Muthen 2010); the unadjusted DWLS value does not
    rng = np.random.default_rng(2024)
    st, items = _one_factor(6)
    loads = np.array([0.7, 0.6, 0.5, 0.65, 0.55, 0.6])
    tmv, t = [], []
    for _ in range(80):
        ost = ordinal_stats_from_arrays([simulate_one_factor(rng, 400, loads, CUTS4)], ["all"], items)
        res = fit_dwls(build_ordinal_level(st, ["all"], "configural", ost.n_categories), ost)
        tmv.append(res.extra["robust"]["chi2_scaled_shifted"])
        t.append(res.fit.chi2)
    df = res.fit.df
    assert df == 9
    assert np.mean(tmv) == pytest.approx(df, rel=0.15)
    assert np.mean(t) < 0.7 * df
    assert 0.02 < np.mean(np.array([r for r in tmv]) > 16.919) < 0.12  # chi2(9) .95 quantile 16.919


def test_group_order_does_not_change_fit():
    rng = np.random.default_rng(5)
    st, items = _one_factor(5)
    loads = np.array([0.7, 0.6, 0.5, 0.65, 0.55])
    arrs = [simulate_one_factor(rng, 400, loads, CUTS4[:5]), simulate_one_factor(rng, 400, loads, CUTS4[:5], mean=0.4)]
    a = ordinal_stats_from_arrays(arrs, ["a", "b"], items)
    b = ordinal_stats_from_arrays(arrs[::-1], ["b", "a"], items)
    ra = fit_dwls(build_ordinal_level(st, ["a", "b"], "scalar", a.n_categories, reference="a"), a)
    rb = fit_dwls(build_ordinal_level(st, ["b", "a"], "scalar", b.n_categories, reference="a"), b)
    assert ra.fit.chi2 == pytest.approx(rb.fit.chi2, rel=1e-7)
    assert ra.extra["robust"]["chi2_scaled_shifted"] == pytest.approx(rb.extra["robust"]["chi2_scaled_shifted"], rel=1e-6)


def test_robust_se_and_difference_monte_carlo():
    # Monte Carlo under a true metric-invariant two-group population: the sandwich SE of a
    # loading matches the spread of its estimates, and the Satorra (2000) scale-shifted
    # difference thresholds -> metric has mean close to its df
    from invariance.estimate.dwls_robust import dwls_difference

    rng = np.random.default_rng(99)
    st, items = _one_factor(5)
    loads = np.array([0.7, 0.6, 0.5, 0.65, 0.55])
    est, se, dadj = [], [], []
    for _ in range(60):
        arrs = [simulate_one_factor(rng, 500, loads, CUTS4[:5]), simulate_one_factor(rng, 500, loads, CUTS4[:5], mean=0.3)]
        ost = ordinal_stats_from_arrays(arrs, ["a", "b"], items)
        thr = fit_dwls(build_ordinal_level(st, ["a", "b"], "thresholds", ost.n_categories), ost)
        met = fit_dwls(build_ordinal_level(st, ["a", "b"], "metric", ost.n_categories), ost)
        j = met.spec.param_labels.index("loading:y1<-f")
        est.append(met.theta[j])
        se.append(met.se[j])
        dadj.append(dwls_difference(met, thr, ost)["chi2"])
    assert np.std(est) == pytest.approx(np.mean(se), rel=0.2)
    assert np.mean(dadj) == pytest.approx(4.0, rel=0.25)       # ddf = p - 1 = 4


def test_fit_front_door_dispatches_ordinal_stats():
    from invariance.estimate import fit

    rng = np.random.default_rng(6)
    st, items = _one_factor(4)
    ost = ordinal_stats_from_arrays([simulate_one_factor(rng, 300, np.full(4, 0.6), CUTS4[:4])], ["all"], items)
    spec = build_ordinal_level(st, ["all"], "configural", ost.n_categories)
    res = fit(spec, ost)
    assert res.estimator == "dwls" and res.converged
    assert res.fit.chi2 == pytest.approx(fit_dwls(spec, ost).fit.chi2, rel=1e-9)


def test_robust_rmsea_interval_brackets_the_estimate():
    # Brosseau-Liard, Savalei & Li (2012): interval of T/c inverted, scaled by c; the
    # point estimate sqrt(max(T - c df, 0)/(N df)) lies inside it
    rng = np.random.default_rng(17)
    st, items = _one_factor(6)
    loads = np.array([0.7, 0.6, 0.5, 0.65, 0.55, 0.6])
    x = simulate_one_factor(rng, 600, loads, CUTS4)
    x[:, 5] = simulate_one_factor(rng, 600, loads, CUTS4)[:, 5]   # one item off the factor: misfit
    ost = ordinal_stats_from_arrays([x], ["all"], items)
    rob = fit_dwls(build_ordinal_level(st, ["all"], "configural", ost.n_categories), ost).extra["robust"]
    lo, hi = rob["rmsea_robust_ci90"]
    assert lo <= rob["rmsea_robust"] <= hi and hi > lo


def test_item_order_does_not_change_fit():
    # property: relabelling (reordering) items leaves the fit unchanged
    rng = np.random.default_rng(21)
    st, items = _one_factor(5)
    cuts = [CUTS4[0], CUTS4[1][:2], CUTS4[2], CUTS4[3][:1], CUTS4[4]]
    x = simulate_one_factor(rng, 500, np.array([0.7, 0.6, 0.5, 0.65, 0.55]), cuts)
    ost = ordinal_stats_from_arrays([x], ["all"], items)
    rev = ordinal_stats_from_arrays([x[:, ::-1]], ["all"], items[::-1])
    a = fit_dwls(build_ordinal_level(st, ["all"], "configural", ost.n_categories), ost)
    b = fit_dwls(build_ordinal_level(st, ["all"], "configural", ost.n_categories), rev)   # reordered inside
    assert a.fit.chi2 == pytest.approx(b.fit.chi2, rel=1e-8)
    np.testing.assert_allclose(rev.reorder_items(items).fits[0].acov, ost.fits[0].acov, atol=1e-14)
