"""Running pipelines end to end on the Holzinger & Swineford (1939) data (via semopy)."""

import json

import pandas as pd
import pytest

import invariance
from invariance.pipeline import runner

from conftest import hs_doc, write_yaml

# Holzinger & Swineford by school, three factors, ML (METHODS section 12; engine check values)
HS_CHI2 = {"configural": (115.851, 48), "metric": (124.044, 54), "scalar": (164.103, 60), "strict": (181.511, 69)}

LEVEL_KEYS = {"level", "converged", "chi2", "df", "pvalue", "cfi", "tli", "rmsea", "rmsea_ci90", "srmr",
              "aic", "bic", "delta", "decision", "released"}


@pytest.fixture()
def hs_all_levels(hs_dir):
    doc = hs_doc("hs.csv", decision={"stop_at_failure": False}, output={"folder": "out"})
    path = write_yaml(hs_dir / "hs.yaml", doc)
    return path, invariance.run(path, quiet=True)


def test_levels_reproduce_check_values(hs_all_levels):
    _, res = hs_all_levels
    d = res.to_dict()
    for lv in d["levels"]:
        chi2, df = HS_CHI2[lv["level"]]
        assert lv["chi2"] == pytest.approx(chi2, abs=2e-3)
        assert lv["df"] == df
    # chi-square differences by hand from the check values
    metric, scalar = d["levels"][1], d["levels"][2]
    assert metric["delta"]["chi2"] == pytest.approx(124.044 - 115.851, abs=3e-3)
    assert metric["delta"]["df"] == 6
    assert metric["delta"]["cfi"] == pytest.approx(metric["cfi"] - d["levels"][0]["cfi"])
    assert scalar["delta"]["chi2"] == pytest.approx(164.103 - 124.044, abs=3e-3)
    # Cheung & Rensvold (2002) / Chen (2007): the scalar dCFI (about -0.04) is far past -0.01
    assert [lv["decision"] for lv in d["levels"]] == ["holds", "holds", "fails", "fails"]
    # with stop_at_failure false, strict is compared with the last accepted level (metric)
    strict = d["levels"][3]
    assert strict["compared_with"] == "metric"
    assert strict["delta"]["df"] == 69 - 54
    assert strict["delta"]["chi2"] == pytest.approx(181.511 - 124.044, abs=3e-3)
    assert d["supported_level"] == "metric"


def test_group_order_and_reference_do_not_change_fit(hs_dir, hs_all_levels):
    # property check (STYLE 7): the chi-square of each level does not depend on group order
    _, res = hs_all_levels
    doc = hs_doc(str(hs_dir / "hs.csv"), levels=["configural", "metric", "scalar"])
    doc["data"]["groups"] = ["Pasteur", "Grant-White"]
    doc["data"]["reference"] = "Pasteur"
    d = invariance.run(doc, quiet=True).to_dict()
    assert d["reference_group"] == "Pasteur" and list(d["groups"]) == ["Pasteur", "Grant-White"]
    for a, b in zip(d["levels"], res.to_dict()["levels"]):
        assert a["chi2"] == pytest.approx(b["chi2"], rel=1e-6)


def test_results_json_has_every_field(hs_all_levels):
    path, res = hs_all_levels
    data = json.loads((path.parent / "out" / "results.json").read_text())
    for key in ("estimator", "groups", "reference_group", "levels", "flagged", "supported_level", "verdict", "decision_rule"):
        assert key in data
    assert data["estimator"] == "ml"
    assert data["groups"] == {"Grant-White": 145, "Pasteur": 156}  # 301 pupils (METHODS 12)
    assert data["reference_group"] == "Grant-White"
    assert data["flagged"] == []
    for lv in data["levels"]:
        assert LEVEL_KEYS <= set(lv)
        assert lv["decision"] in ("holds", "holds_partially", "fails", "not_tested")
        assert isinstance(lv["released"], list)
        assert len(lv["rmsea_ci90"]) == 2
    assert data["levels"][0]["delta"] is None
    for lv in data["levels"][1:]:
        assert set(lv["delta"]) >= {"chi2", "df", "pvalue", "cfi", "rmsea", "srmr"}
    assert "Chen (2007)" in data["decision_rule"]["rule"]
    assert data == res.to_dict()


def test_output_folder_files(hs_all_levels):
    path, res = hs_all_levels
    out = path.parent / "out"
    assert res.out_dir == out.resolve()
    assert sorted(p.name for p in out.iterdir()) == [
        "estimates.csv", "figures", "levels.csv", "manifest.json", "pipeline.yaml", "report.html", "report.md", "results.json",
        *(f"table_{name}.{ext}" for name in ("latent", "levels", "loadings") for ext in ("csv", "md", "tex")),
    ]
    table = pd.read_csv(out / "levels.csv")
    assert table["level"].tolist() == ["configural", "metric", "scalar", "strict"]
    est = pd.read_csv(out / "estimates.csv")
    assert set(est["level"]) == {"configural", "metric", "scalar", "strict"}
    assert set(est["group"]) == {"Grant-White", "Pasteur"}
    report = (out / "report.md").read_text()
    assert "AERA/APA/NCME" in report and "ITC Guidelines" in report
    assert (out / "pipeline.yaml").read_text() == path.read_text()


def test_run_dict_equals_file_run(hs_dir, hs_all_levels):
    path, res = hs_all_levels
    doc = hs_doc(str(hs_dir / "hs.csv"), decision={"stop_at_failure": False})
    res2 = invariance.run(doc, quiet=True)
    assert res2.out_dir is None
    d1, d2 = res.to_dict(), res2.to_dict()
    assert d2["title"] != d1["title"]  # the file's stem vs the default title
    d1.pop("title"), d2.pop("title")
    assert d1 == d2
    with pytest.raises(TypeError):
        res.results["estimator"] = "x"


def test_stop_at_failure_marks_later_levels_not_tested(hs_dir):
    # Cheung & Rensvold (2002) dCFI cutoff; HS scalar step drops CFI by far more than .01
    doc = hs_doc(str(hs_dir / "hs.csv"), decision={"cutoffs": "cheung_rensvold2002"})
    res = invariance.run(doc, quiet=True)
    d = res.to_dict()
    decisions = [lv["decision"] for lv in d["levels"]]
    assert decisions == ["holds", "holds", "fails", "not_tested"]
    assert d["supported_level"] == "metric"
    assert "relations" in d["verdict"]
    assert d["levels"][3]["chi2"] is None and "strict" not in res.fits


def test_released_up_front_is_recorded(hs_dir):
    doc = hs_doc(str(hs_dir / "hs.csv"), levels=["configural", "metric", "scalar"])
    doc["model"]["released"] = [{"parameter": "intercept", "item": "x3"}]
    d = invariance.run(doc, quiet=True).to_dict()
    assert d["levels"][2]["released"] == [{"parameter": "intercept", "item": "x3", "factor": None, "groups": None}]
    assert d["levels"][2]["df"] == HS_CHI2["scalar"][1] - 1  # one intercept freed in the second group


def test_failed_run_leaves_no_output(hs_dir, monkeypatch):
    path = write_yaml(hs_dir / "hs.yaml", hs_doc("hs.csv", levels=["configural"], output={"folder": "boom"}))

    def broken(*a, **k):
        raise RuntimeError("report failed")

    import invariance.report

    monkeypatch.setattr(invariance.report, "write_reports", broken)
    with pytest.raises(RuntimeError):
        invariance.run(path, quiet=True)
    assert not (hs_dir / "boom").exists()
    assert not [p for p in hs_dir.iterdir() if p.name.startswith(".boom")]


def test_crosscheck_against_semopy(hs_dir):
    doc = hs_doc(str(hs_dir / "hs.csv"), levels=["configural"])
    d = invariance.run(doc, quiet=True, crosscheck=True).to_dict()
    rows = d["crosscheck"]["groups"]
    assert [r["group"] for r in rows] == ["Grant-White", "Pasteur"]
    for r in rows:
        assert r["agreement"] == "agree"  # semopy is an independent reference
        assert r["df"] == 24
    # configural = the single-group fits added (METHODS 12)
    assert sum(r["semopy_chi2"] for r in rows) == pytest.approx(HS_CHI2["configural"][0], abs=5e-3)


def test_check_fits_nothing(hs_dir):
    info = invariance.check(hs_doc(str(hs_dir / "hs.csv")))
    assert info["groups"] == {"Grant-White": 145, "Pasteur": 156}
    assert info["missing"]["Pasteur"]["x1"] == 0


def test_stages_are_extensible():
    names = [n for n, _ in runner.STAGES]
    assert names == ["data", "screening", "stats", "group_fit", "structures", "levels", "fits", "effects", "alignment", "summary", "scores"]


def test_existing_foreign_folder_is_never_replaced(hs_dir):
    from invariance.errors import SpecificationError

    keep = hs_dir / "mine"
    keep.mkdir()
    (keep / "thesis.tex").write_text("precious")
    doc = hs_doc(str(hs_dir / "hs.csv"), levels=["configural"])
    with pytest.raises(SpecificationError, match="not the output of an earlier run"):
        invariance.run(doc, out=keep, quiet=True)
    assert (keep / "thesis.tex").read_text() == "precious"
    # an earlier run's folder is replaced
    first = invariance.run(doc, out=hs_dir / "again", quiet=True)
    second = invariance.run(doc, out=hs_dir / "again", quiet=True)
    assert first.out_dir == second.out_dir and (second.out_dir / "results.json").is_file()


def test_spss_without_extra_gives_clear_error(tmp_path, monkeypatch):
    import builtins

    from invariance.data import read_table
    from invariance.errors import DataError

    real = builtins.__import__

    def fake(name, *a, **k):
        if name == "pyreadstat":
            raise ImportError("no pyreadstat")
        return real(name, *a, **k)

    (tmp_path / "x.sav").write_bytes(b"not really")
    monkeypatch.setattr(builtins, "__import__", fake)
    with pytest.raises(DataError, match=r"optional extra 'spss'"):
        read_table(tmp_path / "x.sav")


def test_unconverged_configural_is_not_called_noninvariance(hs_dir, monkeypatch):
    import dataclasses

    from invariance.estimate.interface import MaximumLikelihood

    real = MaximumLikelihood.fit

    def no_convergence(self, model, stats, *, start=None):
        res = real(self, model, stats, start=start)
        msg = "iteration limit reached before convergence"
        return dataclasses.replace(res, converged=False, status=msg, problems=(f"not converged: {msg}",))

    monkeypatch.setattr(MaximumLikelihood, "fit", no_convergence)
    d = invariance.run(hs_doc(str(hs_dir / "hs.csv")), quiet=True).to_dict()
    assert d["levels"][0]["converged"] is False
    assert d["levels"][0]["decision"] == "fails"
    assert [lv["decision"] for lv in d["levels"][1:]] == ["not_tested"] * 3
    assert d["supported_level"] is None
    assert "did not converge" in d["verdict"]


@pytest.mark.parametrize(
    "extra, df",
    [
        ({"general": "g", "family": "second_order"}, 24),  # 3 first-order factors: same fit as correlated
        ({"residual_covariances": [["x7", "x8"]]}, 23),
    ],
)
def test_crosscheck_other_structures(hs_dir, extra, df):
    doc = hs_doc(str(hs_dir / "hs.csv"), levels=["configural"])
    doc["model"].update(extra)
    d = invariance.run(doc, quiet=True, crosscheck=True).to_dict()
    for r in d["crosscheck"]["groups"]:
        assert r["df"] == df
        assert r["agreement"] == "agree"  # semopy, an independent reference
