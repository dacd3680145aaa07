"""Monte Carlo planning: false alarms under exact invariance, power, empirical cutoffs."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from invariance import SpecificationError, Structure, build_level, fit
from invariance.pipeline.batch import Population, Shift, plan, simulate_groups
from invariance.data.moments import stats_from_arrays

STRUCT = Structure({"F": ("a", "b", "c", "d")}, family="single")


def _population() -> Population:
    lam = np.array([[0.7], [0.6], [0.8], [0.65]])
    th = np.diag(1 - lam[:, 0] ** 2)
    nu = np.array([2.0, 2.5, 3.0, 1.5])
    return Population(STRUCT, ("g1", "g2"), (
        (lam, np.zeros((1, 1)), np.eye(1), th, nu, np.zeros(1)),
        (lam, np.zeros((1, 1)), np.eye(1) * 1.3, th, nu, np.array([0.4])),
    ))


@pytest.fixture(scope="module")
def null_plan():
    return plan(_population(), sizes=250, replications=200, levels=("configural", "metric", "scalar"),
                alpha=0.05, seed=8, workers=2, quiet=True)


def test_chi2_false_alarm_within_binomial_interval(null_plan):
    # issue 8: under exact invariance the chi-square difference rejects at rate alpha;
    # 99% Clopper-Pearson interval (scipy.stats.binomtest) of the observed rate must hold .05
    for step in ("metric", "scalar"):
        r = null_plan.false_alarm["chi2 p<0.05"][step]
        assert r["n"] == 200
        ci = stats.binomtest(r["count"], r["n"]).proportion_ci(confidence_level=0.99, method="exact")
        assert ci.low <= 0.05 <= ci.high, (step, r)
    # under H0 the difference statistic is chi-square on ddf = 3: its 95th percentile is near 7.81
    # (scipy.stats.chi2.ppf(.95, 3)); a loose check on 200 draws
    assert 5.5 < null_plan.cutoffs["metric"]["dchi2_p95"] < 11.0


def test_empirical_cutoffs_match_the_replications(null_plan):
    frame = null_plan.replications
    met = frame[(frame.step == "metric") & frame.converged]
    assert null_plan.cutoffs["metric"]["dcfi_p05"] == pytest.approx(np.percentile(met.dcfi, 5))
    assert null_plan.cutoffs["metric"]["drmsea_p95"] == pytest.approx(np.percentile(met.drmsea, 95))
    assert null_plan.cutoffs["metric"]["dcfi_p05"] <= 0.0
    assert null_plan.power == {} and null_plan.target_step is None


def test_power_for_planted_intercept():
    res = plan(_population(), sizes=300, shift=Shift("intercept", "b", 0.5), replications=30, seed=4,
               workers=0, quiet=True)
    assert res.target_step == "scalar"
    power = res.power["chi2 p<0.05"]["scalar"]["rate"]
    alarm = res.false_alarm["chi2 p<0.05"]["scalar"]["rate"]
    # an intercept gap of .5 residual-SD-scale units with N = 300 per group is found almost always
    assert power >= 0.9 and alarm < power
    # the metric step is untouched by an intercept shift: no power entry there
    assert set(res.power["chi2 p<0.05"]) == {"scalar"}
    d = res.to_dict()
    assert d["settings"]["shift"]["item"] == "b" and d["settings"]["sizes"] == {"g1": 300, "g2": 300}


def test_population_from_fit_and_dict_roundtrip():
    pop = _population()
    data = simulate_groups(pop, (400, 400), seed=1)
    st = stats_from_arrays(data, pop.groups, STRUCT.items)
    res = fit(build_level(STRUCT, st.names, "scalar"), st)
    again = Population.from_fit(res, STRUCT)
    back = Population.from_dict(again.to_dict(), STRUCT)
    for a, b in zip(again.moments(), back.moments()):
        np.testing.assert_allclose(a[0], b[0])
    # the estimates table (what a run writes to estimates.csv) gives the same population
    est = res.estimates()
    est.insert(0, "level", "scalar")
    table = Population.from_estimates(est, STRUCT)
    for a, b in zip(again.moments(), table.moments()):
        np.testing.assert_allclose(a[0], b[0], atol=1e-12)
        np.testing.assert_allclose(a[1], b[1], atol=1e-12)
    # sample moments of a large simulated sample approach the population moments
    big = simulate_groups(pop, (20000, 20000), seed=2)
    np.testing.assert_allclose(big[1].mean(axis=0), pop.moments()[1][1], atol=0.05)


def test_bad_plan_inputs():
    pop = _population()
    with pytest.raises(SpecificationError, match="group sizes"):
        plan(pop, sizes=(100, 100, 100), replications=2, workers=0, quiet=True)
    with pytest.raises(SpecificationError, match="planted item"):
        plan(pop, sizes=100, shift=Shift("intercept", "zz", 0.2), replications=2, workers=0, quiet=True)
    with pytest.raises(SpecificationError, match="planted parameter"):
        plan(pop, sizes=100, shift=Shift("slope", "a", 0.2), replications=2, workers=0, quiet=True)


def test_population_from_values_matches_matrices():
    pop = Population.from_values(
        STRUCT, ("g1", "g2"),
        loadings={"F": {"a": 0.7, "b": 0.6, "c": 0.8, "d": 0.65}},
        intercepts={"a": 2.0, "b": 2.5, "c": 3.0, "d": 1.5},
        residuals={"a": 0.51, "b": 0.64, "c": 0.36, "d": 1 - 0.65**2},
        means={"g2": {"F": 0.4}}, variances={"g2": {"F": 1.3}},
    )
    for a, b in zip(pop.moments(), _population().moments()):
        np.testing.assert_allclose(a[0], b[0])
        np.testing.assert_allclose(a[1], b[1])
    with pytest.raises(SpecificationError, match="loading of item 'd'"):
        Population.from_values(STRUCT, ("g1",), loadings={"F": {"a": 1, "b": 1, "c": 1}},
                               intercepts={}, residuals={})


def test_chunking_does_not_change_the_replications():
    pop = _population()
    a = plan(pop, sizes=120, replications=6, levels=("configural", "metric"), seed=5, workers=0, quiet=True)
    b = plan(pop, sizes=120, replications=6, levels=("configural", "metric"), seed=5, workers=2, chunk=4, quiet=True)
    cols = ["replication", "dchi2", "dcfi", "drmsea", "dsrmr"]
    assert a.replications[cols].equals(b.replications[cols])
    assert b.settings["chunk"] == 4


def test_noninvariant_population_is_noted():
    pop = _population().shifted(Shift("intercept", "a", 0.3))
    assert pop.invariant() == {"loading": True, "intercept": False, "residual": True}
    res = plan(pop, sizes=100, replications=2, levels=("configural", "metric", "scalar"), workers=0, quiet=True)
    assert len(res.settings["notes"]) == 1 and "intercepts differ" in res.settings["notes"][0]


def test_pipeline_rules_agree_with_direct_readings(null_plan):
    # the planner's default rules wrap invariance.decide.compare; the direct readings of the
    # published rules (Cheung & Rensvold 2002; Chen 2007) must flag the same replications
    from functools import partial

    from invariance.pipeline.batch.rules import RUN_DEFAULT, cfi_rule, chen_any_rule, chi2_rule, default_rules

    rules = default_rules(0.05)
    direct = {
        "chi2 p<0.05": partial(chi2_rule, alpha=0.05),
        "dCFI<=-.01 (Cheung & Rensvold 2002)": cfi_rule,
        RUN_DEFAULT: partial(chen_any_rule, sample="large"),
        "Chen 2007 (N<=300 or unbalanced)": partial(chen_any_rule, sample="small"),
    }
    rows = null_plan.replications.to_dict("records")
    # shift the changes so that every rule meets both outcomes
    probes = rows + [dict(r, dcfi=r["dcfi"] - 0.012, drmsea=r["drmsea"] + 0.02, p=r["p"] / 50) for r in rows[:50]]
    for name, rule in rules.items():
        got = [rule(r, r["step"]) for r in probes]
        want = [direct[name](r, r["step"]) for r in probes]
        assert got == want, name
        assert any(got) and not all(got)
