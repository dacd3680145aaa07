"""Decisions are shown with the inequality and digits that decided them, and ``plan``
judges with the very rule of ``run``.

Hand-computed cases of the published rules (METHODS section 5): Cheung & Rensvold (2002):
dCFI <= -0.01 signals noninvariance; Chen (2007), N > 300 and balanced groups: dCFI -0.010,
dRMSEA 0.015, dSRMR 0.030 (loadings) / 0.010 (intercepts). The display rule (module
docstring of invariance.decide.compare): the printed value, compared with the printed
cutoff by the printed inequality, gives the decision.
"""

import operator

import numpy as np
import pytest

from invariance.decide.compare import judge_configural, judge_step, level_delta, make_rule, rule_from_section
from invariance.pipeline.batch.planfile import load_plan
from invariance.pipeline.batch.rules import RUN_DEFAULT, chen_rule, decision_rule, default_rules
from invariance.spec.load import load_pipeline

from conftest import hs_doc, write_yaml

OPS = {">": operator.gt, ">=": operator.ge, "<": operator.lt, "<=": operator.le}


def fit(chi2, df, cfi, rmsea, srmr):
    return {"chi2": chi2, "df": df, "cfi": cfi, "rmsea": rmsea, "srmr": srmr}


def shown_is_true(check) -> bool:
    """The printed comparison read as numbers: true exactly when printed."""
    return OPS[check["relation"]](float(check["value_text"]), float(check["cutoff_text"]))


@pytest.mark.parametrize(
    "cfi_free, cfi_restricted, decision, text",
    [
        (0.950, 0.941, "holds", "dCFI = -0.009 > -0.010"),       # -0.009 > -0.01: Cheung & Rensvold (2002)
        (0.950, 0.940, "fails", "dCFI = -0.010 <= -0.010"),      # exactly -0.010 signals noninvariance (C&R 2002)
        (0.950, 0.94004, "holds", "dCFI = -0.00996 > -0.010"),   # rounds to -.010 at 3 decimals: more digits shown
        (0.950, 0.9396, "fails", "dCFI = -0.010 <= -0.010"),     # -0.0104: 3 decimals already read true
        (0.900, 0.905, "holds", "dCFI = +0.005 > -0.010"),       # fit improves
    ],
)
def test_cheung_rensvold_cases_are_shown_as_decided(cfi_free, cfi_restricted, decision, text):
    rule = make_rule(cutoffs="cheung_rensvold2002")
    d = level_delta(fit(120, 60, cfi_restricted, 0.05, 0.05), fit(100, 50, cfi_free, 0.05, 0.05))
    out = judge_step(d, "scalar", rule)
    assert out["decision"] == decision
    assert out["reason"] == text
    (c,) = out["checks"]
    assert shown_is_true(c) and c["passed"] == (decision == "holds")


@pytest.mark.parametrize(
    "rmsea_free, rmsea_restricted, srmr_restricted, level, decision, rmsea_text",
    [
        (0.050, 0.065, 0.060, "metric", "fails", "dRMSEA = +0.015 >= 0.015"),   # Chen (2007): >= .015 fails
        (0.050, 0.0649, 0.060, "metric", "holds", "dRMSEA = +0.0149 < 0.015"),  # +.0149 would read +.015 at 3 digits
        (0.050, 0.050, 0.079, "metric", "holds", None),   # dSRMR .029 < .030 (loadings, Chen 2007)
        (0.050, 0.050, 0.079, "scalar", "fails", None),   # dSRMR .029 >= .010 (intercepts, Chen 2007)
    ],
)
def test_chen_cases_are_shown_as_decided(rmsea_free, rmsea_restricted, srmr_restricted, level, decision, rmsea_text):
    rule = make_rule(criteria=["cfi", "rmsea", "srmr"], cutoffs="chen2007")
    d = level_delta(fit(120, 60, 0.95, rmsea_restricted, srmr_restricted), fit(100, 50, 0.95, rmsea_free, 0.050))
    out = judge_step(d, level, rule)
    assert out["decision"] == decision
    for c in out["checks"]:
        assert shown_is_true(c), c
        # the printed relation is the passing one exactly when the criterion passed
        assert (c["relation"] in (">", "<")) == c["passed"]
    if rmsea_text:
        assert rmsea_text in out["reason"]


def test_chi2_and_configural_comparisons_read_true():
    rule = make_rule(criteria=["chi2"], alpha=0.05)
    d = {"chi2": 10.0, "df": 4, "pvalue": 0.0499, "cfi": 0.0, "rmsea": 0.0, "srmr": 0.0}
    out = judge_step(d, "metric", rule)
    assert out["decision"] == "fails" and "p = 0.0499 < 0.050" in out["reason"]
    conf = judge_configural({"cfi": 0.8999, "rmsea": 0.05}, make_rule())
    assert conf["decision"] == "fails" and "CFI = 0.8999 < 0.900" in conf["reason"]  # CFI >= .90: common practice
    assert all(shown_is_true(c) for c in conf["checks"])


def test_pipeline_and_plan_read_decision_sections_with_one_function(tmp_path):
    # the run's rule is rule_from_section of the pipeline's decision section; the planner's
    # "your rule" is the same function of the plan's section: equal rules, equal decisions
    section = {"criteria": ["cfi", "rmsea", "srmr"], "combine": "paired", "cutoffs": "chen2007_small"}
    spec = load_pipeline(write_yaml(tmp_path / "p.yaml", hs_doc(decision=section)))
    assert spec.rule == rule_from_section(section)
    plan_doc = {
        "model": {"factors": {"F": ["a", "b", "c"]}}, "groups": ["g1", "g2"],
        "population": {"loadings": {"F": {"a": 0.7, "b": 0.6, "c": 0.8}}, "intercepts": {"a": 0, "b": 0, "c": 0},
                       "residuals": {"a": 0.5, "b": 0.6, "c": 0.4}},
        "sizes": 100, "decision": section,
    }
    rules = load_plan(plan_doc)["rules"]
    mine = rules[next(k for k in rules if k.startswith("your rule"))]
    assert mine.rule == spec.rule
    # the planner's default Chen rule is the run's default rule (no decision section)
    default_spec = load_pipeline(write_yaml(tmp_path / "d.yaml", hs_doc()))
    assert default_rules()[RUN_DEFAULT].rule == default_spec.rule


def test_plan_rule_flags_exactly_when_run_judges_fails():
    # random step changes around the Chen (2007) cutoffs: the planning rule and the run's
    # judge_step agree on every one, for the default (every criterion) and the paired reading
    rng = np.random.default_rng(1)
    deltas = [{"dchi2": float(rng.uniform(0, 30)), "ddf": 6, "p": float(rng.uniform()),
               "dcfi": float(rng.normal(-0.008, 0.006)), "drmsea": float(rng.normal(0.012, 0.006)),
               "dsrmr": float(rng.normal(0.02, 0.015))} for _ in range(300)]
    for rule in (rule_from_section({}), rule_from_section({"combine": "paired", "criteria": ["cfi", "rmsea", "srmr"]})):
        planner = decision_rule(rule)
        for d in deltas:
            for level in ("metric", "scalar"):
                run = judge_step({"chi2": d["dchi2"], "df": d["ddf"], "pvalue": d["p"], "cfi": d["dcfi"],
                                  "rmsea": d["drmsea"], "srmr": d["dsrmr"]}, level, rule)
                assert planner(d, level) == (run["decision"] == "fails")
    # Chen's joint reading, written out directly (Chen 2007), matches combine: paired
    paired = decision_rule(rule_from_section({"combine": "paired", "criteria": ["cfi", "rmsea", "srmr"]}))
    got = [paired(d, "metric") for d in deltas]
    assert got == [chen_rule(d, "metric") for d in deltas] and any(got) and not all(got)
