"""The pipeline carries on from a failed level: partial: and structural: sections."""

import json

import numpy as np
import pandas as pd
import pytest

import invariance
from invariance.errors import SpecificationError

from conftest import hs_doc, write_yaml
from test_partial_search import ITEMS, simulate


@pytest.fixture(scope="module")
def hs_partial(tmp_path_factory):
    from semopy.examples import holzinger39

    folder = tmp_path_factory.mktemp("hs_partial")
    holzinger39.get_data().to_csv(folder / "hs.csv", index=False)  # Holzinger & Swineford (1939), semopy copy
    doc = hs_doc("hs.csv", partial={"alpha": 0.05},
                 structural={"levels": ["variances", "covariances", "means"]}, output={"folder": "out"})
    path = write_yaml(folder / "hs.yaml", doc)
    res = invariance.run(path, quiet=True)
    return path, res.to_dict()


def test_hs_scalar_holds_partially_after_x3_and_x7(hs_partial):
    # Scalar fails by Chen (2007) in the Holzinger & Swineford example; the score tests
    # release the x3 and x7 intercepts (the known noninvariant ones; from memory) and
    # the level then holds; strict continues with those releases carried.
    path, d = hs_partial
    lv = {r["level"]: r for r in d["levels"]}
    assert lv["scalar"]["decision"] == "holds_partially"
    search = [r for r in lv["scalar"]["released"] if r["source"] == "search"]
    assert [(r["item"], r["parameter"]) for r in search] == [("x3", "intercept"), ("x7", "intercept")]
    assert all(r["pvalue"] < 0.05 and r["statistic"] > 10 for r in search)
    assert lv["scalar"]["df"] == 60 - 2 and lv["scalar"]["partial"]["stop_reason"] == "holds"
    assert [r["source"] for r in lv["strict"]["released"]] == ["carried", "carried"]
    assert lv["strict"]["df"] == 69 - 2
    assert d["supported_level"] == "strict"
    data = json.loads((path.parent / "out" / "results.json").read_text())
    assert data["flagged"] == d["flagged"]


def test_hs_flagged_records(hs_partial):
    _, d = hs_partial
    flags = d["flagged"]
    assert [f["item"] for f in flags] == ["x3", "x7"]
    for f in flags:
        assert {"item", "parameter", "factor", "groups", "level", "statistic", "pvalue", "dmacs"} <= set(f)
        assert f["level"] == "scalar" and set(f["dmacs"]) == {"Pasteur"}
        assert 0.2 < f["dmacs"]["Pasteur"] < 1.0


def test_hs_effects_and_structural(hs_partial):
    _, d = hs_partial
    assert d["reliability"]["level"] == "strict"
    assert set(d["reliability"]["groups"]["Pasteur"]["factors"]["visual"]) == {"omega", "H", "determinacy"}
    lat = d["latent"]
    assert {m["factor"] for m in lat["means"]} == {"visual", "textual", "speed"}
    assert all(m["ci_low"] < m["difference"] < m["ci_high"] for m in lat["means"])
    # visual keeps x1, x2 invariant after x3 is released: still at least two items
    assert lat["invariant_items"]["visual"]["scalar"] == ["x1", "x2"]
    assert [s["level"] for s in d["structural"]] == ["variances", "covariances", "means"]
    for s in d["structural"]:
        assert s["decision"] in ("holds", "holds_partially", "fails")
        assert s["tests"] and all("pvalue" in t for t in s["tests"])
    assert d["structural"][0]["df"] == 67 + 3
    assert len(d["scale_bias"]) == 3


def test_partial_absent_means_no_search(tmp_path, hs_frame):
    hs_frame.to_csv(tmp_path / "hs.csv", index=False)
    d = invariance.run(hs_doc(str(tmp_path / "hs.csv"), decision={"stop_at_failure": False}), quiet=True).to_dict()
    assert d["flagged"] == [] and d["structural"] == []
    assert {r["decision"] for r in d["levels"]} <= {"holds", "fails"}


def test_unknown_partial_key_is_refused(tmp_path, hs_frame):
    hs_frame.to_csv(tmp_path / "hs.csv", index=False)
    with pytest.raises(SpecificationError, match="max_release"):
        invariance.run(hs_doc(str(tmp_path / "hs.csv"), partial={"max_release": 3}), quiet=True)


def test_bifactor_pipeline_recovers_planted_items(tmp_path):
    # Seeded simulation (invented population of tests/test_partial_search.py): the pipeline
    # flags exactly the planted general loading of i3 and the intercept of i10.
    stats = simulate(17, True)
    frames = [pd.DataFrame(g.raw, columns=ITEMS).assign(site=g.name) for g in stats.groups]
    pd.concat(frames).to_csv(tmp_path / "sim.csv", index=False)
    doc = {
        "data": {"path": str(tmp_path / "sim.csv"), "group": "site"},
        "model": {"factors": {"s1": ITEMS[:4], "s2": ITEMS[4:8], "s3": ITEMS[8:]}, "general": "g"},
        "levels": ["configural", "metric", "scalar"],
        "decision": {"criteria": ["chi2"]},
        "partial": {"correction": "holm"},
        "structural": {"levels": ["covariances"]},
    }
    d = invariance.run(doc, quiet=True).to_dict()
    assert [(f["item"], f["parameter"], f["factor"], f["level"]) for f in d["flagged"]] == [
        ("i3", "loading", "g", "metric"), ("i10", "intercept", None, "scalar")]
    assert [r["decision"] for r in d["levels"]] == ["holds", "holds_partially", "holds_partially"]
    # bifactor factors are orthogonal: there is no covariance to hold equal
    assert [s["decision"] for s in d["structural"]] == ["not_applicable"]
    assert d["flagged"][0]["dmacs"]["C"] > 0.3
    rel = d["reliability"]["groups"]["A"]
    assert 0 < rel["overall"]["omega_h"] < rel["overall"]["omega"] < 1 and 0 < rel["overall"]["ecv"] < 1
    assert set(rel["factors"]["s1"]) >= {"omega_s", "omega_hs", "ecv", "H", "determinacy"}
    # the general factor's mean: planted +0.3 (B) and -0.2 (C) vs A, in the A-SD metric
    means = {(m["factor"], m["group"]): m for m in d["latent"]["means"]}
    assert means[("g", "B")]["ci_low"] < 0.3 < means[("g", "B")]["ci_high"]
    assert means[("g", "C")]["ci_low"] < -0.2 < means[("g", "C")]["ci_high"]
    assert np.sign(means[("g", "C")]["difference"]) == -1


@pytest.mark.parametrize("grouping", ["site", "occupation"])
def test_demo_scenario_until_clean_recovers_every_planted_effect(tmp_path, grouping):
    # The project's invented demo scenario (invariance.demo, planted effects in PLANTED):
    # with until=clean the search keeps releasing while a constraint is significant and
    # flags exactly the planted parameters of each grouping, nothing else.
    import yaml

    from invariance.demo import PLANTED, write_demo

    write_demo(tmp_path)
    doc = yaml.safe_load((tmp_path / f"shift_outlook_by_{grouping}.yaml").read_text())
    doc["data"]["path"] = str(tmp_path / "shift_outlook.csv")
    doc.pop("output")
    doc["partial"] = {"until": "clean"}
    d = invariance.run(doc, quiet=True).to_dict()
    want = {(item, par, fac) for grp, _, par, item, fac, _ in PLANTED if grp == grouping}
    got = {(f["item"], f["parameter"], f["factor"]) for f in d["flagged"]}
    assert got == want
    assert all(f["dmacs_max"] > 0.2 for f in d["flagged"])
