"""Pipeline runs on simulated bifactor data (tests/optimum_sim.py): the partial search
recovers the planted effects when the metric solution is improper, a run-away group is
named and the results are still written, the variance bounds option, the configural
model fitted once, and an empirically under-identified bifactor model named."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest

import invariance
from invariance.data.moments import sample_stats
from invariance.errors import SpecificationError
from invariance.estimate.ml import fit
from invariance.model.levels import build_level
from invariance.spec.load import load_pipeline

import optimum_sim as sim
from test_optimum import _scipy_global

WEAK_CREW = sim.SPECIFIC * np.r_[np.full(6, 0.6), np.ones(6)]  # weaker crew loadings
PLANTED = {("so03", "loading", "outlook", ("ridge",)), ("so10", "intercept", None, ("ridge",))}


def _doc(path, **extra) -> dict:
    doc = {
        "data": {"path": str(path), "group": "site"},
        "model": {"factors": {"crew": list(sim.ITEMS[:6]), "tools": list(sim.ITEMS[6:])},
                  "family": "bifactor", "general": "outlook", "fixed_means": ["crew", "tools"]},
        "levels": ["configural", "metric", "scalar"],
    }
    doc.update(extra)
    return doc


@pytest.mark.parametrize("missing", [0.0, 0.15], ids=["ml", "full_information"])
def test_partial_search_flags_the_planted_effects_despite_an_improper_metric_model(tmp_path, missing):
    frame = sim.bifactor_frame(seed=12, specific=WEAK_CREW, missing=missing, missing_items=2)
    frame.to_csv(tmp_path / "x.csv", index=False)
    if not missing:
        # the metric model's ML answer: negative crew variance in ridge (the specific factor
        # absorbs the noninvariant loading; METHODS section 14)
        st = sample_stats(frame, list(sim.ITEMS), "site")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            metric = fit(build_level(sim.STRUCTURE, st.names, "metric", fixed_means=("crew", "tools")), st)
        assert metric.converged and metric.group_matrices("ridge")["psi"][0, 0] < 0
    d = invariance.run(_doc(tmp_path / "x.csv", partial={"until": "clean", "release_in": "groups"}),
                       quiet=True).to_dict()
    assert "metric: factor covariance matrix not positive definite in group ridge" in d["warnings"]
    flagged = {(f["item"], f["parameter"], f["factor"], tuple(f["groups"])) for f in d["flagged"]}
    assert flagged == PLANTED
    assert [lv["decision"] in ("holds", "holds_partially") for lv in d["levels"]] == [True] * 3


@pytest.fixture(scope="module")
def runaway_csv(tmp_path_factory):
    """Seed 3 with weak crew loadings: in group valley the crew factor collapses onto so01."""
    folder = tmp_path_factory.mktemp("runaway")
    sim.bifactor_frame(seed=3, specific=WEAK_CREW).to_csv(folder / "x.csv", index=False)
    return folder / "x.csv"


def test_runaway_group_is_named_and_results_are_written(runaway_csv, tmp_path):
    out = tmp_path / "out"
    d = invariance.run(_doc(runaway_csv, output={"folder": str(out)}), quiet=True).to_dict()
    conf = d["levels"][0]
    said = [p for p in conf["problems"] if "collapses onto" in p]
    assert said and said[0].startswith("in group valley the specific factor 'crew' collapses onto item so01: "
                                       "its residual variance goes below zero while its loading grows")
    assert "estimation: {variances: nonnegative}" in said[0]
    assert conf["estimation"]["optimum"].startswith("no finite optimum")
    assert conf["estimation"]["variances"] == "unrestricted"
    # the other groups are not held back: their own fits converged
    rows = {r["group"]: r for r in d["group_fit"]["groups"]}
    assert rows["harbor"]["converged"] and rows["ridge"]["converged"] and not rows["valley"]["converged"]
    saved = json.loads((out / "results.json").read_text())
    assert saved["levels"][0]["problems"] == conf["problems"]


def test_nonnegative_variances_reach_the_bounded_optimum(runaway_csv):
    d = invariance.run(_doc(runaway_csv, levels=["configural"], estimation={"variances": "nonnegative"}),
                       quiet=True).to_dict()
    conf = d["levels"][0]
    assert conf["converged"] and conf["estimation"]["variances"] == "nonnegative"
    assert conf["estimation"]["optimum"].startswith("optimum within bounds")
    assert any("residual variance of so01 in group valley" in p and "standard errors at a bound need care" in p
               for p in conf["problems"])
    # independent reference: scipy L-BFGS-B within the same bounds, 12 starts, on the
    # METHODS section 2 statistic written in the tests
    st = sample_stats(sim.bifactor_frame(seed=3, specific=WEAK_CREW), list(sim.ITEMS), "site")
    rows = {r["group"]: r for r in d["group_fit"]["groups"]}
    g = st.groups[st.names.index("valley")]
    bounds = [(None, None)] * 24 + [(0.0, None)] * 12 + [(None, None)] * 12
    assert rows["valley"]["chi2"] == pytest.approx(_scipy_global(g.cov, g.mean, g.n, bounds=bounds), abs=1e-3)


def test_configural_is_fitted_once_and_the_group_table_reads_it(runaway_csv, monkeypatch):
    from invariance.estimate import ml

    real, calls = ml.fit, []

    def counting(model, stats, **kw):
        calls.append(model.level)
        return real(model, stats, **kw)

    # every ML fit of the run goes through estimate.ml.fit (the estimator interface calls it)
    monkeypatch.setattr("invariance.estimate.interface.ml_fit", counting)
    d = invariance.run(_doc(runaway_csv, levels=["configural", "metric"], seed=5), quiet=True).to_dict()
    assert calls.count("configural") == 1
    total = sum(r["chi2"] for r in d["group_fit"]["groups"])
    assert d["levels"][0]["chi2"] == pytest.approx(total, rel=1e-12)
    assert d["levels"][0]["estimation"]["options"]["seed"] == 5


def test_proportional_loadings_are_named_as_under_identified():
    # tools block: general loadings proportional to the specific ones in the population
    prop = sim.SPECIFIC.copy()
    prop[6:] = 0.6 * sim.GENERAL[6:]
    st = sample_stats(sim.bifactor_frame(seed=3, specific=prop), list(sim.ITEMS), "site")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = fit(build_level(sim.STRUCTURE, st.names, "configural"), st)
        clean = fit(build_level(sim.STRUCTURE, st.names, "configural"),
                    sample_stats(sim.bifactor_frame(seed=17), list(sim.ITEMS), "site"))
    said = [p for p in res.problems if "empirically under-identified" in p]
    # the sample optimum puts nearly all of the tools items' common variance on the general
    # factor; the weak direction runs through a tools loading
    assert said and said[0].startswith("in group harbor") and "<-tools|harbor" in said[0]
    assert "add a third specific factor" in said[0]
    assert not any("under-identified" in p or "nearly singular" in p for p in clean.problems)


def test_estimation_section_is_checked_at_load_time(tmp_path):
    with pytest.raises(SpecificationError, match="variances"):
        load_pipeline(_doc(tmp_path / "x.csv", estimation={"variances": "sometimes"}), base_dir=tmp_path)
    with pytest.raises(SpecificationError, match="estimation"):
        load_pipeline(_doc(tmp_path / "x.csv", estimation={"bounds": True}), base_dir=tmp_path)
