"""dMACS (Nye & Drasgow 2011) and sum-score bias."""

import numpy as np
import pytest
from scipy import integrate, stats as st

from invariance import Structure, build_level, fit
from invariance.data.moments import GroupStats, SampleStats
from invariance.effects import dmacs_value, item_effects, pooled_sd, scale_bias
from invariance.model import Release


def test_closed_form_one_factor_against_quad():
    # Nye & Drasgow (2011) definition, integrated numerically with scipy.integrate.quad
    nu_r, lam_r, nu_f, lam_f, a, v, sd = 3.0, 0.8, 2.7, 0.5, 0.4, 1.3, 1.1
    f = lambda x: ((nu_r + lam_r * x) - (nu_f + lam_f * x)) ** 2 * st.norm.pdf(x, a, np.sqrt(v))
    num, _ = integrate.quad(f, -np.inf, np.inf)
    got = dmacs_value(nu_r, np.array([lam_r]), nu_f, np.array([lam_f]), np.array([a]), np.array([[v]]), sd)
    assert got == pytest.approx(np.sqrt(num) / sd, rel=1e-8)


def test_closed_form_two_factors_against_dblquad():
    # Multi-factor (bifactor item) form vs scipy.integrate.dblquad over N(alpha, Phi)
    lam_r, lam_f = np.array([0.7, 0.4]), np.array([0.5, 0.45])
    nu_r, nu_f = 1.0, 1.2
    mean = np.array([-0.3, 0.2])
    cov = np.array([[1.2, 0.0], [0.0, 0.8]])
    mvn = st.multivariate_normal(mean, cov)

    def f(y, x):
        xi = np.array([x, y])
        return ((nu_r + lam_r @ xi) - (nu_f + lam_f @ xi)) ** 2 * mvn.pdf(xi)

    num, _ = integrate.dblquad(f, -8, 8, -8, 8, epsabs=1e-10)
    got = dmacs_value(nu_r, lam_r, nu_f, lam_f, mean, cov, 0.9)
    assert got == pytest.approx(np.sqrt(num) / 0.9, rel=1e-6)


def test_pooled_sd_formula():
    # Nye & Drasgow (2011) pooled SD, by hand: ((99*4 + 199*9) / 298) ** .5
    assert pooled_sd(4.0, 100, 9.0, 200) == pytest.approx(np.sqrt((99 * 4 + 199 * 9) / 298))


def _population_stats(sigmas, mus, n=500):
    items = tuple(f"y{k}" for k in range(1, 5))
    return SampleStats(items, tuple(GroupStats(g, n, mu, s) for g, s, mu in zip(("R", "F"), sigmas, mus)))


def test_fitted_partial_scalar_model_recovers_population_dmacs():
    # Exact population moments (invented): y2 intercept +0.5 and loading 0.4 (vs 0.8) in F.
    lam = np.array([0.7, 0.8, 0.6, 0.75])
    theta = np.diag([0.5, 0.4, 0.6, 0.45])
    nu = np.array([2.0, 3.0, 2.5, 1.5])
    lam_f, nu_f = lam.copy(), nu.copy()
    lam_f[1], nu_f[1] = 0.4, 3.5
    a_f, v_f = 0.5, 1.4
    s_r = np.outer(lam, lam) + theta
    s_f = v_f * np.outer(lam_f, lam_f) + theta
    stats = _population_stats([s_r, s_f], [nu, nu_f + lam_f * a_f])
    st_ = Structure({"f": stats.items}, family="single")
    rel = (Release("loading", "y2", "f"), Release("intercept", "y2"))
    res = fit(build_level(st_, stats.names, "scalar", released=rel), stats)
    assert res.fit.chi2 == pytest.approx(0.0, abs=1e-6)
    eff = {e.item: e for e in item_effects(res, stats)}
    # population value from the closed form (pooled SD from the population variances)
    sd = pooled_sd(s_r[1, 1] * 500 / 499, 500, s_f[1, 1] * 500 / 499, 500)
    want = np.sqrt(((nu[1] - nu_f[1]) + (lam[1] - lam_f[1]) * a_f) ** 2 + (lam[1] - lam_f[1]) ** 2 * v_f) / sd
    assert eff["y2"].dmacs == pytest.approx(want, rel=1e-5)
    assert eff["y1"].dmacs == pytest.approx(0.0, abs=1e-5)
    # signed bias: (nu_F - nu_R) + (lam_F - lam_R) alpha_F
    assert eff["y2"].bias == pytest.approx(0.5 + (0.4 - 0.8) * a_f, abs=1e-5)
    sb = scale_bias(res, {"f": stats.items})
    assert len(sb) == 1 and sb[0].bias == pytest.approx(eff["y2"].bias, abs=1e-5)
    assert sb[0].to_dict()["group"] == "F"
