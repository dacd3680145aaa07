"""Reliability and dimensionality indices (Rodriguez, Reise & Haviland 2016; Reise 2012)."""

import numpy as np
import pytest

from invariance import Structure, build_level, fit
from invariance.data.moments import GroupStats, SampleStats
from invariance.effects import coefficient_alpha, construct_reliability, omega, quality_indices


def _one_group(sigma, items):
    return SampleStats(tuple(items), (GroupStats("all", 1000, np.zeros(len(items)), sigma),))


def test_omega_equals_alpha_for_tau_equivalent_population():
    # Known identity: for tau-equivalent items (equal loadings, any residual variances)
    # omega of the sum equals coefficient alpha (Novick & Lewis 1967; McDonald 1999).
    lam = np.full(5, 0.7)
    th = np.array([0.3, 0.5, 0.8, 0.4, 1.1])
    sigma = np.outer(lam, lam) + np.diag(th)
    assert omega(lam, th) == pytest.approx(coefficient_alpha(sigma), rel=1e-12)
    # congeneric items: alpha is a lower bound (strictly below omega)
    lam2 = np.array([0.4, 0.9, 0.6, 0.7, 0.5])
    assert coefficient_alpha(np.outer(lam2, lam2) + np.diag(th)) < omega(lam2, th)


def test_fitted_parallel_population_omega_equals_standardized_alpha():
    # Parallel population (equal loadings and residuals): the standardized solution is
    # tau-equivalent, so the fitted omega equals alpha of the correlation matrix.
    items = [f"y{k}" for k in range(5)]
    sigma = 0.49 * np.ones((5, 5)) + np.diag(np.full(5, 0.6))
    stats = _one_group(sigma, items)
    st_ = Structure({"f": tuple(items)}, family="single")
    res = fit(build_level(st_, stats.names, "configural"), stats)
    q = quality_indices(res, st_)[0]
    d = np.sqrt(np.diag(sigma))
    assert q.factors["f"]["omega"] == pytest.approx(coefficient_alpha(sigma / np.outer(d, d)), abs=1e-6)


def test_bifactor_indices_against_hand_calculation():
    # Invented population, standardized: 9 items, general loadings .6, three specific
    # factors of 3 items with loadings .4, residuals .48. Hand calculation from the
    # formulas of METHODS section 10:
    #   sum g = 5.4 -> 29.16; each specific sum 1.2 -> 1.44 (x3 = 4.32); sum theta = 4.32
    #   omega  = 33.48 / 37.80 = .885714     omegaH = 29.16 / 37.80 = .771429
    #   ECV    = 3.24 / 4.68   = .692308     PUC    = 1 - 9/36      = .75
    #   omegaS = (1.8^2 + 1.44) / (4.68 + 1.44) = .764706; omegaHS = 1.44 / 6.12 = .235294
    #   H(g)   = 5.0625 / 6.0625 = .835052 (sum .36/.64 = 5.0625); H(s) = .571429/1.571429 = .363636
    #   ECV(s) = .48 / 4.68 = .102564;  specific share inside its subscale = .48 / 1.56 = .307692
    items = [f"y{k}" for k in range(9)]
    L = np.zeros((9, 4))
    L[:, 3] = 0.6
    L[np.arange(9), np.repeat([0, 1, 2], 3)] = 0.4
    sigma = L @ L.T + np.diag(np.full(9, 0.48))
    st_ = Structure({"a": tuple(items[:3]), "b": tuple(items[3:6]), "c": tuple(items[6:])}, family="bifactor", general="g")
    res = fit(build_level(st_, ("all",), "configural"), _one_group(sigma, items))
    assert res.fit.chi2 == pytest.approx(0.0, abs=1e-6)
    q = quality_indices(res, st_)[0]
    assert q.overall["omega"] == pytest.approx(0.885714, abs=1e-5)
    assert q.overall["omega_h"] == pytest.approx(0.771429, abs=1e-5)
    assert q.overall["ecv"] == pytest.approx(0.692308, abs=1e-5)
    assert q.overall["puc"] == pytest.approx(0.75, abs=1e-12)
    for s in "abc":
        f = q.factors[s]
        assert f["omega_s"] == pytest.approx(0.764706, abs=1e-5)
        assert f["omega_hs"] == pytest.approx(0.235294, abs=1e-5)
        assert f["ecv"] == pytest.approx(0.102564, abs=1e-5)
        assert f["ecv_subscale"] == pytest.approx(0.307692, abs=1e-5)
        assert f["H"] == pytest.approx(0.363636, abs=1e-5)
    assert q.factors["g"]["H"] == pytest.approx(0.835052, abs=1e-5)
    # ECVs add up to one
    assert q.overall["ecv"] + sum(q.factors[s]["ecv"] for s in "abc") == pytest.approx(1.0)
    # determinacy (Grice 2001); for orthogonal factors it equals sqrt(l' Sigma^-1 l)
    for k, name in enumerate("abcg"):
        want = np.sqrt(L[:, k] @ np.linalg.solve(sigma, L[:, k]))
        assert q.factors[name]["determinacy"] == pytest.approx(want, abs=1e-5)
    assert q.to_dict()["family"] == "bifactor"


def test_construct_reliability_formula():
    # Hancock & Mueller (2001): H = 1 / (1 + 1 / sum(l^2 / (1 - l^2))), by hand for .5, .6
    s = 0.25 / 0.75 + 0.36 / 0.64
    assert construct_reliability(np.array([0.5, 0.6])) == pytest.approx(1 / (1 + 1 / s))


def test_second_order_omega_hierarchical():
    # Second-order population (invented): omega_h of the higher-order factor is the
    # squared sum of the Schmid-Leiman products over the variance of the sum score.
    items = [f"y{k}" for k in range(9)]
    lam1 = np.full(9, 0.7)
    gam = np.array([0.8, 0.6, 0.7])
    mem = np.repeat([0, 1, 2], 3)
    L = np.zeros((9, 3))
    L[np.arange(9), mem] = lam1
    phi = np.outer(gam, gam) + np.diag(1 - gam**2)
    sigma = L @ phi @ L.T + np.diag(np.full(9, 0.51))
    st_ = Structure({"a": tuple(items[:3]), "b": tuple(items[3:6]), "c": tuple(items[6:])}, family="second_order", general="h")
    res = fit(build_level(st_, ("all",), "configural"), _one_group(sigma, items))
    q = quality_indices(res, st_)[0]
    gl = lam1 * gam[mem]
    assert q.overall["omega_h"] == pytest.approx(gl.sum() ** 2 / sigma.sum(), abs=1e-5)
    assert q.overall["omega"] == pytest.approx(1 - 9 * 0.51 / sigma.sum(), abs=1e-5)
    assert q.factors["a"]["omega"] == pytest.approx(2.1**2 / (2.1**2 + 3 * 0.51), abs=1e-5)
