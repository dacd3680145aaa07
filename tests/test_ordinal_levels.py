"""Ordinal invariance levels (Wu & Estabrook 2016): degrees of freedom, the
configural = thresholds identity, and recovery of a planted threshold shift."""

import os
import sys

import numpy as np
import pytest
from scipy import stats as st_

sys.path.insert(0, os.path.dirname(__file__))
from ordinal_sim import simulate_bifactor, simulate_one_factor  # noqa: E402

from invariance.errors import SpecificationError
from invariance.estimate.dwls_robust import dwls_difference, fit_dwls
from invariance.model import Release, Structure
from invariance.data.ordinal_stats import ordinal_stats_from_arrays
from invariance.model.ordinal_levels import ORDINAL_LEVELS, build_ordinal_level
from invariance.estimate.interface import DiagonallyWeighted
from invariance.model import LevelBuilder
from invariance.partial import release_search
from invariance.partial.candidates import release_tests

GROUPS = ["east", "west", "south"]


def _one_factor_stats(rng, cuts, n=500):
    p = len(cuts)
    items = [f"y{i + 1}" for i in range(p)]
    loads = np.linspace(0.5, 0.75, p)
    arrs = [simulate_one_factor(rng, n, loads, cuts, mean=m) for m in (0.0, 0.3, -0.2)]
    return Structure(factors={"f": tuple(items)}, family="single"), ordinal_stats_from_arrays(arrs, GROUPS, items)


@pytest.mark.parametrize("cuts", [
    np.array([[-0.6, 0.5], [-0.2, 0.9], [-1.0, 0.1], [-0.4, 0.6], [-0.8, 0.3]]),     # three categories
    np.array([[0.2], [-0.3], [0.5], [0.0], [-0.6]]),                                   # binary
    [[-0.6, 0.5], [0.3], [-1.0, 0.1], [-0.4], [-0.8, 0.3]],                             # mixed
])
def test_thresholds_level_is_equivalent_to_configural(cuts):
    # Wu & Estabrook (2016): with three categories (and for binary items, whose
    # intercepts stay fixed) invariant thresholds only re-parameterize the configural model
    rng = np.random.default_rng(8)
    st, ost = _one_factor_stats(rng, cuts)
    conf = fit_dwls(build_ordinal_level(st, GROUPS, "configural", ost.n_categories), ost)
    thr = fit_dwls(build_ordinal_level(st, GROUPS, "thresholds", ost.n_categories), ost)
    assert conf.converged and thr.converged
    assert conf.fit.df == thr.fit.df
    assert thr.fit.chi2 == pytest.approx(conf.fit.chi2, rel=1e-6, abs=1e-8)
    # the next steps restrict: metric has more df and fits no better
    met = fit_dwls(build_ordinal_level(st, GROUPS, "metric", ost.n_categories), ost)
    assert met.fit.df > thr.fit.df and met.fit.chi2 >= thr.fit.chi2 - 1e-8


def test_degrees_of_freedom_by_level():
    # counting argument (Wu & Estabrook 2016): per item and non-reference group the
    # thresholds step costs K - 3 df; metric p - 1; scalar p - 1; strict p
    rng = np.random.default_rng(9)
    cuts = np.array([[-1.0, -0.2, 0.5, 1.2]] * 6) + np.linspace(-0.2, 0.2, 6)[:, None]
    st, ost = _one_factor_stats(rng, cuts, n=400)
    p, G, K = 6, 3, 5
    dfs = {lv: build_ordinal_level(st, GROUPS, lv, ost.n_categories).df for lv in ORDINAL_LEVELS}
    moments = G * (p * (K - 1) + p * (p - 1) // 2)
    assert dfs["configural"] == moments - G * (p * (K - 1) + p)
    assert dfs["thresholds"] - dfs["configural"] == (G - 1) * p * (K - 3)
    assert dfs["metric"] - dfs["thresholds"] == (G - 1) * (p - 1)
    assert dfs["scalar"] - dfs["metric"] == (G - 1) * (p - 1)
    assert dfs["strict"] - dfs["scalar"] == (G - 1) * p
    fits = {lv: fit_dwls(build_ordinal_level(st, GROUPS, lv, ost.n_categories), ost) for lv in ORDINAL_LEVELS}
    for a, b in zip(ORDINAL_LEVELS[:-1], ORDINAL_LEVELS[1:]):
        d = dwls_difference(fits[b], fits[a], ost)
        assert d["delta_df"] == dfs[b] - dfs[a]
        assert d["nesting_gap"] < 1e-8          # nested: the free model reproduces the restricted one
        assert d["pvalue"] > 0.001               # nothing planted


def test_unknown_release_rejected():
    st = Structure(factors={"f": ("a", "b", "c")}, family="single")
    with pytest.raises(SpecificationError, match="Ordinal models release"):
        build_ordinal_level(st, ["x", "y"], "scalar", [3, 3, 3], released=[Release("variance", "a")])
    with pytest.raises(SpecificationError, match="Unknown ordinal invariance level"):
        build_ordinal_level(st, ["x", "y"], "weak", [3, 3, 3])


ITEMS = [f"q{i + 1}" for i in range(9)]
BIFACTOR = Structure(factors={"s1": tuple(ITEMS[:3]), "s2": tuple(ITEMS[3:6]), "s3": tuple(ITEMS[6:])},
                     family="bifactor", general="gen")
LG = np.array([0.6, 0.55, 0.65, 0.5, 0.6, 0.55, 0.62, 0.58, 0.5])
LS = np.array([0.4, 0.45, 0.35, 0.4, 0.35, 0.45, 0.4, 0.35, 0.42])
CUTS = np.array([-1.2, -0.4, 0.4, 1.2])[None, :] + np.linspace(-0.3, 0.3, 9)[:, None]
BLOCKS = np.repeat(np.arange(3), 3)
SPECIFIC = ("s1", "s2", "s3")


def _population(seed, shift):
    rng = np.random.default_rng(seed)
    a = simulate_bifactor(rng, 1200, loads_g=LG, loads_s=LS, blocks=BLOCKS, cuts=CUTS)
    b = simulate_bifactor(rng, 1200, loads_g=LG, loads_s=LS, blocks=BLOCKS, cuts=CUTS, mean=0.3, var=1.2,
                          shift=shift)
    return ordinal_stats_from_arrays([a, b], ["ref", "focal"], ITEMS)


def test_planted_threshold_shift_is_flagged():
    # invented population: item q5's thresholds are 0.5 higher in the focal group;
    # releasing each item's thresholds at the scalar level, robust differences,
    # Bonferroni over items per round
    # The specific factors' means stay 0 (common practice for bifactor scalar models):
    # freed, they are weakly identified next to the general mean and absorb the shift.
    ost = _population(41, (4, 0.5))
    builder, est, scalar = _scalar(ost)
    out = release_search(scalar, ost, lambda f: False, estimator=est, builder=builder, parameters=("threshold",),
                         correction="bonferroni")
    assert [(r.parameter, r.item) for r in out.releases] == [("threshold", "q5")]
    assert out.releases[0].test == "refit" and out.releases[0].pvalue < 1e-10
    assert out.stop_reason == "no_significant"   # the second round finds nothing more
    assert out.fit.converged


def _scalar(ost):
    builder = LevelBuilder(BIFACTOR, tuple(ost.names), None, tuple(SPECIFIC), tuple(int(k) for k in ost.n_categories))
    est = DiagonallyWeighted()
    return builder, est, est.fit(builder.build("scalar"), ost)


def test_nothing_flagged_without_planted_shift():
    ost = _population(42, None)
    builder, est, scalar = _scalar(ost)
    rows = release_tests(est, scalar, ost, ("threshold",), builder=builder)
    assert len(rows) == len(ITEMS)
    assert all(r.pvalue >= 0.05 / len(ITEMS) for r in rows)
