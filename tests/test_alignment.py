"""Alignment (Asparouhov & Muthen 2014; METHODS section 11): recovery on a seeded
20-group simulation with planted intercept noninvariance, the analytic gradient, and
the refusals."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from invariance import SpecificationError, Structure, build_level, fit
from invariance.partial.alignment import align, alignment_loss, simplicity
from invariance.data.moments import stats_from_arrays

G, P, N = 20, 6, 400
ITEMS = tuple(f"q{i + 1}" for i in range(P))
#: planted intercept shifts (item index, group index) -> size (invented recovery simulation)
SHIFTS = {(3, 4): 0.6, (3, 9): 0.6, (3, 14): 0.6, (5, 2): -0.6, (5, 11): -0.6}


def _simulate(seed: int = 20261201):
    rng = np.random.default_rng(seed)
    lam = np.array([0.8, 0.7, 0.75, 0.6, 0.65, 0.7])
    nu = np.array([3.0, 2.5, 3.2, 2.8, 3.0, 2.6])
    theta = 1 - 0.8 * lam**2
    alpha = rng.normal(0, 0.5, G)
    alpha[0] = 0.0
    psi = rng.uniform(0.6, 1.4, G)
    psi[0] = 1.0
    data = []
    for g in range(G):
        nug = nu.copy()
        for (i, gg), d in SHIFTS.items():
            if gg == g:
                nug[i] += d
        mu = nug + lam * alpha[g]
        sigma = psi[g] * np.outer(lam, lam) + np.diag(theta)
        data.append(rng.multivariate_normal(mu, sigma, size=N))
    stats = stats_from_arrays(data, [f"c{g:02d}" for g in range(G)], ITEMS)
    return stats, alpha, psi


@pytest.fixture(scope="module")
def aligned():
    stats, alpha, psi = _simulate()
    structure = Structure({"F": ITEMS}, family="single")
    res = fit(build_level(structure, stats.names, "configural"), stats)
    assert res.converged
    return res, align(res), stats, alpha, psi


def test_recovers_planted_means(aligned):
    res, al, stats, alpha, psi = aligned
    means = np.array([al.means["F"][g] for g in stats.names])
    # issue 8 acceptance: correlation with the planted means at least .95
    assert np.corrcoef(means, alpha)[0, 1] >= 0.95
    variances = np.array([al.variances["F"][g] for g in stats.names])
    assert np.corrcoef(variances, psi)[0, 1] >= 0.8
    # reference group fixed at mean 0, variance 1, standard error 0
    assert al.means["F"]["c00"] == 0.0 and al.variances["F"]["c00"] == 1.0
    assert al.means_se["F"]["c00"] == 0.0
    # standard errors positive and of the sampling size expected for N = 400 (~ 1/sqrt(N) scale)
    se = np.array([al.means_se["F"][g] for g in stats.names[1:]])
    assert np.all((se > 0.02) & (se < 0.3))


def test_flags_planted_intercepts(aligned):
    res, al, stats, alpha, psi = aligned
    flagged = {(p.item, g) for p in al.parameters if p.parameter == "intercept" for g in p.noninvariant}
    planted = {(ITEMS[i], f"c{g:02d}") for (i, g) in SHIFTS}
    assert planted <= flagged
    # few false alarms among the 120 invariant intercepts and loadings (alpha_set = .001)
    false = [f for f in al.flagged() if (f[1], f[3]) not in planted]
    assert len(false) <= 3
    d = al.to_dict()
    assert set(d["means"]) == {"F"} and d["means"]["F"]["c00"] == 0.0 and d["variances"]["F"]["c00"] == 1.0


def test_loss_gradient_matches_finite_differences():
    # METHODS section 2 habit: analytic gradients checked against central differences
    rng = np.random.default_rng(3)
    lam0 = rng.uniform(0.4, 1.0, (5, 4))
    nu0 = rng.normal(3, 0.3, (5, 4))
    n = rng.integers(100, 500, 5).astype(float)
    w = np.sqrt(np.outer(n, n))
    np.fill_diagonal(w, 0)
    x = rng.normal(scale=0.4, size=8)
    _, grad = alignment_loss(x, lam0, nu0, w, 1)
    h = 1e-6
    num = np.array([(alignment_loss(x + e, lam0, nu0, w, 1)[0] - alignment_loss(x - e, lam0, nu0, w, 1)[0]) / (2 * h)
                    for e in np.eye(8) * h])
    np.testing.assert_allclose(grad, num, rtol=1e-5, atol=1e-6)
    # the component loss of the original method: f(0) = 0.01 ** 0.25
    assert simplicity(np.array([0.0]))[0][0] == pytest.approx(0.01**0.25)


def test_refuses_non_configural_and_bifactor():
    stats, *_ = _simulate()
    stats = stats.subset(stats.names[:3])
    s = Structure({"F": ITEMS}, family="single")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        scalar = fit(build_level(s, stats.names, "scalar"), stats)
    with pytest.raises(SpecificationError, match="configural"):
        align(scalar)
    bif = Structure({"A": ITEMS[:3], "B": ITEMS[3:]}, family="bifactor", general="G")
    spec = build_level(bif, stats.names, "configural")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit(spec, stats)
    with pytest.raises(SpecificationError, match="bifactor"):
        align(res)


def test_implicit_derivative_matches_resolving():
    # the delta-method Jacobian (implicit function theorem) against re-solving the
    # alignment at perturbed configural estimates (central differences)
    from invariance.partial.alignment import implicit_jacobian, solve_alignment

    rng = np.random.default_rng(7)
    G, k = 5, 4
    lam0 = rng.uniform(0.5, 0.9, k)[None, :] * rng.uniform(0.8, 1.2, G)[:, None] + rng.normal(0, 0.02, (G, k))
    nu0 = rng.normal(3, 0.2, k)[None, :] + rng.normal(0, 0.3, G)[:, None] * lam0
    w = np.full((G, G), 300.0)
    np.fill_diagonal(w, 0)
    x, _, ok = solve_alignment(lam0, nu0, w, 0, random_starts=0)
    assert ok
    J = implicit_jacobian(x, lam0, nu0, w, 0)
    d = rng.normal(size=2 * G * k)
    h = 1e-4
    sol = lambda c: solve_alignment(c[: G * k].reshape(G, k), c[G * k:].reshape(G, k), w, 0, random_starts=0)[0]
    c0 = np.concatenate([lam0.ravel(), nu0.ravel()])
    num = (sol(c0 + h * d) - sol(c0 - h * d)) / (2 * h)
    np.testing.assert_allclose(J @ d, num, rtol=1e-3, atol=1e-4)


def test_group_order_does_not_change_the_solution():
    # property check (STYLE habit 7): permuting the groups permutes the solution
    from invariance.partial.alignment import solve_alignment

    rng = np.random.default_rng(11)
    G, k = 6, 4
    lam0 = rng.uniform(0.5, 0.9, k)[None, :] * rng.uniform(0.8, 1.2, G)[:, None]
    nu0 = rng.normal(3, 0.2, k)[None, :] + rng.normal(0, 0.4, G)[:, None] * lam0
    nu0[2, 1] += 0.7
    n = rng.integers(150, 600, G).astype(float)
    w = np.sqrt(np.outer(n, n))
    np.fill_diagonal(w, 0)
    x, f, _ = solve_alignment(lam0, nu0, w, 0)
    perm = np.array([0, 4, 2, 5, 1, 3])
    xp, fp, _ = solve_alignment(lam0[perm], nu0[perm], w[np.ix_(perm, perm)], 0)
    assert fp == pytest.approx(f, rel=1e-8)
    a = np.r_[0, x[: G - 1]]
    ap = np.r_[0, xp[: G - 1]]
    np.testing.assert_allclose(ap, a[perm], atol=1e-5)


def test_parameter_table(aligned):
    res, al, stats, *_ = aligned
    t = al.parameter_table()
    assert len(t) == 2 * P * G
    row = t[(t.item == "q4") & (t.parameter == "intercept") & (t.group == "c04")].iloc[0]
    assert not row.invariant and row.se > 0
