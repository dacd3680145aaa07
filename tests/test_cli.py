"""The command line, through subprocesses (python -m invariance)."""

import json

import numpy as np
import pytest
import yaml

from conftest import hs_doc, run_cli, run_cli_many, write_yaml


def _assert_bad_input(proc, out_dir, needle):
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert "Traceback" not in proc.stderr
    assert needle in lines[0], lines[0]
    assert not out_dir.exists()


def _data_variant(hs_frame, folder, name, edit):
    d = edit(hs_frame.copy())
    d.to_csv(folder / name, index=False)
    return name


def _bad_cases(hs_frame, folder):
    """(name, pipeline text or dict, expected words) for distinct bad inputs."""
    csv = lambda name, edit: _data_variant(hs_frame, folder, name, edit)  # noqa: E731
    tiny = csv("tiny.csv", lambda d: d.assign(school=np.where(np.arange(len(d)) < 5, "Tiny", d["school"])))
    const = csv("const.csv", lambda d: d.assign(x1=np.where(d["school"] == "Pasteur", 1.0, d["x1"])))
    empty = csv("empty.csv", lambda d: d.assign(x2=np.where(d["school"] == "Pasteur", np.nan, d["x2"])))
    text = csv("text.csv", lambda d: d.assign(x5=d["x5"].astype(object).where(d.index != 7, "seven")))
    one = csv("one.csv", lambda d: d.assign(school="Grant-White"))
    base = hs_doc("hs.csv")

    def with_(**kw):
        doc = json.loads(json.dumps(base))
        for key, value in kw.items():
            sect, _, sub = key.partition("__")
            if sub:
                doc[sect][sub] = value
            else:
                doc[sect] = value
        return doc

    no_group = json.loads(json.dumps(base))
    del no_group["data"]["group"]
    return [
        ("yaml_syntax", "data: [unclosed\n", "not valid YAML"),
        ("not_mapping", "- just\n- a list\n", "not a mapping"),
        ("unknown_top", with_(colour="red"), "Unknown key 'colour'"),
        ("unknown_decision", with_(decision={"cutof": 0.01}), "Unknown key 'cutof' in section 'decision'; allowed keys"),
        ("missing_group_key", no_group, "Required key 'group'"),
        ("estimator", with_(estimator="wls"), "estimator"),
        ("levels_order", with_(levels=["configural", "strict", "scalar"]), "must be in order"),
        ("negative_cutoff", with_(decision={"cutoffs": {"cfi": -0.01}}), "decision.cutoffs.cfi"),
        ("bifactor_no_general", with_(model__family="bifactor"), "needs model.general"),
        ("released_unknown_item", with_(model__released=[{"parameter": "loading", "item": "x99"}]), "'x99'"),
        ("data_missing", with_(data={"path": "nowhere.csv", "group": "school"}), "does not exist"),
        ("column_missing", with_(data={"path": "hs.csv", "group": "schol"}), "Column 'schol' is not in the data"),
        ("non_numeric", with_(data={"path": text, "group": "school"}), "Item 'x5' holds non-numeric values"),
        ("one_group", with_(data={"path": one, "group": "school"}), "at least two groups"),
        ("reference_absent", with_(data={"path": "hs.csv", "group": "school", "reference": "Lincoln"}), "Reference group 'Lincoln'"),
        ("tiny_group", with_(data={"path": tiny, "group": "school"}), "Group 'Tiny' has 5 cases with an observed item for 9 items"),
        ("constant_item", with_(data={"path": const, "group": "school"}), "Item 'x1' is constant"),
        ("empty_item", with_(data={"path": empty, "group": "school"}), "Item 'x2' is entirely missing in group 'Pasteur'"),
        ("released_bad_group", with_(model__released=[{"parameter": "intercept", "item": "x3", "groups": ["Nope"]}]), "group 'Nope'"),
        ("unknown_preset", with_(decision={"cutoffs": "chen2008"}), "decision.cutoffs"),
    ]


#: Cases also run in-process through main() (the subprocess runs cover the first 16).
N_SUBPROCESS = 16


def _write_case(folder, name, body):
    p = folder / f"{name}.yaml"
    if isinstance(body, str):
        p.write_text(body)
    else:
        write_yaml(p, body)
    return p


def test_bad_inputs_exit_2_with_one_line(hs_dir, hs_frame):
    cases = _bad_cases(hs_frame, hs_dir)[:N_SUBPROCESS]
    assert len({c[0] for c in cases}) >= 15
    commands = []
    for name, body, _ in cases:
        p = _write_case(hs_dir, name, body)
        commands.append(("run", p, "--out", hs_dir / f"out_{name}"))
    # at most a few at a time: the machine is shared
    procs = []
    for k in range(0, len(commands), 4):
        procs += run_cli_many(commands[k : k + 4])
    for (name, _, needle), proc in zip(cases, procs):
        _assert_bad_input(proc, hs_dir / f"out_{name}", needle)


def test_more_bad_inputs_in_process(hs_dir, hs_frame, capsys):
    from invariance.cli import main

    for name, body, needle in _bad_cases(hs_frame, hs_dir)[N_SUBPROCESS:]:
        p = _write_case(hs_dir, name, body)
        out = hs_dir / f"out_{name}"
        code = main(["run", str(p), "--out", str(out)])
        err = capsys.readouterr().err
        assert code == 2, (name, err)
        assert len(err.strip().splitlines()) == 1 and needle in err, (name, err)
        assert not out.exists()


def test_missing_pipeline_and_usage_errors(tmp_path):
    out = tmp_path / "out"
    _assert_bad_input(run_cli("run", tmp_path / "absent.yaml", "--out", out), out, "does not exist")
    _assert_bad_input(run_cli("frobnicate"), out, "invalid choice")
    _assert_bad_input(run_cli("new", tmp_path / "absent.csv"), out, "--group")


def test_yaml_object_tag_is_refused_and_never_executed(tmp_path):
    marker = tmp_path / "executed.txt"
    p = tmp_path / "evil.yaml"
    p.write_text(
        f"data: !!python/object/apply:os.system ['touch {marker}']\n"
        "model: {factors: {f: [a, b, c]}}\n"
    )
    out = tmp_path / "out"
    proc = run_cli("run", p, "--out", out)
    _assert_bad_input(proc, out, "refused YAML tag")
    assert not marker.exists()
    proc = run_cli("check", p)
    assert proc.returncode == 2 and not marker.exists()


def test_demo_runs_and_writes_outputs(small_demo, tmp_path):
    out = tmp_path / "site_run"
    proc = run_cli("run", small_demo / "shift_outlook_by_site.yaml", "--out", out)
    assert proc.returncode == 0, proc.stderr
    assert "configural" in proc.stdout and "decision" in proc.stdout
    assert "The data support" in proc.stdout or "do not support" in proc.stdout
    data = json.loads((out / "results.json").read_text())
    assert set(data["groups"]) == {"harbor", "ridge", "valley", "mesa"}
    assert data["reference_group"] == "harbor"
    assert data["levels"][0]["converged"] is True
    assert data["levels"][0]["problems"] == []  # the demo's bifactor model converges cleanly
    assert (out / "report.md").is_file()


def test_quiet_prints_nothing(small_demo, tmp_path):
    out = tmp_path / "q"
    proc = run_cli("run", small_demo / "shift_outlook_by_occupation.yaml", "--out", out, "--quiet")
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout == ""
    assert (out / "results.json").is_file()


def test_check_prints_group_sizes_and_missingness(small_demo):
    proc = run_cli("check", small_demo / "shift_outlook_by_site.yaml")
    assert proc.returncode == 0, proc.stderr
    for site in ("harbor", "ridge", "valley", "mesa"):
        assert site in proc.stdout
    assert "missing values by item" in proc.stdout
    assert not (small_demo / "results").exists()  # check fits and writes nothing


def test_new_writes_a_valid_starter(small_demo, tmp_path):
    target = tmp_path / "starter.yaml"
    proc = run_cli("new", small_demo / "shift_outlook.csv", "--group", "site", "--out", target)
    assert proc.returncode == 0, proc.stderr
    doc = yaml.safe_load(target.read_text())
    assert doc["data"]["group"] == "site"
    items = doc["model"]["factors"]["factor1"]
    assert items == [f"so{k:02d}" for k in range(1, 13)]  # respondent id and occupation left out
    doc["data"]["missing"] = [-9]
    target.write_text(yaml.safe_dump(doc))
    assert run_cli("check", target).returncode == 0
    again = run_cli("new", small_demo / "shift_outlook.csv", "--group", "site", "--out", target)
    assert again.returncode == 2 and "already exists" in again.stderr


def test_second_opinion_reports_agreement(hs_dir):
    p = write_yaml(hs_dir / "hs.yaml", hs_doc("hs.csv", levels=["configural", "metric"]))
    proc = run_cli("run", p, "--out", hs_dir / "o", "--second-opinion")
    assert proc.returncode == 0, proc.stderr
    assert "Second opinion (semopy" in proc.stdout
    assert proc.stdout.count(": agree") == 2


def test_demo_command_writes_data_and_pipelines(tmp_path):
    proc = run_cli("demo", "--out", tmp_path / "d", "--n-per-site", "50")
    assert proc.returncode == 0, proc.stderr
    names = sorted(p.name for p in (tmp_path / "d").iterdir())
    assert names == ["shift_outlook.csv", "shift_outlook_by_occupation.yaml", "shift_outlook_by_site.yaml"]


def test_internal_error_exits_1(monkeypatch, capsys, tmp_path):
    import invariance.cli as cli

    def boom(args):
        raise RuntimeError("bug")

    monkeypatch.setitem(cli.COMMANDS, "check", boom)
    assert cli.main(["check", str(tmp_path / "p.yaml")]) == 1
    assert "internal error: RuntimeError: bug" in capsys.readouterr().err
