"""The verdict contract: one Verdict from the level rows, read by every output.

Small synthetic level rows check the rules of invariance.decide.verdict directly; the
demo pipelines (the invented Shift Outlook scenario with planted effects: a lower loading
of so04 at ridge, higher intercepts of so03 and so09 at mesa) check full, partial and
up-front-released runs end to end. Location of the differing group: a Wald z of a linear
contrast (textbook), checked against a hand computation with scipy.
"""

import json
import pathlib

import numpy as np
import pandas as pd
import pytest
import yaml
from scipy import stats

import invariance
from invariance.decide.compare import make_rule
from invariance.decide.verdict import (
    PERMITS, build_verdict, calibration_note, display_rows, is_partial, supported_level,
)
from invariance.partial.locate import differing_units

ROOT = pathlib.Path(__file__).resolve().parents[1]


def row(level, decision="holds", released=(), **extra):
    return {"level": level, "decision": decision, "converged": True, "problems": [], "released": list(released), **extra}


X3 = {"parameter": "intercept", "item": "x3", "factor": None, "groups": ["a", "b", "c"]}


def test_full_level_is_not_partial():
    rows = [row("configural"), row("metric"), row("scalar"), row("strict", "fails")]
    v = build_verdict(rows)
    assert v.supported_level == "scalar" == supported_level(rows)
    assert not v.supported_partially and v.released == ()
    assert v.text == f"The data support scalar invariance: {PERMITS['scalar']}."
    d = v.to_dict()
    assert d["supported_partially"] is False and d["released_constraints"] == []


def test_search_release_makes_the_level_and_later_ones_partial():
    found = {**X3, "source": "search", "level": "scalar"}
    carried = {**X3, "groups": None, "source": "carried"}
    rows = [row("configural"), row("metric"), row("scalar", "holds_partially", [found]), row("strict", "holds", [carried])]
    v = build_verdict(rows, differs={("intercept", "x3", None): ("b",)}, scales={"F": ["x1", "x2", "x3", "x4"]})
    assert v.supported_level == "strict" and v.supported_partially
    (r,) = v.released
    assert (r.item, r.parameter, r.source, r.level, r.differs_in) == ("x3", "intercept", "search", "scalar", ("b",))
    assert v.text.startswith("The data support partial strict invariance, resting on 1 released constraint: "
                             "the intercept of x3 (differs in b).")
    assert "observed sum scores only over the items with no released parameter (F: x1, x2, x4)" in v.text
    assert "observed sum scores can be compared" not in v.text
    assert v.label == "partial strict"
    # three groups, two of them named: "differs in"; two groups: "differs between" (the
    # carried record has no groups: the search's record gives them)
    v = build_verdict(rows, differs={("intercept", "x3", None): ("a", "b")})
    assert "differs in a, b" in v.text
    two = [{**r, "released": [{**x, "groups": x["groups"][:2] if x["groups"] else None} for x in r["released"]]}
           for r in rows]
    assert "differs between a and b" in build_verdict(two, differs={("intercept", "x3", None): ("a", "b")}).text


def test_up_front_releases_count_only_at_or_above_their_level():
    pipe = {"parameter": "intercept", "item": "x3", "factor": None, "groups": ["b"]}
    rows = [row("configural", released=[pipe]), row("metric", released=[pipe]), row("scalar", "fails", [pipe])]
    v = build_verdict(rows, up_front=[pipe])
    # an intercept is held equal only from the scalar level on: metric is not partial
    assert v.supported_level == "metric" and not v.supported_partially
    rows[2]["decision"] = "holds"
    v = build_verdict(rows, up_front=[pipe])
    assert v.supported_level == "scalar" and v.supported_partially
    assert v.released[0].source == "pipeline" and "released in model.released, b" in v.text
    # a loading named in model.released without its factor is the one the model resolved
    load = {"parameter": "loading", "item": "x1", "factor": None, "groups": ["b"]}
    v = build_verdict([row("configural"), row("metric", released=[{**load, "factor": "F"}])], up_front=[load])
    assert v.supported_partially and v.released[0].source == "pipeline"
    # the configural level constrains nothing across groups: never partial
    assert not is_partial(rows[0])
    v = build_verdict([row("configural", released=[pipe]), row("metric", "fails", [pipe])], up_front=[pipe])
    assert v.supported_level == "configural" and not v.supported_partially


def test_partial_scalar_names_bias_and_thin_anchors():
    rel = [{"parameter": "intercept", "item": i, "factor": None, "groups": None, "source": "search", "level": "scalar"}
           for i in ("x2", "x3")]
    rows = [row("configural"), row("metric"), row("scalar", "holds_partially", rel)]
    bias = [{"scale": "F", "items": ["x1", "x2", "x3"], "group": "b", "bias": 0.85},
            {"scale": "F", "items": ["x1", "x2", "x3"], "group": "c", "bias": -0.10}]
    v = build_verdict(rows, scales={"F": ["x1", "x2", "x3"]}, scale_bias=bias, reference="a")
    assert "partial scalar invariance" in v.text and "latent (factor) means can be" in v.text
    assert "F +0.85 in b" in v.text and "against a" in v.text
    # one item left with equal loading and intercept: the mean of F is not comparable (Byrne et al. 1989)
    assert "The mean of F rests on fewer than 2 items" in v.text


def test_next_step_names_the_release_search_only_when_off():
    rows = [row("configural"), row("metric"), row("scalar", "fails"), row("strict", "not_tested")]
    assert "partial: {enabled: true}" in build_verdict(rows).next_step
    assert build_verdict(rows, partial_enabled=True).next_step is None
    assert build_verdict([row("configural", "fails")]).next_step is None


def test_display_rows_show_constrained_then_partial():
    found = {**X3, "source": "search", "level": "scalar"}
    con = {"chi2": 99.0, "decision": "fails", "delta": {"cfi": -0.02}, "reason": "dCFI = -0.020 <= -0.010"}
    rows = [row("configural", released=[{**X3, "groups": None}]), row("metric"),
            row("scalar", "holds_partially", [found], chi2=50.0, constrained=con)]
    shown = display_rows(rows)
    assert [(r["row_name"], r["decision"], r.get("chi2")) for r in shown] == [
        ("configural", "holds", None), ("metric", "holds", None),
        ("scalar", "fails", 99.0), ("partial scalar", "holds_partially", 50.0)]
    assert [r["partial"] for r in shown] == [False, False, False, True]


def test_calibration_note():
    chen = make_rule(cutoffs="chen2007")
    # METHODS section 14: cutoffs calibrated for ML on continuous items (Sass, Schmitt & Marsh 2014)
    assert "Sass, Schmitt & Marsh 2014" in calibration_note(chen, estimator="dwls", ordinal=True)
    assert "DWLS on ordered-categorical items" in calibration_note(chen, estimator="dwls", ordinal=True)
    assert "robust" in calibration_note(chen, estimator="ml_robust")
    assert calibration_note(chen, estimator="ml") is None
    own = make_rule(criteria=["cfi"], cutoffs={"cfi": 0.004})
    assert calibration_note(own, estimator="dwls", ordinal=True) is None
    assert calibration_note(make_rule(criteria=["chi2"]), estimator="dwls", ordinal=True) is None


def test_differing_units_against_hand_computed_z():
    # four independent estimates, SE 0.1: the fourth lies 1.0 above the others. Its contrast
    # with the mean of the other three has variance 0.01 + 0.01/3, z = 1 / sqrt(0.04/3) = 8.66,
    # beyond the Bonferroni bound norm.isf(0.05 / 8) = 2.50 (scipy); the other three agree.
    cov = np.eye(4) * 0.01
    assert stats.norm.isf(0.05 / 8) == pytest.approx(2.4977, abs=1e-4)
    assert differing_units(np.array([0.0, 0.0, 0.0, 1.0]), cov) == [3]
    # two groups: the one difference, z = 0.5 / sqrt(0.02) = 3.54 > norm.isf(0.0125) = 2.24: both named
    assert differing_units(np.array([0.0, 0.5]), np.eye(2) * 0.01) == [0, 1]
    assert differing_units(np.array([0.0, 0.1]), np.eye(2) * 0.01) == []      # z = 0.71
    # correlated estimates: a shared covariance of 0.008 shrinks the contrast variance to
    # 0.002 + 0.002/3, z = 0.25 / sqrt(0.002667) = 4.84: named, though z = 0.25 / sqrt(0.01333)
    # = 2.17 < 2.50 when the covariance is ignored
    cov = np.full((4, 4), 0.008) + np.eye(4) * 0.002
    assert differing_units(np.array([0.0, 0.0, 0.0, 0.25]), cov) == [3]
    assert differing_units(np.array([0.0, 0.0, 0.0, 0.25]), np.eye(4) * 0.01) == []


# ------------------------------------------------------------------ demo runs
def _run(tmp_path, name, **change):
    doc = yaml.safe_load((ROOT / "pipelines" / name).read_text())
    doc["data"]["path"] = str(ROOT / "examples" / "shift_outlook.csv")
    doc.pop("output", None)
    for k, v in change.items():
        doc.setdefault(k, {}).update(v) if isinstance(v, dict) else doc.__setitem__(k, v)
    path = tmp_path / "p.yaml"
    path.write_text(yaml.safe_dump(doc))
    res = invariance.run(path, out=tmp_path / "out", quiet=True)
    return res.to_dict(), res.summary(), tmp_path / "out"


def _consistent(d):
    """The verdict fields agree with the level rows they were computed from."""
    assert {"supported_level", "supported_partially", "released_constraints", "permits", "verdict",
            "cutoff_calibration", "next_step"} <= set(d)
    assert d["supported_level"] == supported_level(d["levels"])
    best = next((r for r in d["levels"] if r["level"] == d["supported_level"]), None)
    assert d["supported_partially"] == (best is not None and is_partial(best))
    if d["supported_partially"]:
        assert f"partial {d['supported_level']} invariance" in d["verdict"]
    else:
        assert "partial" not in d["verdict"].split(":")[0]


def test_demo_partial_run_says_partial_strict(tmp_path):
    d, text, out = _run(tmp_path, "shift_outlook_by_site_partial.yaml")
    _consistent(d)
    assert d["supported_level"] == "strict" and d["supported_partially"] is True
    got = {(r["parameter"], r["item"]): r["differs_in"] for r in d["released_constraints"]}
    # the planted effects (invariance/demo.py): so04's loading at ridge, so03 and so09 intercepts at mesa
    assert got == {("loading", "so04"): ["ridge"], ("intercept", "so03"): ["mesa"], ("intercept", "so09"): ["mesa"]}
    assert {f["item"]: f["differs_in"] for f in d["flagged"]} == {"so04": ["ridge"], "so03": ["mesa"], "so09": ["mesa"]}
    assert "observed sum scores can be compared" not in d["verdict"]
    assert "outlook +0.85 in mesa" in d["verdict"]   # the effects stage's scale_bias, read not recomputed
    bias = next(b for b in d["scale_bias"] if b["scale"] == "outlook" and b["group"] == "mesa")
    assert f"{bias['bias']:+.2f}" == "+0.85"
    # the console and the machine table show the constrained and the partial row of scalar
    assert "\nscalar " in text and "\npartial scalar " in text and "\nconfigural " in text
    assert "partial configural" not in text.lower() and "in harbor, mesa, ridge, valley" not in text
    table = pd.read_csv(out / "levels.csv")
    scal = table[table.level == "scalar"]
    assert list(scal.partial) == [False, True] and list(scal.decision) == ["fails", "holds_partially"]
    paper = pd.read_csv(out / "table_levels.csv")
    assert "Partial scalar" in set(paper.Model) and "Scalar" in set(paper.Model)
    assert d["cutoff_calibration"] is None and d["next_step"] is None


def test_demo_up_front_releases_are_partial(tmp_path):
    released = [{"parameter": "loading", "item": "so04", "factor": "outlook", "groups": ["ridge"]},
                {"parameter": "intercept", "item": "so03", "groups": ["mesa"]},
                {"parameter": "intercept", "item": "so09", "groups": ["mesa"]}]
    d, text, _ = _run(tmp_path, "shift_outlook_by_site.yaml", model={"released": released})
    _consistent(d)
    assert d["supported_partially"] is True and d["supported_level"] in ("scalar", "strict")
    assert {r["source"] for r in d["released_constraints"]} == {"pipeline"}
    assert d["levels"][0]["decision"] == "holds" and "partial configural" not in text.lower()


def test_demo_full_run_is_not_partial_and_names_the_search(tmp_path):
    d, text, _ = _run(tmp_path, "shift_outlook_by_site.yaml")
    _consistent(d)
    assert d["supported_level"] == "metric" and d["supported_partially"] is False
    assert d["released_constraints"] == []
    assert "partial: {enabled: true}" in d["next_step"] and d["next_step"] in text
    assert json.loads((tmp_path / "out" / "results.json").read_text())["verdict"] == d["verdict"]


@pytest.mark.parametrize("estimator", ["ml", "ml_robust", "dwls"])
def test_verdict_fields_agree_with_levels_for_every_estimator(tmp_path, hs_frame, estimator):
    # common check: every estimator's run carries the verdict fields, they agree with its
    # level rows, and the calibration caution appears exactly off plain ML on continuous items
    # (METHODS section 14). Data: Holzinger & Swineford (1939, semopy copy) for ML / robust ML;
    # the invented ordinal simulation of test_pipeline_ordinal for DWLS.
    from conftest import hs_doc, write_yaml

    if estimator == "dwls":
        from test_pipeline_ordinal import _doc, _frame

        _frame(shift=(4, 0.6)).to_csv(tmp_path / "survey.csv", index=False)
        doc = _doc()
    else:
        hs_frame.to_csv(tmp_path / "hs.csv", index=False)
        doc = hs_doc("hs.csv", estimator=estimator, output={"folder": "out"})
    res = invariance.run(write_yaml(tmp_path / "p.yaml", doc), quiet=True)
    d = res.to_dict()
    _consistent(d)
    assert (d["cutoff_calibration"] is None) == (estimator == "ml")
    assert d["verdict"] in res.summary()
