"""Pipeline wiring of screening, per-group fit, rival structures and factor scores,
on the Holzinger & Swineford (1939) data by school (semopy copy)."""

import json

import pandas as pd
import pytest

import invariance
from invariance.errors import DataError, SpecificationError
from invariance.pipeline import load_pipeline

from conftest import hs_doc, write_yaml


@pytest.fixture(scope="module")
def hs_run(tmp_path_factory):
    from semopy.examples import holzinger39

    folder = tmp_path_factory.mktemp("hs_ba")
    holzinger39.get_data().to_csv(folder / "hs.csv", index=False)
    doc = hs_doc(
        "hs.csv",
        levels=["configural", "metric", "scalar"],
        compare={"structures": ["single", "correlated", "second_order"]},
        scores={"method": "bartlett", "id": "id"},
        output={"folder": "out"},
    )
    path = write_yaml(folder / "hs.yaml", doc)
    res = invariance.run(path, quiet=True)
    return folder / "out", res


def test_results_json_sections(hs_run):
    out, res = hs_run
    data = json.loads((out / "results.json").read_text())
    assert data == res.to_dict()
    # screening: per group, before any model; 145 + 156 pupils (METHODS 12)
    scr = data["screening"]
    assert {g["group"]: g["n"] for g in scr["groups"]} == {"Grant-White": 145, "Pasteur": 156}
    assert scr["groups"][0]["mardia"]["p"] == 9
    assert scr["recommendation"]["estimator"] in ("ml", "ml_robust")
    # structures: configural correlated model = 115.851 on 48 df (METHODS 12)
    rows = {(r["structure"], r["group"]): r for r in data["structures"]}
    assert rows[("correlated", "all")]["chi2"] == pytest.approx(115.851, abs=2e-3)
    assert rows[("second_order", "all")]["chi2"] == pytest.approx(115.851, abs=2e-3)
    assert {g for _, g in rows} == {"Grant-White", "Pasteur", "all"}
    assert any("equivalent" in n for n in data["structure_notes"]["notes"])
    # per-group fit before the configural model: Pasteur RMSEA .104 > .10 (this fit; common-practice rule)
    gf = data["group_fit"]
    assert gf["failing"] == ["Pasteur"]
    assert any("group Pasteur" in w for w in data["warnings"])


def test_scores_csv(hs_run):
    out, res = hs_run
    d = res.to_dict()
    sc = pd.read_csv(out / "scores.csv")
    assert len(sc) == 301  # one row per case used (no missing values in these data)
    assert list(sc.columns) == ["id", "group", "visual", "textual", "speed"]
    assert sc["id"].is_unique
    assert d["scores"]["level"] == d["supported_level"]
    assert d["scores"]["method"] == "bartlett"
    assert d["supported_level"] in d["scores"]["statement"]
    assert set(d["scores"]["determinacy"]) == {"Grant-White", "Pasteur"}


def test_default_id_is_row_number(hs_dir):
    doc = hs_doc(str(hs_dir / "hs.csv"), levels=["configural"], scores={})
    res = invariance.run(doc, quiet=True)
    assert res.to_dict()["scores"]["id"] == "row"
    assert "configural" in res.to_dict()["scores"]["statement"]


def test_two_factor_second_order_named_equivalent(hs_dir):
    # identity: with its two loadings held equal, the second-order model over two factors fits
    # exactly as the two correlated factors (same chi-square and df), by school as well
    doc = hs_doc(str(hs_dir / "hs.csv"), levels=["configural"],
                 compare={"structures": ["correlated", "second_order"]})
    doc["model"]["factors"] = {"visual": ["x1", "x2", "x3"], "textual": ["x4", "x5", "x6"]}
    data = invariance.run(doc, quiet=True).to_dict()
    rows = {(r["structure"], r["group"]): r for r in data["structures"]}
    for g in ("Grant-White", "Pasteur", "all"):
        assert rows[("second_order", g)]["df"] == rows[("correlated", g)]["df"]
        assert rows[("second_order", g)]["chi2"] == pytest.approx(rows[("correlated", g)]["chi2"], abs=1e-3)
    assert any("equivalent" in n for n in data["structure_notes"]["notes"])


def test_bad_sections(hs_dir):
    with pytest.raises(SpecificationError, match="Unknown key 'kind' in section 'scores'"):
        load_pipeline(hs_doc("hs.csv", scores={"kind": "x"}), base_dir=hs_dir)
    with pytest.raises(SpecificationError, match="compare.structures"):
        load_pipeline(hs_doc("hs.csv", compare={"structures": ["tree"]}), base_dir=hs_dir)
    doc = hs_doc(str(hs_dir / "hs.csv"), levels=["configural"], scores={"id": "nope"})
    with pytest.raises(DataError, match="scores.id names column 'nope'"):
        invariance.run(doc, quiet=True)


def test_group_fit_rule_follows_configural_fit(hs_dir):
    # the per-group rule defaults to decision.configural_fit; compare.group_fit overrides it
    doc = hs_doc(str(hs_dir / "hs.csv"), levels=["configural"], decision={"configural_fit": {"cfi": 0.9, "rmsea": 0.11}})
    d = invariance.run(doc, quiet=True).to_dict()
    assert d["group_fit"]["failing"] == [] and d["group_fit"]["rule"]["rmsea_max"] == 0.11
    doc["compare"] = {"group_fit": {"cfi": 0.95}}
    d = invariance.run(doc, quiet=True).to_dict()
    # Grant-White CFI .941 and Pasteur CFI .903 (this fit) are both below .95
    assert d["group_fit"]["failing"] == ["Grant-White", "Pasteur"]


def test_scores_follow_full_information_cases(tmp_path):
    # every case with an observed item enters a full-information fit, so every such case is scored
    from semopy.examples import holzinger39

    d = holzinger39.get_data()
    d.iloc[[0, 5, 9], d.columns.get_loc("x2")] = float("nan")
    d.to_csv(tmp_path / "hsm.csv", index=False)
    doc = hs_doc(str(tmp_path / "hsm.csv"), levels=["configural"], scores={"id": "id"})
    res = invariance.run(doc, quiet=True).to_dict()
    assert res["n_total"] == 301
    assert res["scores"]["n_cases"] == 301
    doc["data"]["incomplete"] = "listwise"
    res = invariance.run(doc, quiet=True).to_dict()
    assert res["n_total"] == res["scores"]["n_cases"] == 298
    assert res["screening"]["recommendation"]["missing"] == "full_information"
