"""The batch and plan commands, driven through their argparse registration in-process
(the subprocess tests of ``python -m invariance`` come with the command line)."""

from __future__ import annotations

import argparse
import json

import pandas as pd
import pytest
import yaml

from invariance import SpecificationError
from invariance.pipeline.batch.commands import add_commands
from invariance.pipeline.batch.planfile import load_plan

PLAN = {
    "model": {"family": "single", "factors": {"F": ["a", "b", "c", "d"]}},
    "groups": ["north", "south"],
    "population": {
        "loadings": {"F": {"a": 0.7, "b": 0.6, "c": 0.8, "d": 0.65}},
        "intercepts": {"a": 2.0, "b": 2.5, "c": 3.0, "d": 1.5},
        "residuals": {"a": 0.51, "b": 0.64, "c": 0.36, "d": 0.58},
        "means": {"south": {"F": 0.3}},
    },
    "sizes": 200,
    "shift": {"parameter": "loading", "item": "c", "size": -0.4, "groups": ["south"]},
    "replications": 8,
    "seed": 3,
}


def _parse(argv):
    ap = argparse.ArgumentParser(prog="invariance")
    add_commands(ap.add_subparsers(dest="command"))
    return ap.parse_args(argv)


def test_plan_command_writes_json_and_csv(tmp_path, capsys):
    path = tmp_path / "plan.yaml"
    path.write_text(yaml.safe_dump(PLAN))
    args = _parse(["plan", str(path), "--workers", "0", "--out", str(tmp_path / "o"), "--quiet"])
    assert args.handler(args) == 0
    d = json.loads((tmp_path / "o" / "plan.json").read_text())
    assert d["target_step"] == "metric"
    assert d["settings"]["replications"] == 8 and d["settings"]["sizes"] == {"north": 200, "south": 200}
    rates = d["power"]["chi2 p<0.05"]["metric"]
    assert rates["n"] == 8 and 0 <= rates["rate"] <= 1
    rep = pd.read_csv(tmp_path / "o" / "replications.csv")
    assert set(rep["condition"]) == {"invariant", "shifted"} and len(rep) == 2 * 8 * 1
    assert "dCFI" in capsys.readouterr().out


def test_plan_file_rejects_unknown_keys():
    bad = dict(PLAN, replication=3)
    with pytest.raises(SpecificationError, match="Unknown key 'replication'.*allowed"):
        load_plan(bad)
    bad = dict(PLAN, shift={"parameter": "intercept", "item": "b"})
    with pytest.raises(SpecificationError, match="needs the key 'size'"):
        load_plan(bad)


def test_pipeline_variants(tmp_path):
    from invariance.pipeline.batch.tasks import parse_vary, pipeline_variants

    (tmp_path / "sub").mkdir()
    path = tmp_path / "sub" / "study.yaml"
    path.write_text(yaml.safe_dump({"data": {"path": "d.csv", "group": "site", "reference": "north"},
                                    "model": {"factors": {"F": ["a"]}}, "output": {"folder": "x"}}))
    vary = parse_vary(["data.group=site,region", "estimator=ml"])
    out = pipeline_variants(path, vary)
    assert [n for n, _ in out] == ["study-site-ml", "study-region-ml"]
    doc = out[1][1]
    assert doc["data"]["group"] == "region" and doc["estimator"] == "ml" and "output" not in doc
    assert "reference" not in doc["data"]  # a site name means nothing for another grouping column
    assert doc["data"]["path"] == str((tmp_path / "sub" / "d.csv").resolve())
    with pytest.raises(SpecificationError, match="KEY=VALUE"):
        parse_vary(["data.group"])


def test_plan_from_an_estimates_file(tmp_path):
    import numpy as np

    from invariance import Structure, build_level, fit
    from invariance.pipeline.batch import Population, simulate_groups
    from invariance.data.moments import stats_from_arrays

    struct = Structure({"F": ("a", "b", "c", "d")}, family="single")
    pop = load_plan(PLAN)["population"]
    data = simulate_groups(pop, (300, 300), seed=1)
    st = stats_from_arrays(data, pop.groups, struct.items)
    res = fit(build_level(struct, st.names, "scalar"), st)
    est = res.estimates()
    est.insert(0, "level", "scalar")
    est.to_csv(tmp_path / "estimates.csv", index=False)
    doc = {k: v for k, v in PLAN.items() if k != "population"}
    doc["population"] = {"estimates": "estimates.csv", "level": "scalar"}
    (tmp_path / "p.yaml").write_text(yaml.safe_dump(doc))
    got = load_plan(tmp_path / "p.yaml")["population"]
    want = Population.from_fit(res, struct)
    for a, b in zip(got.moments(), want.moments()):
        np.testing.assert_allclose(a[0], b[0], atol=1e-9)
    assert got.invariant() == {"loading": True, "intercept": True, "residual": False}


def test_plan_file_with_own_decision_rule():
    doc = dict(PLAN, decision={"criteria": ["cfi"], "cutoffs": {"cfi": 0.002}})
    kw = load_plan(doc)
    names = list(kw["rules"])
    assert len(names) == 5 and names[-1].startswith("your rule:")
    rule = kw["rules"][names[-1]]
    base = {"dchi2": 1.0, "ddf": 3, "p": 0.8, "drmsea": 0.0, "dsrmr": 0.0}
    assert rule(dict(base, dcfi=-0.003), "metric") and not rule(dict(base, dcfi=-0.001), "metric")
    with pytest.raises(SpecificationError, match="Unknown key 'stop_at_failure'"):
        load_plan(dict(PLAN, decision={"stop_at_failure": True}))


def test_example_plan_file_is_valid():
    import pathlib

    path = pathlib.Path(__file__).resolve().parents[1] / "examples" / "plan_shift_outlook.yaml"
    kw = load_plan(path)
    assert kw["population"].groups == ("harbor", "ridge") and kw["shift"].item == "so04"
    assert kw["population"].invariant() == {"loading": True, "intercept": True, "residual": True}


def test_the_help_example_runs_on_the_demo(tmp_path, capsys):
    # the example printed by `invariance batch --help`, on the demo pipeline (invented data)
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    ap = argparse.ArgumentParser(prog="invariance")
    sub = ap.add_subparsers(dest="command")
    add_commands(sub)
    epilog = sub.choices["batch"].epilog
    argv = epilog.split("invariance ", 1)[1].split()
    assert argv[:2] == ["batch", "pipelines/shift_outlook_by_site.yaml"] and "data.group=site,occupation" in argv
    argv[1] = str(root / argv[1])
    args = _parse([*argv, "--out", str(tmp_path / "b"), "--quiet"])
    assert args.handler(args) == 0, capsys.readouterr()
    table = pd.read_csv(tmp_path / "b" / "batch.csv")
    assert list(table["status"]) == ["ok", "ok"]
