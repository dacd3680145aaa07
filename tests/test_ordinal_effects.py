"""dMACS for ordered items and latent-response bifactor indices.

References: scipy.integrate.quad for the expectations over the focal factor
distribution (closed form of METHODS section 9 on y*; the expected item score
sum_k Phi(.) on the observed scale); the formulas of METHODS section 10 by hand.
"""

import os
import sys

import numpy as np
import pytest
from scipy import integrate
from scipy.stats import norm

sys.path.insert(0, os.path.dirname(__file__))
from ordinal_sim import simulate_bifactor  # noqa: E402

from invariance.model import Release, Structure
from invariance.model.ordinal_levels import build_ordinal_level
from invariance.data.ordinal_stats import ordinal_stats_from_arrays
from invariance.estimate import fit_dwls
from invariance.effects.ordinal import bifactor_indices_latent, category_sd, dmacs_expected_score, dmacs_latent
from invariance.effects.ordinal import ordinal_effects


def test_dmacs_latent_matches_quadrature():
    nu_r, nu_f, l_r, l_f, a, v = 0.3, 0.0, 1.1, 0.8, 0.4, 1.3
    got = dmacs_latent(nu_r, np.array([l_r]), nu_f, np.array([l_f]), np.array([a]), np.array([[v]]),
                       sd_r=1.5, sd_f=1.3, n_r=300, n_f=200)
    e2 = integrate.quad(lambda x: ((nu_r - nu_f) + (l_r - l_f) * x) ** 2 * norm.pdf(x, a, np.sqrt(v)), -12, 12)[0]
    pooled = np.sqrt((299 * 1.5**2 + 199 * 1.3**2) / 498)
    assert got == pytest.approx(np.sqrt(e2) / pooled, rel=1e-8)


def test_dmacs_expected_score_matches_quadrature():
    ref = {"nu": 0.0, "lam": np.array([1.0]), "theta": 1.0, "tau": np.array([-1.0, 0.0, 1.2])}
    foc = {"nu": 0.2, "lam": np.array([0.7]), "theta": 1.4, "tau": np.array([-0.6, 0.3, 1.2])}
    a, v = 0.5, 1.2
    def es(p, x):
        return sum(norm.cdf((p["nu"] + p["lam"][0] * x - t) / np.sqrt(p["theta"])) for t in p["tau"])
    e2 = integrate.quad(lambda x: (es(ref, x) - es(foc, x)) ** 2 * norm.pdf(x, a, np.sqrt(v)), -12, 12)[0]
    got = dmacs_expected_score(ref, foc, np.array([a]), np.array([[v]]), sd_pooled=0.9)
    assert got == pytest.approx(np.sqrt(e2) / 0.9, rel=1e-6)
    # invariant item: zero
    assert dmacs_expected_score(ref, dict(ref), np.array([a]), np.array([[v]]), sd_pooled=0.9) == pytest.approx(0, abs=1e-12)


def test_category_sd():
    t = np.array([-0.5, 0.4, np.nan])
    p = np.diff(np.r_[0, norm.cdf(t[:2]), 1])
    k = np.arange(3)
    assert category_sd(t) == pytest.approx(np.sqrt(p @ k**2 - (p @ k) ** 2))


def test_bifactor_indices_by_hand():
    L = np.array([[0.6, 0.4, 0], [0.5, 0.5, 0], [0.7, 0, 0.3], [0.6, 0, 0.4]])
    T = 1 - (L**2).sum(1)
    out = bifactor_indices_latent(L, T, general=0, specifics={"a": [1, 0, 1], "b": [2, 2, 3]})
    num = L[:, 0].sum() ** 2 + 0.9**2 + 0.7**2
    assert out["omega"] == pytest.approx(num / (num + T.sum()))
    assert out["omega_h"] == pytest.approx(L[:, 0].sum() ** 2 / (num + T.sum()))
    assert out["ecv"] == pytest.approx((L[:, 0] ** 2).sum() / (L**2).sum())
    assert out["puc"] == pytest.approx(1 - 2 / 6)


def test_ordinal_effects_flags_the_planted_item():
    rng = np.random.default_rng(5)
    items = [f"q{i + 1}" for i in range(6)]
    st = Structure(factors={"s1": tuple(items[:3]), "s2": tuple(items[3:])}, family="bifactor", general="gen")
    lg = np.full(6, 0.6)
    ls = np.full(6, 0.4)
    cuts = np.array([-1.0, -0.2, 0.6])[None, :] + np.zeros((6, 1))
    blocks = np.repeat([0, 1], 3)
    a = simulate_bifactor(rng, 1500, loads_g=lg, loads_s=ls, blocks=blocks, cuts=cuts)
    b = simulate_bifactor(rng, 1500, loads_g=lg, loads_s=ls, blocks=blocks, cuts=cuts, shift=(1, 0.6))
    ost = ordinal_stats_from_arrays([a, b], ["r", "f"], items)
    # strict: unique variances held equal (true here), which keeps q4-q6 away from a
    # Heywood direction the scalar model has in this small bifactor example
    spec = build_ordinal_level(st, ["r", "f"], "strict", ost.n_categories, released=[Release("threshold", "q2")],
                               fixed_means=("s1", "s2"))
    res = fit_dwls(spec, ost)
    eff = ordinal_effects(res, ost, focal="f")
    es = {it: v["expected_score"] for it, v in eff["dmacs"].items()}
    assert max(es, key=es.get) == "q2" and es["q2"] > 0.2
    assert all(es[it] < 0.1 for it in items if it != "q2")
    bif = eff["bifactor"]["r"]
    # population: general .6, specific .4 on the latent-response scale (theta scaled)
    assert bif["ecv"] == pytest.approx(0.36 / 0.52, abs=0.06)
