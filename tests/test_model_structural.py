"""Structural levels: equal factor variances, covariances, means and regression paths."""

import numpy as np
import pytest
from scipy.stats import chi2

from invariance import Structure, build_level, fit, sample_stats
from invariance.data.moments import stats_from_arrays
from invariance.errors import SpecificationError
from invariance.model.structural import STRUCTURAL_STEPS, build_structural
from invariance.partial import constraints, release_constraint, release_search, score_tests

semopy_hs = pytest.importorskip("semopy.examples.holzinger39")

HS = Structure({"visual": ("x1", "x2", "x3"), "textual": ("x4", "x5", "x6"), "speed": ("x7", "x8", "x9")})


@pytest.fixture(scope="module")
def hs():
    data = semopy_hs.get_data()  # Holzinger & Swineford (1939), semopy copy
    stats = sample_stats(data, HS.items, "school")
    strict = fit(build_level(HS, stats.names, "strict"), stats)
    return data, stats, strict


def test_degrees_of_freedom_of_each_step(hs):
    _, stats, strict = hs
    spec = strict.spec
    assert build_structural(spec, ["variances"]).df == spec.df + 3
    assert build_structural(spec, ["variances", "covariances"]).df == spec.df + 6
    full = build_structural(spec, STRUCTURAL_STEPS)
    assert full.df == spec.df + 9 and full.level == "strict+paths"


def test_fully_equal_model_reproduces_single_group_fit(hs):
    # Identity: with every parameter equal across groups, T equals the single-group T of
    # the pooled data plus sum_g N_g (log|S_total| - log|S_g|); the single-group model
    # is the published chi-square 85.306 on 24 df (METHODS section 12).
    data, stats, strict = hs
    full = fit(build_structural(strict.spec, ["variances", "covariances", "means"]), stats)
    x = data[list(HS.items)].to_numpy(float)
    s_tot = np.cov(x.T, bias=True)
    extra = x.shape[0] * np.linalg.slogdet(s_tot)[1] - sum(g.n * np.linalg.slogdet(g.cov)[1] for g in stats.groups)
    assert full.fit.chi2 - extra == pytest.approx(85.306, abs=2e-3)
    assert full.fit.df == 24 + 54


def test_variance_score_test_matches_lr(hs):
    # Score tests of fixed equalities (variance = reference value) vs LR refits;
    # asymptotically equal (Sorbom 1989); 10% tolerance for the largest.
    _, stats, strict = hs
    res = fit(build_structural(strict.spec, ["variances"]), stats)
    sc = score_tests(res, stats, parameters=("variance",))
    assert len(sc.multivariate) == 3 and all(t.df == 1 for t in sc.multivariate)
    top = max(sc.multivariate, key=lambda t: t.statistic)
    refit = fit(release_constraint(res.spec, top.constraint), stats)
    assert refit.spec.df == res.spec.df - 1
    assert top.statistic == pytest.approx(res.fit.chi2 - refit.fit.chi2, rel=0.10)


def test_released_structural_constraint_is_left_free(hs):
    _, stats, strict = hs
    spec = build_structural(strict.spec, ["variances"])
    c = [c for c in constraints(spec) if c.item == "speed"][0]
    rel = release_constraint(spec, c).released[-1]
    again = build_structural(strict.spec, ["variances"], released=[rel])
    assert again.df == spec.df - 1
    assert rel.parameter == "variance" and rel.groups == ("Grant-White",)


def test_unknown_step():
    with pytest.raises(SpecificationError, match="structural step"):
        build_structural(build_level(HS, ("a", "b"), "scalar"), ["slopes"])


def test_per_path_tests_find_planted_path():
    # Invented two-group population: y regressed on f1 and f2; the f1 path is .6 in A
    # and .1 in B (planted); the f2 path is .4 in both. Per-path score tests at the
    # equal-paths level point to f1 only.
    rng = np.random.default_rng(6)
    st_ = Structure({"f1": ("a1", "a2", "a3"), "f2": ("b1", "b2", "b3"), "y": ("c1", "c2", "c3")},
                    regressions=(("y", "f1"), ("y", "f2")))
    lam = np.array([0.8, 0.7, 0.6])
    arrays = []
    for b1 in (0.6, 0.1):
        n = 1500
        f = rng.multivariate_normal([0, 0], [[1, 0.3], [0.3, 1]], size=n)
        y = b1 * f[:, 0] + 0.4 * f[:, 1] + rng.normal(0, 0.7, n)
        eta = np.column_stack([f, y])
        x = np.repeat(eta, 3, axis=1) * np.tile(lam, 3) + rng.normal(0, 0.6, (n, 9))
        arrays.append(x)
    stats = stats_from_arrays(arrays, ["A", "B"], st_.items)
    scalar = fit(build_level(st_, stats.names, "scalar"), stats)
    paths = fit(build_structural(scalar.spec, ["paths"]), stats)
    sc = score_tests(paths, stats, parameters=("path",))
    by = {t.constraint.factor: t for t in sc.multivariate}
    assert set(by) == {"f1", "f2"}
    # the planted path dominates (the other path shows spillover while f1 is held equal)
    assert by["f1"].pvalue < 1e-6 and by["f1"].statistic > 5 * by["f2"].statistic

    def judge(x):  # chi-square difference against the scalar level at .05
        return chi2.sf(x.fit.chi2 - scalar.fit.chi2, x.spec.df - scalar.spec.df) > 0.05

    r = release_search(paths, stats, judge)
    assert [(s.item, s.factor) for s in r.releases] == [("y", "f1")]
    assert r.decision == "holds_partially"
    after = score_tests(r.fit, stats, parameters=("path",))
    assert [t.constraint.factor for t in after.multivariate] == ["f2"]
    assert after.multivariate[0].pvalue > 0.05
