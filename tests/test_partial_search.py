"""Sequential release search: recovery of planted noninvariance (seeded simulation)."""

import concurrent.futures as cf
import dataclasses

import numpy as np
import pytest
from scipy import stats as st

from invariance import EstimationError, Release, SpecificationError, Structure, build_level, fit
from invariance.estimate.interface import MaximumLikelihood
from invariance.data.moments import stats_from_arrays
from invariance.partial import adjust_pvalues, flagged_items, level_parameters, release_search

ITEMS = [f"i{k}" for k in range(1, 13)]
BIFACTOR = Structure(
    {"s1": tuple(ITEMS[:4]), "s2": tuple(ITEMS[4:8]), "s3": tuple(ITEMS[8:])}, family="bifactor", general="g"
)


def simulate(seed: int, plant: bool, n: int = 800):
    """Invented bifactor population (12 items, 3 groups). Planted when ``plant``: the
    general loading of i3 is 0.2 instead of 0.6 in group C, and the intercept of i10 is
    0.35 higher in groups B and C."""
    rng = np.random.default_rng(seed)
    p = 12
    mem = np.repeat([0, 1, 2], 4)
    arrays = []
    # loadings vary across items so that general and specific factor means are
    # separately identified at the scalar level (equal loadings would confound them)
    gen = np.array([0.7, 0.5, 0.6, 0.75, 0.55, 0.65, 0.7, 0.5, 0.6, 0.65, 0.75, 0.55])
    spc = np.array([0.5, 0.35, 0.45, 0.3, 0.3, 0.55, 0.4, 0.5, 0.45, 0.35, 0.3, 0.55])
    for g, (mean, var) in {"A": (0.0, 1.0), "B": (0.3, 1.2), "C": (-0.2, 0.9)}.items():
        lg = gen.copy()
        nu = np.full(p, 3.0)
        if plant and g == "C":
            lg[2] = 0.2
        if plant and g in ("B", "C"):
            nu[9] += 0.35
        L = np.zeros((p, 4))
        L[:, 3] = lg
        L[np.arange(p), mem] = spc
        phi = np.diag([1.0, 1.0, 1.0, var])
        sigma = L @ phi @ L.T + np.diag(np.full(p, 0.45))
        mu = nu + L @ np.array([0, 0, 0, mean])
        arrays.append(rng.multivariate_normal(mu, sigma, size=n))
    return stats_from_arrays(arrays, ["A", "B", "C"], ITEMS)


def chi2_judge(base):
    """Chi-square difference test against the previous accepted level at .05 (a
    stand-in for the pipeline's decision criteria)."""

    def judge(x):
        d = x.fit.chi2 - base.fit.chi2
        return st.chi2.sf(d, x.spec.df - base.spec.df) > 0.05

    return judge


def run_levels(stats, **options):
    prev = fit(build_level(BIFACTOR, stats.names, "configural"), stats)
    released, results = (), []
    for lv in ("metric", "scalar"):
        f = fit(build_level(BIFACTOR, stats.names, lv, released=released), stats)
        r = release_search(f, stats, chi2_judge(prev), **options)
        results.append(r)
        released += r.released
        prev = r.fit
    return results


@pytest.fixture(scope="module")
def planted():
    return simulate(17, True)


def test_recovery_planted(planted):
    # Recovery (seeded simulation, invented population): exactly the two planted items,
    # with the right parameter types; levels hold only partially.
    res = run_levels(planted)
    flagged = [(s.item, s.parameter, s.factor) for r in res for s in r.releases]
    assert flagged == [("i3", "loading", "g"), ("i10", "intercept", None)]
    assert [r.decision for r in res] == ["holds_partially", "holds_partially"]
    assert res[1].releases[0].dmacs["B"] > 0.2 and res[1].releases[0].dmacs["C"] > 0.2
    step = res[0].releases[0]
    assert step.df == 2 and step.adjusted_pvalue < 0.05 and step.chi2_after < step.chi2_before
    d = res[1].to_dict()
    assert d["decision"] == "holds_partially" and d["released"][0]["item"] == "i10"
    # flagged records sized on the final partial scalar model: the planted loading is a
    # large difference in C only (.6 vs .2), the planted intercept one in B and C
    flags = flagged_items(res, planted)
    assert [(f["item"], f["parameter"], f["level"]) for f in flags] == [("i3", "loading", "metric"), ("i10", "intercept", "scalar")]
    assert flags[0]["dmacs"]["C"] > 0.3 > flags[0]["dmacs"]["B"]
    assert min(flags[1]["dmacs"].values()) > 0.2 and flags[1]["dmacs_max"] == max(flags[1]["dmacs"].values())


def test_recovery_nothing_planted():
    # Same population with nothing planted: nothing is flagged.
    res = run_levels(simulate(18, False))
    assert [s for r in res for s in r.releases] == []
    assert [r.decision for r in res] == ["holds", "holds"]


def test_groups_mode_and_lr_verification_with_executor(planted):
    # Release only where the univariate tests point, confirming each candidate by an LR
    # refit run through a concurrent.futures executor.
    prev = fit(build_level(BIFACTOR, planted.names, "configural"), planted)
    f = fit(build_level(BIFACTOR, planted.names, "metric"), planted)
    with cf.ThreadPoolExecutor(max_workers=2) as ex:
        r = release_search(f, planted, chi2_judge(prev), release_in="groups", verify=True, executor=ex)
    assert r.decision == "holds_partially"
    s = r.releases[0]
    assert (s.item, s.parameter, s.groups) == ("i3", "loading", ("C",))
    assert s.lr_statistic == pytest.approx(s.chi2_before - s.chi2_after)
    # the LR statistic is close to the score statistic (Sorbom 1989), 15% tolerance
    assert s.lr_statistic == pytest.approx(s.statistic, rel=0.15)
    assert r.released[0].groups == ("C",)


def test_max_releases_and_stop_reasons(planted):
    f = fit(build_level(BIFACTOR, planted.names, "metric"), planted)
    r = release_search(f, planted, lambda x: False, max_releases=0)
    assert r.stop_reason == "max_releases" and not r.releases and r.decision == "fails"
    bad = dataclasses.replace(f, converged=False)
    r = release_search(bad, planted, lambda x: False)
    assert r.stop_reason == "not_converged" and not r.releases
    r = release_search(f, planted, lambda x: False, max_releases=5)
    assert r.stop_reason in ("no_significant", "max_releases")
    assert r.releases[0].item == "i3"


def test_adjust_pvalues_against_statsmodels():
    # Holm (1979) and Bonferroni against statsmodels.stats.multitest.multipletests.
    mt = pytest.importorskip("statsmodels.stats.multitest")
    p = np.array([0.01, 0.04, 0.03, 0.005, 0.2, 0.04])
    for ours, theirs in (("holm", "holm"), ("bonferroni", "bonferroni")):
        assert np.allclose(adjust_pvalues(p, ours), mt.multipletests(p, method=theirs)[1])
    assert np.array_equal(adjust_pvalues(p, "none"), p)


def test_bad_options():
    with pytest.raises(SpecificationError, match="correction"):
        adjust_pvalues(np.array([0.1]), "fdr")
    with pytest.raises(SpecificationError, match="configural"):
        level_parameters("configural")
    assert level_parameters("strict+means") == ("mean",)


def test_until_clean_searches_a_level_that_holds(planted):
    # A judge that accepts everything: the default stops at once, 'clean' still
    # releases the significant constraint and the decision stays 'holds'.
    f = fit(build_level(BIFACTOR, planted.names, "metric"), planted)
    r = release_search(f, planted, lambda x: True)
    assert r.releases == () and r.decision == "holds"
    r = release_search(f, planted, lambda x: True, until="clean")
    assert [s.item for s in r.releases] == ["i3"] and r.decision == "holds"
    assert r.stop_reason == "no_significant" and r.initial_holds
    with pytest.raises(SpecificationError, match="until"):
        release_search(f, planted, lambda x: True, until="never")


def test_refit_jobs_pickle_for_process_or_distributed_executors(planted):
    # A process pool or a distributed backend ships (estimator, fit, stats, candidate)
    # jobs and the refit back: both must survive pickling with the function itself.
    import pickle

    from invariance.estimate.interface import MaximumLikelihood
    from invariance.partial.candidates import release_tests
    from invariance.partial.search import _refit

    est = MaximumLikelihood()
    f = fit(build_level(BIFACTOR, planted.names, "scalar"), planted)
    cand = release_tests(est, f, planted, ("intercept",))[0]
    job = (est, f, planted, cand)
    fn, job2 = pickle.loads(pickle.dumps((_refit, job)))
    res, why = fn(job2)
    assert why is None
    back = pickle.loads(pickle.dumps(res))
    # one constraint fewer: the refit cannot fit worse than the restricted model
    assert back.spec.df == f.spec.df - cand.df
    assert back.fit.chi2 <= f.fit.chi2 + 1e-8


@dataclasses.dataclass(frozen=True)
class _FailsOnI10(MaximumLikelihood):
    """ML whose fit of any model with i10's intercept released cannot be estimated."""

    def fit(self, spec, stats, *, start=None):
        if any(r.item == "i10" and r.parameter == "intercept" for r in spec.released):
            raise EstimationError("the model could not be estimated: forced for the test")
        return MaximumLikelihood.fit(self, spec, stats, start=start)


def test_failed_refit_is_recorded_and_the_next_candidate_tried(planted):
    # the planted i10 intercept is the most significant candidate at scalar; its refit is
    # made to fail, so the search must record it and move on to the next significant one
    metric = fit(build_level(BIFACTOR, planted.names, "metric", released=[Release("loading", "i3", "g")]), planted)
    scalar = fit(build_level(BIFACTOR, planted.names, "scalar", released=[Release("loading", "i3", "g")]), planted)
    plain = release_search(scalar, planted, chi2_judge(metric), max_releases=1)
    assert (plain.releases[0].item, plain.releases[0].parameter) == ("i10", "intercept")
    r = release_search(scalar, planted, lambda f: False, estimator=_FailsOnI10(), max_releases=1)
    assert [k["label"] for k in r.skipped][:1] == ["intercept:i10"]
    assert "forced for the test" in r.skipped[0]["reason"]
    assert r.to_dict()["skipped"][0]["label"] == "intercept:i10"
    assert len(r.releases) == 1 and r.releases[0].item != "i10"
