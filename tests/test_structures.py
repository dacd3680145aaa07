"""Rival structures and per-group fit on the Holzinger & Swineford (1939) data (semopy copy)."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import semopy

from invariance import Structure
from invariance.errors import InvarianceWarning, SpecificationError
from invariance.decide.structures import build_structure, compare_structures, group_fit

HS = semopy.examples.holzinger39.get_data()
FACTORS = {"visual": ("x1", "x2", "x3"), "textual": ("x4", "x5", "x6"), "speed": ("x7", "x8", "x9")}


@pytest.fixture(scope="module")
def one_group():
    return compare_structures(HS, FACTORS, ["single", "correlated", "second_order"])


def test_second_order_equals_correlated(one_group):
    # METHODS 12: three-factor model chi2 85.306 on 24 df (widely published); the
    # second-order model over three factors is the same model (just-identified upper part)
    rows = {r["structure"]: r for r in one_group.rows}
    assert {r["group"] for r in one_group.rows} == {"all"}
    for s in ("correlated", "second_order"):
        assert rows[s]["chi2"] == pytest.approx(85.306, abs=1e-3)
        assert rows[s]["df"] == 24
    assert rows["second_order"]["cfi"] == pytest.approx(0.931, abs=1e-3)
    assert rows["second_order"]["bic"] == pytest.approx(rows["correlated"]["bic"], abs=1e-6)
    eq = one_group.equivalent
    assert any(set(e["structures"]) == {"second_order", "correlated"} for e in eq)
    assert any("equivalent, not competing" in n for n in one_group.notes)


def test_single_factor_worse_by_every_index(one_group):
    # the one-factor model of these data is known to fit badly (chi2 312.264 on 27 df, from memory)
    rows = {r["structure"]: r for r in one_group.rows}
    one, three = rows["single"], rows["correlated"]
    assert one["df"] == 27
    assert one["chi2"] == pytest.approx(312.264, abs=1e-2)  # from memory; semopy check below
    assert one["chi2"] > three["chi2"]
    assert one["cfi"] < three["cfi"] and one["tli"] < three["tli"]
    assert one["rmsea"] > three["rmsea"] and one["srmr"] > three["srmr"]
    for c in ("aic", "bic", "bic_adjusted"):
        assert one[c] > three[c]
        assert not one[f"best_{c}"]
    assert one_group.best("bic") in ("correlated", "second_order")
    # equivalent structures tie and are both marked
    assert all(r["best_bic"] for r in one_group.rows if r["structure"] in ("correlated", "second_order"))


def test_single_factor_against_semopy(one_group):
    # semopy 2.3 (independent implementation), one-factor model, ML
    m = semopy.Model("g =~ x1 + x2 + x3 + x4 + x5 + x6 + x7 + x8 + x9")
    m.fit(HS[[f"x{k}" for k in range(1, 10)]])
    st = semopy.calc_stats(m)
    row = next(r for r in one_group.rows if r["structure"] == "single")
    assert row["chi2"] == pytest.approx(float(st["chi2"].iloc[0]), rel=1e-3)
    assert row["cfi"] == pytest.approx(float(st["CFI"].iloc[0]), abs=2e-3)


def test_second_order_loadings_against_semopy(one_group):
    # semopy 2.3: standardized second-order loadings of visual, textual, speed on g
    m = semopy.Model(
        "visual =~ x1 + x2 + x3\ntextual =~ x4 + x5 + x6\nspeed =~ x7 + x8 + x9\ng =~ visual + textual + speed"
    )
    m.fit(HS[[f"x{k}" for k in range(1, 10)]])
    ins = m.inspect(std_est=True)
    ref = {r["lval"]: abs(r["Est. Std"]) for _, r in ins.iterrows() if r["op"] == "~" and r["rval"] == "g"}
    res = one_group.results[("second_order", "all")]
    est = res.estimates()
    mine = {r.variable: abs(r["std"]) for _, r in est.iterrows() if r.parameter == "path"}
    assert set(mine) == set(ref)
    for f in ref:
        assert mine[f] == pytest.approx(ref[f], abs=5e-3)


TWO = {"visual": ("x1", "x2", "x3"), "textual": ("x4", "x5", "x6")}


def test_two_factor_second_order_equals_correlated():
    # identity (equal higher-order loadings: one parameter for one covariance; Kline 2016,
    # from memory): the second-order model over two factors fits exactly as two correlated factors
    cmp_ = compare_structures(HS, TWO, ["correlated", "second_order"])
    rows = {r["structure"]: r for r in cmp_.rows}
    assert rows["second_order"]["df"] == rows["correlated"]["df"] == 8
    assert rows["second_order"]["chi2"] == pytest.approx(rows["correlated"]["chi2"], abs=1e-4)
    known = [e for e in cmp_.equivalent if set(e["structures"]) == {"second_order", "correlated"}]
    assert known and "two first-order factors" in known[0]["reason"]
    # the two higher-order loadings are one parameter
    est = cmp_.results[("second_order", "all")].estimates()
    paths = est[est.parameter == "path"]
    assert len(paths) == 2 and paths["estimate"].nunique() == 1
    # independent reference: semopy 2.3 fit of the correlated two-factor model (ML)
    m = semopy.Model("visual =~ x1 + x2 + x3\ntextual =~ x4 + x5 + x6")
    m.fit(HS[[f"x{k}" for k in range(1, 7)]])
    st = semopy.calc_stats(m)
    assert rows["correlated"]["chi2"] == pytest.approx(float(st["chi2"].iloc[0]), rel=1e-3)
    assert rows["correlated"]["df"] == int(st["DoF"].iloc[0])


def test_build_structure_defaults():
    s = build_structure(FACTORS, "single")
    assert s.factors == {"general": tuple(f"x{k}" for k in range(1, 10))}
    assert build_structure(FACTORS, "bifactor").general == "general"
    assert build_structure(FACTORS, "second_order", general="g").general == "g"
    with pytest.raises(SpecificationError, match="family must be one of"):
        build_structure(FACTORS, "tree")
    with pytest.raises(SpecificationError, match="bifactor structure over one specific factor"):
        build_structure({"a": ("x1", "x2", "x3", "x4")}, "bifactor")
    with pytest.raises(SpecificationError, match="listed twice"):
        compare_structures(HS, FACTORS, ["single", "single"])


def test_by_school_rows_and_configural_sum():
    # METHODS 12: configural model by school = the two single-school fits added (115.851 on 48 df)
    cmp_ = compare_structures(HS, FACTORS, ["correlated", "single"], group="school")
    rows = {(r["structure"], r["group"]): r for r in cmp_.rows}
    assert set(g for _, g in rows) == {"Pasteur", "Grant-White", "all"}
    allr = rows[("correlated", "all")]
    assert allr["chi2"] == pytest.approx(115.851, abs=1e-3) and allr["df"] == 48
    assert allr["chi2"] == pytest.approx(
        rows[("correlated", "Pasteur")]["chi2"] + rows[("correlated", "Grant-White")]["chi2"], abs=1e-6
    )
    for g in ("Pasteur", "Grant-White", "all"):
        assert sum(rows[(s, g)]["best_bic"] for s in ("correlated", "single")) == 1
    assert cmp_.table().shape[0] == 6


def test_group_fit_warns_by_name():
    s = Structure(factors=FACTORS)
    # default rule CFI < .90 or RMSEA > .10 (common practice): Pasteur has RMSEA .104
    # (this fit of the published single-school model), Grant-White .089
    with pytest.warns(InvarianceWarning, match="group Pasteur: RMSEA 0.104 > 0.10"):
        gf = group_fit(HS, s, group="school")
    assert gf.failing == ("Pasteur",)
    assert gf.rows[0]["chi2"] == pytest.approx(64.309, abs=1e-3)  # this fit; with Grant-White it adds to METHODS 12's 115.851
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        ok = group_fit(HS, s, group="school", cfi_min=0.5, rmsea_max=0.5)
    assert ok.failing == ()
    assert [r["group"] for r in ok.rows] == ["Pasteur", "Grant-White"]
    with pytest.raises(SpecificationError, match="'cfi_min' parameter"):
        group_fit(HS, s, group="school", cfi_min=3)
