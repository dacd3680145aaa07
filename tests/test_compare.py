"""Decisions on nested levels against hand-computed changes.

Cutoffs: Cheung & Rensvold (2002): dCFI <= -0.01 signals noninvariance. Chen (2007),
N > 300 and balanced groups: dCFI -0.010 with dRMSEA 0.015 or dSRMR 0.030 (loadings) /
0.010 (intercepts, residuals); N <= 300 or unbalanced: dCFI -0.005, dRMSEA 0.010,
dSRMR 0.025 / 0.005 (METHODS section 5).
"""

import pytest
from scipy import stats

from invariance.decide.compare import judge_configural, judge_step, level_delta, make_rule
from invariance.decide.verdict import PERMITS, supported_level
from invariance.errors import SpecificationError


def fit(chi2, df, cfi, rmsea, srmr):
    return {"chi2": chi2, "df": df, "cfi": cfi, "rmsea": rmsea, "srmr": srmr}


def test_delta_is_restricted_minus_free_with_chi2_difference():
    # Holzinger & Swineford by school, configural 115.851/48 vs metric 124.044/54 (METHODS 12):
    # dT = 8.193 on 6 df; p from scipy's chi-square survival function.
    free = fit(115.851, 48, 0.923, 0.097, 0.068)
    restricted = fit(124.044, 54, 0.921, 0.093, 0.072)
    d = level_delta(restricted, free)
    assert d["chi2"] == pytest.approx(8.193)
    assert d["df"] == 6
    assert d["pvalue"] == pytest.approx(stats.chi2.sf(8.193, 6))
    assert d["pvalue"] == pytest.approx(0.2244, abs=5e-4)  # hand check with scipy, 8.193 on 6 df
    assert d["cfi"] == pytest.approx(-0.002)
    assert d["rmsea"] == pytest.approx(-0.004)
    assert d["srmr"] == pytest.approx(0.004)


@pytest.mark.parametrize(
    "cfi_free, cfi_restricted, expected",
    [
        (0.950, 0.941, "holds"),   # dCFI = -0.009 > -0.01: Cheung & Rensvold (2002)
        (0.950, 0.940, "fails"),   # dCFI = -0.010 <= -0.01: Cheung & Rensvold (2002)
        (0.950, 0.939, "fails"),   # dCFI = -0.011: Cheung & Rensvold (2002)
        (0.900, 0.905, "holds"),   # fit improves
    ],
)
def test_cheung_rensvold_cfi_cutoff(cfi_free, cfi_restricted, expected):
    rule = make_rule(cutoffs="cheung_rensvold2002")
    assert rule.criteria == ("cfi",)
    d = level_delta(fit(120, 60, cfi_restricted, 0.05, 0.05), fit(100, 50, cfi_free, 0.05, 0.05))
    for level in ("metric", "scalar", "strict"):
        assert judge_step(d, level, rule)["decision"] == expected


def test_chen_loading_step_uses_srmr_030_and_intercept_step_010():
    # Chen (2007): dSRMR 0.025 is acceptable for loadings (< .030) but not for intercepts (>= .010)
    rule = make_rule(criteria=["srmr"], cutoffs="chen2007")
    d = level_delta(fit(130, 60, 0.95, 0.05, 0.075), fit(100, 50, 0.95, 0.05, 0.050))
    assert d["srmr"] == pytest.approx(0.025)
    assert judge_step(d, "metric", rule)["decision"] == "holds"
    assert judge_step(d, "scalar", rule)["decision"] == "fails"
    assert judge_step(d, "strict", rule)["decision"] == "fails"


@pytest.mark.parametrize(
    "drmsea, expected",
    [(0.014, "holds"), (0.015, "fails"), (0.020, "fails")],  # Chen (2007): dRMSEA >= .015 signals noninvariance
)
def test_chen_rmsea_cutoff(drmsea, expected):
    rule = make_rule(criteria=["rmsea"])
    d = level_delta(fit(130, 60, 0.95, 0.040 + drmsea, 0.05), fit(100, 50, 0.95, 0.040, 0.05))
    assert judge_step(d, "metric", rule)["decision"] == expected


def test_all_versus_paired_combination():
    # Chen (2007) pairing: noninvariance when dCFI <= -.010 together with dRMSEA >= .015 or dSRMR >= .030
    d = level_delta(fit(130, 60, 0.938, 0.050, 0.055), fit(100, 50, 0.950, 0.040, 0.050))
    # hand-computed: dCFI = -0.012 (fails), dRMSEA = +0.010 (passes), dSRMR = +0.005 (passes at metric)
    all_rule = make_rule(criteria=["cfi", "rmsea", "srmr"], combine="all")
    paired = make_rule(criteria=["cfi", "rmsea", "srmr"], combine="paired")
    assert judge_step(d, "metric", all_rule)["decision"] == "fails"
    assert judge_step(d, "metric", paired)["decision"] == "holds"
    # dRMSEA = +0.016 as well: both readings say the level fails
    d2 = level_delta(fit(130, 60, 0.938, 0.056, 0.055), fit(100, 50, 0.950, 0.040, 0.050))
    assert judge_step(d2, "metric", paired)["decision"] == "fails"


def test_chen_small_sample_cutoffs_are_stricter():
    # Chen (2007), N <= 300: dCFI -0.005; hand-computed dCFI = -0.006
    d = level_delta(fit(110, 60, 0.944, 0.05, 0.05), fit(100, 50, 0.950, 0.05, 0.05))
    assert judge_step(d, "scalar", make_rule(criteria=["cfi"], cutoffs="chen2007"))["decision"] == "holds"
    assert judge_step(d, "scalar", make_rule(criteria=["cfi"], cutoffs="chen2007_small"))["decision"] == "fails"
    small = make_rule(cutoffs="chen2007_small")
    assert small.cutoff("srmr", "metric") == 0.025 and small.cutoff("srmr", "scalar") == 0.005


def test_chi2_criterion_uses_alpha():
    rule = make_rule(criteria=["chi2"], alpha=0.05)
    # 8.193 on 6 df: p = .224 >= .05 holds; 20 on 6 df: p = .0028 < .05 fails (scipy)
    ok = level_delta(fit(108.193, 56, 0.9, 0.05, 0.05), fit(100, 50, 0.9, 0.05, 0.05))
    bad = level_delta(fit(120, 56, 0.9, 0.05, 0.05), fit(100, 50, 0.9, 0.05, 0.05))
    assert judge_step(ok, "metric", rule)["decision"] == "holds"
    assert judge_step(bad, "metric", rule)["decision"] == "fails"


def test_user_cutoffs_per_level_and_defaults_named():
    rule = make_rule(criteria=["cfi", "srmr"], cutoffs={"srmr": {"metric": 0.04}})
    assert rule.cutoff("srmr", "metric") == 0.04
    assert rule.cutoff("srmr", "scalar") == 0.010  # Chen (2007) value kept
    assert "Chen (2007)" in make_rule().describe()
    assert "Cheung & Rensvold (2002)" in make_rule(cutoffs="cheung_rensvold2002").describe()


def test_rule_errors():
    with pytest.raises(SpecificationError, match="rmsea"):
        make_rule(criteria=["cfi", "rmsea"], cutoffs="cheung_rensvold2002")
    with pytest.raises(SpecificationError, match="preset"):
        make_rule(cutoffs="nonsense")


def test_not_converged_fails_and_configural_fit():
    rule = make_rule()
    assert judge_step({}, "metric", rule, converged=False)["decision"] == "fails"
    good = judge_configural({"cfi": 0.95, "rmsea": 0.06}, rule)
    bad = judge_configural({"cfi": 0.85, "rmsea": 0.06}, rule)  # CFI .90: common practice
    assert good["decision"] == "holds" and bad["decision"] == "fails"
    improper = judge_configural({"cfi": 0.95, "rmsea": 0.06}, rule, problems=["negative residual variance of item a"])
    assert improper["decision"] == "fails"


def test_supported_level_is_last_of_unbroken_run():
    lv = lambda name, dec: {"level": name, "decision": dec}  # noqa: E731
    assert supported_level([lv("configural", "holds"), lv("metric", "holds"), lv("scalar", "fails")]) == "metric"
    assert supported_level([lv("configural", "holds"), lv("metric", "fails"), lv("scalar", "holds")]) == "configural"
    assert supported_level([lv("configural", "fails"), lv("metric", "not_tested")]) is None
    assert "latent" in PERMITS["scalar"] and "sum scores" in PERMITS["strict"]
