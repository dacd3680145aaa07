"""Every chart and the model diagram draw for each model family and for many groups,
and produce PNGs that decode (PIL)."""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from invariance.report import write_reports
from invariance.report.diagram import model_diagram
from invariance.report.plots import DPI, PAGE_WIDTH, change_chart, dmacs_heatmap, forest_chart, profile_chart


def decode(png: bytes) -> Image.Image:
    im = Image.open(io.BytesIO(png))
    im.load()
    assert im.format == "PNG"
    return im


ITEMS = [f"q{k}" for k in range(1, 13)]
FACTORS = {"A": ITEMS[:4], "B": ITEMS[4:8], "C": ITEMS[8:]}


@pytest.mark.parametrize(
    "structure",
    [
        {"factors": {"only": ITEMS[:5]}, "family": "single"},
        {"factors": FACTORS, "family": "correlated", "residual_covariances": [("q1", "q2")],
         "regressions": [("C", "A")]},
        {"factors": FACTORS, "family": "second_order", "general": "G"},
        {"factors": FACTORS, "family": "bifactor", "general": "G", "residual_covariances": [["q3", "q4"]]},
    ],
    ids=["single", "correlated", "second_order", "bifactor"],
)
def test_diagram_for_every_family(structure):
    general = structure.get("general")
    loads = {(i, f): 0.6 for f, its in structure["factors"].items() for i in its}
    if structure["family"] == "bifactor":
        loads.update({(i, general): -0.4 for i in ITEMS})
    paths = {(f, general): 0.7 for f in structure["factors"]} if structure["family"] == "second_order" else {}
    im = decode(model_diagram(structure, loadings=loads, paths=paths, correlations={("A", "B"): 0.3}))
    assert im.width == round(PAGE_WIDTH * DPI) and im.height >= 2 * DPI
    # the structure alone (no estimates) still draws
    decode(model_diagram(structure))
    assert model_diagram({"factors": {}}) is None


def test_charts_with_many_groups_and_items():
    groups = [f"site {k}" for k in range(12)]
    rng = np.random.default_rng(1)
    values = {(i, g): (float(rng.normal(1, 0.1)), 0.05) for i in ITEMS for g in groups}
    decode(profile_chart(ITEMS, groups, values, released=["q3"], title="Loadings"))
    decode(dmacs_heatmap(ITEMS, groups[1:], {(i, g): float(rng.uniform(0, 0.9)) for i in ITEMS for g in groups[1:]}))
    decode(forest_chart([(f"A: {g}", 0.1 * k, 0.1 * k - 0.2, 0.1 * k + 0.2) for k, g in enumerate(groups)], xlabel="d"))
    steps = [{"label": lv, "cfi": {"change": -0.02, "cutoff": -0.01}, "rmsea": {"change": 0.01, "cutoff": None},
              "srmr": {"change": None, "cutoff": 0.03}} for lv in ("Metric", "Scalar", "Strict")]
    decode(change_chart(steps))
    assert change_chart([]) is None and profile_chart([], groups, {}) is None
    assert dmacs_heatmap(ITEMS, groups, {}) is None and forest_chart([], xlabel="d") is None


def test_threshold_profiles_for_ordinal_items(tmp_path):
    # an ordinal run reports thresholds instead of intercepts; the profile section draws the
    # ones that differ across groups (o3's are equal in both groups and are left out)
    rows = []
    for g, shift in (("north", 0.0), ("south", 0.2)):
        for it in ("o1", "o2", "o3"):
            d = 0.0 if it == "o3" else shift
            rows.append({"level": "configural", "group": g, "parameter": "loading", "variable": it, "other": "F",
                         "label": "", "free": True, "estimate": 0.7 - d, "se": 0.05, "z": 14.0, "pvalue": 0.0,
                         "std": 0.7})
            for t in ("t1", "t2"):
                rows.append({"level": "configural", "group": g, "parameter": "threshold", "variable": it, "other": t,
                             "label": "", "free": True, "estimate": (-0.5 if t == "t1" else 0.6) + d, "se": 0.08,
                             "z": 7.0, "pvalue": 0.0, "std": 0.0})
    results = {"groups": {"north": 250, "south": 240}, "reference_group": "north",
               "levels": [{"level": "configural", "converged": True, "chi2": 10.0, "df": 4, "decision": "holds"}]}
    ctx = {"structure": {"factors": {"F": ["o1", "o2", "o3"]}, "family": "single", "general": None}}
    paths = write_reports(tmp_path, results, pd.DataFrame(rows), ctx)
    names = {p.name for p in paths}
    assert {"profile-threshold.png", "profile-loading.png", "model.png"} <= names
    assert "profile-intercept.png" not in names
    html = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert "Thresholds that differ across groups" in html and "left out: 2 held equal" in html


def test_profiles_leave_out_parameters_equal_in_every_group(tmp_path):
    rows = [{"level": "metric", "group": g, "parameter": "loading", "variable": it, "other": "F", "label": "",
             "free": True, "estimate": 0.7, "se": 0.05, "z": 14.0, "pvalue": 0.0, "std": 0.7}
            for g in ("north", "south") for it in ("o1", "o2", "o3")]
    results = {"groups": {"north": 250, "south": 240}, "reference_group": "north",
               "levels": [{"level": "metric", "converged": True, "chi2": 10.0, "df": 4, "decision": "holds"}]}
    paths = write_reports(tmp_path, results, pd.DataFrame(rows), {})
    assert not [p for p in paths if p.name.startswith("profile-")]
    assert "All loadings are held equal across groups" in (tmp_path / "report.md").read_text(encoding="utf-8")
