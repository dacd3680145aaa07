"""Pipelines with ordered-categorical items: data.ordinal, estimator dwls, the
thresholds level, category checks and merges (invented scenario, planted shift)."""

import json
import os
import sys

import numpy as np
import pandas as pd
import pytest

sys.path.insert(0, os.path.dirname(__file__))
from conftest import run_cli, write_yaml  # noqa: E402
from ordinal_sim import simulate_bifactor  # noqa: E402

import invariance
from invariance.errors import DataError, SpecificationError
from invariance.spec.load import load_pipeline

ITEMS = [f"q{i + 1}" for i in range(9)]
FACTORS = {"s1": ITEMS[:3], "s2": ITEMS[3:6], "s3": ITEMS[6:]}


def _frame(shift=None, seed=3):
    rng = np.random.default_rng(seed)
    lg = np.linspace(0.5, 0.65, 9)
    ls = np.full(9, 0.4)
    cuts = np.array([-1.2, -0.4, 0.4, 1.2])[None, :] + np.linspace(-0.3, 0.3, 9)[:, None]
    blocks = np.repeat(np.arange(3), 3)
    parts = []
    for name, sh in (("harbour", None), ("upland", shift)):
        x = simulate_bifactor(rng, 800, loads_g=lg, loads_s=ls, blocks=blocks, cuts=cuts, shift=sh)
        df = pd.DataFrame(x, columns=ITEMS)
        df["site"] = name
        parts.append(df)
    return pd.concat(parts, ignore_index=True)


# The specific factors' means stay 0 (model.fixed_means): freed next to the general mean
# in a bifactor model with three items per specific factor they are nearly collinear with
# it and absorb a single item's shift (found while building the recovery tests).
def _doc(**extra):
    doc = {
        "data": {"path": "survey.csv", "group": "site", "ordinal": "all"},
        "model": {"factors": FACTORS, "general": "overall", "fixed_means": ["s1", "s2", "s3"]},
        "decision": {"stop_at_failure": False},
        "output": {"folder": "out"},
    }
    for k, v in extra.items():
        if isinstance(v, dict) and isinstance(doc.get(k), dict):
            doc[k] = {**doc[k], **v}
        else:
            doc[k] = v
    return doc


def test_ordinal_pipeline_runs_the_wu_estabrook_sequence(tmp_path):
    _frame(shift=(4, 0.6)).to_csv(tmp_path / "survey.csv", index=False)
    path = write_yaml(tmp_path / "p.yaml", _doc())
    res = invariance.run(path, quiet=True)
    d = json.loads((tmp_path / "out" / "results.json").read_text())
    assert d == res.to_dict()
    assert d["estimator"] == "dwls"
    assert [lv["level"] for lv in d["levels"]] == ["configural", "thresholds", "metric", "scalar", "strict"]
    assert d["ordinal"]["categories"]["q1"] == ["1", "2", "3", "4", "5"]
    thr, scal = d["levels"][1], d["levels"][3]
    assert thr["delta"]["df"] == 9 * 2                      # (G - 1) p (K - 3)
    assert thr["decision"] == "holds"
    # the planted threshold shift of q5 breaks the scalar step (robust difference)
    assert scal["delta"]["pvalue"] < 1e-6
    assert scal["dwls"]["chi2_unadjusted"] is not None and scal["chi2"] is not None
    assert d["supported_level"] == "metric"
    # Chen's cutoffs were calibrated for ML on continuous items: the run says so
    # (METHODS section 14; Sass, Schmitt & Marsh 2014)
    assert "Sass, Schmitt & Marsh 2014" in d["cutoff_calibration"] and "DWLS" in d["cutoff_calibration"]
    assert d["cutoff_calibration"] in res.summary()
    # effects on the latent-response / expected-score scales from the metric model
    eff = d["effects"]["ordinal"]
    assert eff["level"] == "metric" and set(eff["by_group"]) == {"upland"}
    es = {it: v["expected_score"] for it, v in eff["by_group"]["upland"]["dmacs"].items()}
    assert max(es, key=es.get) == "q5"
    assert d["group_fit"] is None          # per-group continuous fits are skipped for ordinal items


def test_wrong_ordinal_settings_rejected(tmp_path):
    with pytest.raises(SpecificationError, match="not in model.factors"):
        load_pipeline(_doc(data={"ordinal": ["q1", "zz"]}), base_dir=tmp_path)
    with pytest.raises(SpecificationError, match="estimator dwls"):
        load_pipeline(_doc(estimator="ml"), base_dir=tmp_path)
    doc = _doc()
    del doc["data"]["ordinal"]
    with pytest.raises(SpecificationError, match="thresholds level"):
        load_pipeline({**doc, "levels": ["configural", "thresholds"]}, base_dir=tmp_path)


def test_missing_category_message_and_merge(tmp_path):
    df = _frame()
    df.loc[(df.site == "upland") & (df.q2 == 5), "q2"] = 4
    df.to_csv(tmp_path / "survey.csv", index=False)
    path = write_yaml(tmp_path / "p.yaml", _doc(levels=["configural", "thresholds"]))
    out = run_cli("run", path, "--quiet")
    assert out.returncode == 2
    assert "Item 'q2' has no responses in category 5 in group 'upland'" in out.stderr
    path = write_yaml(tmp_path / "p2.yaml", _doc(levels=["configural", "thresholds"], data={"merge": {"q2": [[4, 5]]}}))
    res = invariance.run(path, quiet=True, write=False)
    assert res.to_dict()["ordinal"]["categories"]["q2"] == ["1", "2", "3", "4+5"]


def test_fixed_means_in_continuous_levels():
    # counting: each fixed mean removes one free parameter per non-reference group
    from invariance.model import Structure, build_level

    st = Structure(factors=FACTORS, family="bifactor", general="overall")
    free = build_level(st, ["a", "b", "c"], "scalar")
    fixed = build_level(st, ["a", "b", "c"], "scalar", fixed_means=("s1", "s2"))
    assert fixed.df - free.df == 2 * 2
    with pytest.raises(SpecificationError, match="fixed_means"):
        load_pipeline(_doc(model={"fixed_means": ["nope"]}), base_dir=".")


def test_check_reports_categories(tmp_path):
    _frame().to_csv(tmp_path / "survey.csv", index=False)
    out = invariance.check(write_yaml(tmp_path / "p.yaml", _doc()))
    assert out["categories"]["q9"] == ["1", "2", "3", "4", "5"]


@pytest.mark.parametrize("shift", [(4, 0.6), None])
def test_partial_search_locates_the_shifted_item(tmp_path, shift):
    # invented population: item q5's thresholds all shifted by 0.6 in one site. Under the
    # Wu & Estabrook (2016) identification a uniform shift is a change of the item's
    # location, absorbed by the free intercept at the thresholds level and released at the
    # scalar level; with nothing planted nothing is flagged.
    _frame(shift=shift).to_csv(tmp_path / "survey.csv", index=False)
    doc = _doc(levels=["configural", "thresholds", "metric", "scalar"],
               partial={"enabled": True, "max_releases": 3, "until": "clean"})
    path = write_yaml(tmp_path / "p.yaml", doc)
    d = invariance.run(path, quiet=True, write=False).to_dict()
    flagged = [(f["item"], f["parameter"], f["level"]) for f in d["flagged"]]
    scalar = next(lv for lv in d["levels"] if lv["level"] == "scalar")
    if shift is None:
        assert flagged == [] and scalar["decision"] == "holds"
    else:
        assert flagged == [("q5", "intercept", "scalar")]
        assert scalar["decision"] == "holds_partially"
        assert [(r["item"], r["source"]) for r in scalar["released"]] == [("q5", "search")]
