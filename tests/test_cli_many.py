"""The batch and plan commands and the pipeline's alignment section, through
``python -m invariance`` (subprocess) and ``invariance.run``.

Data: the invented demo scenario (small copy, see conftest) and Holzinger & Swineford
(1939) from semopy for the alignment section.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import yaml

import invariance
from conftest import hs_doc, run_cli, write_yaml


def _levels(path):
    d = json.loads(path.read_text())
    return d["supported_level"], [(lv["level"], lv["decision"], lv["chi2"]) for lv in d["levels"]]


def test_batch_command_matches_single_runs(hs_dir):
    # Holzinger & Swineford (1939) by school and by sex, plus a broken pipeline
    school = write_yaml(hs_dir / "by_school.yaml", hs_doc("hs.csv", levels=["configural", "metric", "scalar"]))
    sex = write_yaml(hs_dir / "by_sex.yaml", hs_doc("hs.csv", levels=["configural", "metric", "scalar"],
                                                   data={"path": "hs.csv", "group": "sex"}))
    broken = write_yaml(hs_dir / "broken.yaml", {"data": {"path": "nowhere.csv", "group": "g"},
                                                 "model": {"factors": {"F": ["a", "b"]}}})
    out = hs_dir / "batch"
    r = run_cli("batch", school, sex, broken, "--workers", "2", "--out", out, "--quiet", timeout=300)
    # issue 8: the broken pipeline is reported (exit 2, one line on stderr) and the rest complete
    assert r.returncode == 2, r.stderr
    assert len(r.stderr.strip().splitlines()) == 1 and "broken" in r.stderr
    table = pd.read_csv(out / "batch.csv", keep_default_na=False)
    assert table["task"].tolist() == ["by_school", "by_sex", "broken"]
    assert table["status"].tolist() == ["ok", "ok", "failed"]
    assert table.loc[2, "error"].startswith("DataError: ")
    # the same pipelines run one by one give the same results
    for name, path in (("by_school", school), ("by_sex", sex)):
        single = hs_dir / f"single_{name}"
        res = invariance.run(path, out=single, quiet=True)
        batch_res, single_res = _levels(out / name / "results.json"), _levels(single / "results.json")
        # same decisions; the same statistics up to rounding (a worker process may run BLAS
        # on another number of threads, which changes the last digits of a sum)
        assert batch_res[0] == single_res[0]
        assert [lv[:2] for lv in batch_res[1]] == [lv[:2] for lv in single_res[1]]
        assert [lv[2] for lv in batch_res[1]] == pytest.approx([lv[2] for lv in single_res[1]], rel=1e-9)
        assert table[table.task == name].iloc[0]["highest_level"] == (res.supported_level or "none")
        assert {p.name for p in (out / name).iterdir()} == {p.name for p in single.iterdir()}
    # Holzinger & Swineford by school: configural chi-square 115.851 on 48 df (METHODS section 12)
    d = json.loads((out / "by_school" / "results.json").read_text())
    assert d["levels"][0]["chi2"] == pytest.approx(115.851, abs=2e-3)


def test_batch_vary_grouping_column(hs_dir):
    path = write_yaml(hs_dir / "hs.yaml", hs_doc("hs.csv", levels=["configural", "metric"]))
    out = hs_dir / "vary"
    r = run_cli("batch", path, "--vary", "data.group=school,sex", "--workers", "0", "--out", out, "--quiet",
                timeout=300)
    assert r.returncode == 0, r.stderr
    table = pd.read_csv(out / "batch.csv", keep_default_na=False)
    assert table["task"].tolist() == ["hs-school", "hs-sex"] and (table["status"] == "ok").all()
    groups = json.loads((out / "hs-sex" / "results.json").read_text())["groups"]
    assert len(groups) == 2 and sum(groups.values()) == 301  # 301 pupils (METHODS section 12)


def test_plan_command(tmp_path):
    plan = {
        "model": {"family": "single", "factors": {"F": ["a", "b", "c", "d"]}},
        "groups": ["north", "south"],
        "population": {
            "loadings": {"F": {"a": 0.7, "b": 0.6, "c": 0.8, "d": 0.65}},
            "intercepts": {"a": 2.0, "b": 2.5, "c": 3.0, "d": 1.5},
            "residuals": {"a": 0.51, "b": 0.64, "c": 0.36, "d": 0.58},
        },
        "sizes": [150, 250],
        "shift": {"parameter": "intercept", "item": "d", "size": 0.4},
        "replications": 6,
    }
    path = write_yaml(tmp_path / "plan.yaml", plan)
    r = run_cli("plan", path, "--workers", "0", "--out", tmp_path / "p", "--seed", "2", timeout=300)
    assert r.returncode == 0, r.stderr
    d = json.loads((tmp_path / "p" / "plan.json").read_text())
    assert d["target_step"] == "scalar" and d["settings"]["seed"] == 2
    assert "scalar" in d["cutoffs"] and "metric" in d["cutoffs"]
    assert "dCFI" in r.stdout


def test_pipeline_alignment_section(hs_dir):
    # Holzinger & Swineford (1939) by school, three correlated factors: aligned means and
    # variances per factor; the reference school at 0 and 1
    doc = hs_doc("hs.csv", levels=["configural", "metric"], alignment={"enabled": True},
                 output={"folder": "out"})
    path = write_yaml(hs_dir / "hs.yaml", doc)
    res = invariance.run(path, quiet=True)
    al = json.loads((hs_dir / "out" / "results.json").read_text())["alignment"]
    assert al["enabled"] is True and al["reference"] == "Grant-White"
    assert set(al["means"]) == {"visual", "textual", "speed"}
    for f in al["means"]:
        assert al["means"][f]["Grant-White"] == 0.0 and al["variances"][f]["Grant-White"] == 1.0
        assert np.isfinite(al["means"][f]["Pasteur"]) and al["variances"][f]["Pasteur"] > 0
    assert res.to_dict()["alignment"]["means"] == al["means"]
    # the alignment is the engine's on the configural fit
    from invariance.partial.alignment import align

    direct = align(res.fits["configural"])
    assert direct.means["textual"]["Pasteur"] == pytest.approx(al["means"]["textual"]["Pasteur"])
    # off by default
    doc2 = hs_doc("hs.csv", levels=["configural"], output={"folder": "out2"})
    res2 = invariance.run(write_yaml(hs_dir / "hs2.yaml", doc2), quiet=True)
    assert "alignment" not in res2.to_dict()


def test_pipeline_alignment_refuses_bifactor(small_demo, tmp_path):
    doc = yaml.safe_load((small_demo / "shift_outlook_by_site.yaml").read_text())
    doc["data"]["path"] = str(small_demo / doc["data"]["path"])
    doc["alignment"] = {"enabled": True}
    doc["output"] = {"folder": str(tmp_path / "o")}
    path = write_yaml(tmp_path / "bif.yaml", doc)
    # refused when the pipeline is loaded, before anything is fitted (also by `check`)
    r = run_cli("check", path, timeout=300)
    assert r.returncode == 2
    assert "alignment.enabled needs a single-factor or correlated-factor model" in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    doc["alignment"] = {"enabled": True, "refrence": "x"}
    with pytest.raises(invariance.SpecificationError, match="Unknown key 'refrence'"):
        invariance.load_pipeline(write_yaml(tmp_path / "bad.yaml", doc))


def test_plan_command_bad_file_one_line(tmp_path):
    r = run_cli("plan", tmp_path / "missing.yaml", timeout=120)
    assert r.returncode == 2 and r.stderr.startswith("error: The plan file")
    assert len(r.stderr.strip().splitlines()) == 1
