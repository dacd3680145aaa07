"""Latent mean differences and variance ratios, with the two-invariant-items guard."""

import numpy as np
import pytest

from invariance import Structure, build_level, fit, sample_stats
from invariance.effects import compare_latent, invariant_items
from invariance.model import Release

semopy_hs = pytest.importorskip("semopy.examples.holzinger39")

HS = Structure({"visual": ("x1", "x2", "x3"), "textual": ("x4", "x5", "x6"), "speed": ("x7", "x8", "x9")})


@pytest.fixture(scope="module")
def hs_stats():
    # Holzinger & Swineford (1939) data shipped with semopy, grouped by school
    return sample_stats(semopy_hs.get_data(), HS.items, "school")


def test_means_and_ratios_match_parameter_estimates(hs_stats):
    # With the reference mean fixed at 0 and variance at 1, the difference is the focal
    # mean parameter and the ratio the focal variance: the delta-method SEs must equal
    # the parameters' own SEs (identity of the delta method for a linear map).
    rel = (Release("intercept", "x3"), Release("intercept", "x7"))
    res = fit(build_level(HS, hs_stats.names, "scalar", released=rel), hs_stats)
    lc = compare_latent(res)
    est = res.estimates()
    gw = est[est.group == "Grant-White"]
    for m in lc.means:
        row = gw[(gw.parameter == "mean") & (gw.variable == m.factor)].iloc[0]
        assert m.difference == pytest.approx(row.estimate, abs=1e-8)
        assert m.se == pytest.approx(row.se, rel=1e-4)
        assert m.standardized == pytest.approx(m.difference, rel=1e-8)
        assert m.ci_low < m.difference < m.ci_high
        assert m.ci_high - m.difference == pytest.approx(1.959964 * m.se, rel=1e-5)
    for v in lc.variances:
        row = gw[(gw.parameter == "variance") & (gw.variable == v.factor)].iloc[0]
        assert v.ratio == pytest.approx(row.estimate, rel=1e-8)
        assert v.se == pytest.approx(row.se, rel=1e-4)
    assert len(lc.means) == 3 and not lc.notes
    assert lc.to_dict()["means"][0]["reference"] == "Pasteur"


def test_guard_two_invariant_items(hs_stats):
    # Common practice (Byrne, Shavelson & Muthen 1989): visual keeps only x3 with equal
    # loading and intercept once x1 and x2 intercepts are released: no mean comparison.
    rel = (Release("intercept", "x1"), Release("intercept", "x2"))
    res = fit(build_level(HS, hs_stats.names, "scalar", released=rel), hs_stats)
    inv = invariant_items(res.spec)
    assert inv["visual"]["scalar"] == ("x3",) and inv["visual"]["loading"] == ("x1", "x2", "x3")
    lc = compare_latent(res)
    assert {m.factor for m in lc.means} == {"textual", "speed"}
    assert any("visual" in n and "Byrne" in n for n in lc.notes)
    assert {v.factor for v in lc.variances} == {"visual", "textual", "speed"}


def test_below_scalar_no_means(hs_stats):
    res = fit(build_level(HS, hs_stats.names, "metric"), hs_stats)
    lc = compare_latent(res)
    assert lc.means == () and len(lc.variances) == 3
    assert any("scalar" in n for n in lc.notes)
