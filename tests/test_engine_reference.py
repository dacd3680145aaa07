"""The engine against external references.

Sources:
- Holzinger & Swineford (1939) data as shipped in semopy (semopy.examples.holzinger39).
  Single-group three-factor ML fit: chi-square 85.306 on 24 df, CFI .931, TLI .896,
  RMSEA .092 (METHODS section 12: widely published; reproduced with semopy 2.3.11).
- Configural model by school = the sum of semopy's two per-school fits (computed here).
- Metric, scalar and strict by school: the textbook values 124.044/54, 164.103/60,
  181.511/69 are from memory (common tutorial example of this data set).
- Bollen (1989) political democracy data as shipped in semopy, with semopy's own
  example model (structural paths and correlated residuals): chi-square equal to semopy's.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

semopy = pytest.importorskip("semopy")

import invariance as inv  # noqa: E402

HS_FACTORS = {"visual": ["x1", "x2", "x3"], "textual": ["x4", "x5", "x6"], "speed": ["x7", "x8", "x9"]}
HS_SYNTAX = "visual =~ x1 + x2 + x3\ntextual =~ x4 + x5 + x6\nspeed =~ x7 + x8 + x9"


@pytest.fixture(scope="module")
def hs():
    return semopy.examples.holzinger39.get_data()


@pytest.fixture(scope="module")
def hs_structure():
    return inv.Structure(HS_FACTORS, family="correlated")


def test_single_group_published_values(hs, hs_structure):
    # METHODS 12: chi2 85.306 on 24 df, CFI .931, TLI .896, RMSEA .092 (widely published)
    r = inv.fit_level(hs, hs_structure, "configural")
    assert r.converged and not r.problems
    assert r.fit.df == 24
    assert r.fit.chi2 == pytest.approx(85.306, abs=1e-3)
    assert r.fit.cfi == pytest.approx(0.931, abs=5e-4)
    assert r.fit.tli == pytest.approx(0.896, abs=5e-4)
    assert r.fit.rmsea == pytest.approx(0.092, abs=5e-4)
    lo, hi = r.fit.rmsea_ci90
    assert lo < r.fit.rmsea < hi
    # 90% interval from memory: about .071 to .114
    assert lo == pytest.approx(0.071, abs=2e-3) and hi == pytest.approx(0.114, abs=2e-3)


def test_configural_equals_sum_of_semopy_group_fits(hs, hs_structure):
    # independent reference: semopy fits each school on its own; chi2 and df add up
    total_chi2, total_df = 0.0, 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for _, sub in hs.groupby("school"):
            m = semopy.Model(HS_SYNTAX)
            m.fit(sub)
            st = semopy.calc_stats(m)
            total_chi2 += float(st["chi2"].iloc[0])
            total_df += int(st["DoF"].iloc[0])
    r = inv.fit_level(hs, hs_structure, "configural", group="school")
    assert r.fit.df == total_df == 48
    assert r.fit.chi2 == pytest.approx(total_chi2, rel=1e-5)


@pytest.mark.parametrize(
    "level, chi2, df",
    [
        ("configural", 115.851, 48),  # from memory (textbook tutorial values)
        ("metric", 124.044, 54),  # from memory
        ("scalar", 164.103, 60),  # from memory
        ("strict", 181.511, 69),  # from memory
    ],
)
def test_levels_by_school(hs, hs_structure, level, chi2, df):
    r = inv.fit_level(hs, hs_structure, level, group="school")
    assert r.converged and not r.problems
    assert r.fit.df == df
    assert r.fit.chi2 == pytest.approx(chi2, abs=2e-3)


def test_degrees_of_freedom_formula(hs, hs_structure):
    # METHODS 3: df = sum_g p(p+3)/2 - distinct free parameters
    stats = inv.sample_stats(hs, hs_structure.items, "school")
    for level, df in zip(inv.LEVELS, (48, 54, 60, 69)):
        spec = inv.build_level(hs_structure, stats.names, level)
        assert spec.df == df
        assert spec.n_moments == 2 * 9 * 12 // 2


def test_political_democracy_structural_paths_match_semopy():
    data = semopy.examples.political_democracy.get_data()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m = semopy.Model(semopy.examples.political_democracy.get_model())
        m.fit(data)
        st = semopy.calc_stats(m)
    ref_chi2, ref_df = float(st["chi2"].iloc[0]), int(st["DoF"].iloc[0])
    structure = inv.Structure(
        {"ind60": ["x1", "x2", "x3"], "dem60": ["y1", "y2", "y3", "y4"], "dem65": ["y5", "y6", "y7", "y8"]},
        family="correlated",
        regressions=(("dem60", "ind60"), ("dem65", "ind60"), ("dem65", "dem60")),
        residual_covariances=(("y1", "y5"), ("y2", "y4"), ("y2", "y6"), ("y3", "y7"), ("y4", "y8"), ("y6", "y8")),
    )
    r = inv.fit_level(data, structure, "configural")
    assert r.converged
    assert r.fit.df == ref_df == 35
    assert r.fit.chi2 == pytest.approx(ref_chi2, rel=1e-4)
    # Bollen (1989) reports chi-square 38.1 on 35 df for this model (from memory)
    assert r.fit.chi2 == pytest.approx(38.1, abs=0.1)


def test_estimates_table_and_standard_errors(hs, hs_structure):
    r = inv.fit_level(hs, hs_structure, "configural")
    est = r.estimates()
    assert {"group", "parameter", "variable", "other", "label", "free", "estimate", "se", "z", "pvalue", "std"} <= set(est)
    lam = est[(est.parameter == "loading") & (est.variable == "x1")]
    # with the factor variance fixed at 1 the loading of x1 is about .900 (SE .081), from memory
    assert lam.estimate.iloc[0] == pytest.approx(0.900, abs=2e-3)
    assert lam.se.iloc[0] == pytest.approx(0.081, abs=2e-3)
    # standardized loading of x1 is about .772 (from memory)
    assert lam["std"].iloc[0] == pytest.approx(0.772, abs=2e-3)
    # the observed information gives close but not identical SEs
    r_obs = inv.fit_level(hs, hs_structure, "configural", information="observed")
    assert np.allclose(r_obs.theta, r.theta)
    assert np.allclose(r_obs.se, r.se, rtol=0.3) and not np.allclose(r_obs.se, r.se, rtol=1e-6)


def test_semopy_estimates_agree(hs, hs_structure):
    # semopy's single-group estimates (marker identification) imply the same Sigma
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m = semopy.Model(HS_SYNTAX)
        m.fit(hs)
        sigma_ref = m.calc_sigma()[0]
    r = inv.fit_level(hs, hs_structure, "configural")
    names = m.vars["observed"]
    order = [r.spec.items.index(v) for v in names]
    ours = r.sigma[0][np.ix_(order, order)]
    assert np.allclose(ours, sigma_ref, atol=1e-3)  # semopy stops at a looser tolerance
