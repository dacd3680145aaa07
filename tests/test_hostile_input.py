"""Hostile and broken input (issue 14): every case exits 2 with one line naming the problem
and the fix, prints no traceback, and changes or leaves behind no file.

The data are Holzinger & Swineford (1939), shipped with semopy (``hs_frame``), edited per
case; the second-opinion case uses semopy as the independent reference.
"""

from __future__ import annotations

import csv
import hashlib
import json
import os
import pathlib
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import yaml

import invariance
from conftest import ROOT, hs_doc, run_cli, write_yaml
from invariance.cli import main
from invariance.errors import DataError, SpecificationError


# ---------------------------------------------------------------------------- helpers
def snapshot(root: pathlib.Path) -> dict:
    """Every file and folder under ``root`` (hidden ones too) with its content hash."""
    out = {}
    for dirpath, dirs, files in os.walk(root):
        base = pathlib.Path(dirpath)
        for d in dirs:
            out[str((base / d).relative_to(root)) + "/"] = "dir"
        for f in files:
            p = base / f
            out[str(p.relative_to(root))] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


def refused(capsys, argv, *needles, cwd_tree: pathlib.Path) -> str:
    """Run ``main(argv)``; assert exit 2, one stderr line holding every needle, no
    traceback, and an unchanged folder tree."""
    before = snapshot(cwd_tree)
    code = main([str(a) for a in argv])
    err = capsys.readouterr().err
    assert code == 2, err
    assert "Traceback" not in err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    for n in needles:
        assert n in lines[0], lines[0]
    assert snapshot(cwd_tree) == before
    return lines[0]


@pytest.fixture()
def hs_pipeline(hs_dir):
    """hs.csv and a configural-only pipeline beside it."""
    return write_yaml(hs_dir / "p.yaml", hs_doc("hs.csv", levels=["configural"]))


def _csv(frame, folder, name, **kw):
    frame.to_csv(folder / name, index=False, **kw)
    return name


# ---------------------------------------------------------------- 1. never lose a file
def _precious(folder: pathlib.Path):
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "results.json").write_text('{"mine": true}')
    (folder / "thesis.docx").write_bytes(b"years of work")


def test_folder_with_results_json_and_a_users_file_survives(hs_dir, hs_pipeline, capsys):
    victim = hs_dir / "victim"
    _precious(victim)
    refused(capsys, ["run", hs_pipeline, "--out", victim, "--quiet"], str(victim), "thesis.docx", "--out",
            cwd_tree=hs_dir)
    # the same folder named by the pipeline's output.folder
    doc = hs_doc("hs.csv", levels=["configural"], output={"folder": "victim"})
    p = write_yaml(hs_dir / "named.yaml", doc)
    refused(capsys, ["run", p], "victim", "output.folder", cwd_tree=hs_dir)
    with pytest.raises(SpecificationError, match="thesis.docx"):
        invariance.run(doc | {"data": {"path": str(hs_dir / "hs.csv"), "group": "school"}}, out=victim, quiet=True)
    assert (victim / "thesis.docx").read_bytes() == b"years of work"


def test_empty_out_and_protected_folders_are_refused(hs_dir, hs_pipeline, capsys, monkeypatch, tmp_path_factory):
    work = tmp_path_factory.mktemp("work")
    (work / "notes.txt").write_text("keep")
    monkeypatch.chdir(work)
    refused(capsys, ["run", hs_pipeline, "--out", ""], "out is empty", cwd_tree=hs_dir)
    refused(capsys, ["run", hs_pipeline, "--out", "."], "the working folder", "choose a new folder", cwd_tree=work)
    refused(capsys, ["run", hs_pipeline, "--out", ".."], "above the working folder", cwd_tree=work)
    refused(capsys, ["run", hs_pipeline, "--out", hs_dir], "folder of the data file", cwd_tree=hs_dir)
    # pipeline elsewhere than the data: its folder is protected too
    pipe_dir = tmp_path_factory.mktemp("pipes")
    p = write_yaml(pipe_dir / "p.yaml", hs_doc(str(hs_dir / "hs.csv"), levels=["configural"]))
    refused(capsys, ["run", p, "--out", pipe_dir], "folder of the pipeline file", cwd_tree=pipe_dir)
    refused(capsys, ["run", p, "--out", pipe_dir.parent], "a folder above", cwd_tree=pipe_dir)
    doc = hs_doc(str(hs_dir / "hs.csv"), levels=["configural"])
    for bad, needle in (("", "out is empty"), (42, "got int 42"), (b"x", "got bytes")):
        with pytest.raises(SpecificationError, match=needle):
            invariance.run(doc, out=bad, quiet=True)
    assert (work / "notes.txt").read_text() == "keep"


def test_only_an_unchanged_own_output_folder_is_replaced(hs_dir, capsys):
    doc = hs_doc(str(hs_dir / "hs.csv"), levels=["configural"])
    out = hs_dir / "own"
    invariance.run(doc, out=out, quiet=True)
    manifest = json.loads((out / "manifest.json").read_text())
    listed = set(manifest["files"])
    assert "results.json" in listed and "report.html" in listed
    on_disk = {str(p.relative_to(out)) for p in out.rglob("*") if p.is_file()} - {"manifest.json"}
    assert on_disk == listed
    # a file added by the user: refused, nothing touched
    (out / "my_notes.txt").write_text("mine")
    before = snapshot(hs_dir)
    with pytest.raises(SpecificationError, match="my_notes.txt"):
        invariance.run(doc, out=out, quiet=True)
    assert snapshot(hs_dir) == before
    (out / "my_notes.txt").unlink()
    # a file of the run edited by the user: refused as well
    (out / "report.md").write_text("my edits")
    with pytest.raises(SpecificationError, match="report.md. was changed"):
        invariance.run(doc, out=out, quiet=True)
    assert (out / "report.md").read_text() == "my edits"


def test_unwritable_destination_is_refused_before_fitting(hs_dir, hs_pipeline, capsys):
    refused(capsys, ["run", hs_pipeline, "--out", hs_dir / "hs.csv" / "sub"], "is a file", cwd_tree=hs_dir)
    refused(capsys, ["run", hs_pipeline, "--out", "/proc/invariance-out"], "not writable", "--out", cwd_tree=hs_dir)


# ------------------------------------------------------------------- 2. hostile YAML
def _laughs(levels: int) -> str:
    lines = ["a: &a [x, x, x, x, x, x, x, x, x, x]"]
    for k in range(1, levels):
        prev, cur = chr(ord("a") + k - 1), chr(ord("a") + k)
        lines.append(f"{cur}: &{cur} [" + ", ".join([f"*{prev}"] * 10) + "]")
    lines.append("data: {path: hs.csv, group: school}")
    lines.append("model: {factors: {f: [x1, x2, x3]}}")
    lines.append(f"title: *{chr(ord('a') + levels - 1)}")
    return "\n".join(lines) + "\n"


@pytest.mark.parametrize(
    "name,text,needles",
    [
        ("laughs", _laughs(9), ("more than 100000 values", "aliases")),
        ("recursive", "data: &d {path: hs.csv, group: school, more: *d}\nmodel: {factors: {f: [x1, x2, x3]}}\n",
         ("alias refers to a value that contains it",)),
        ("deep", "data: " + "[" * 5000 + "]" * 5000 + "\n", ("nested", "fix the brackets")),
        ("deep_but_parsable", "title: " + "[" * 60 + "]" * 60 + "\n", ("nested 61 levels",)),
        ("duplicate_key", "data: {path: hs.csv, group: school}\nmodel: {factors: {f: [x1, x2, x3]}}\n"
         "levels: [configural]\nlevels: [configural, metric]\n", ("key 'levels' is written twice", "lines 3 and 4", "keep one")),
        ("duplicate_nested", "data:\n  path: hs.csv\n  group: school\n  group: sex\nmodel: {factors: {f: [x1, x2, x3]}}\n",
         ("key 'group' is written twice",)),
        ("huge_value", "data: {path: hs.csv, group: school}\nmodel: {factors: {f: [x1, x2, x3]}}\ntitle: ["
         + ", ".join(str(k) for k in range(20000)) + "]\n", ("Invalid value for title", "characters)")),
    ],
)
def test_hostile_yaml(hs_dir, capsys, name, text, needles):
    p = hs_dir / f"{name}.yaml"
    p.write_text(text)
    line = refused(capsys, ["run", p, "--out", hs_dir / "out"], *needles, cwd_tree=hs_dir)
    assert len(line) < 400  # every quoted value is shortened


# --------------------------------------------------------------- 3. broken item values
@pytest.mark.parametrize("value", [np.inf, -np.inf, 1e200])
def test_infinite_or_huge_item_value(hs_dir, hs_frame, capsys, value):
    d = hs_frame.copy()
    d.loc[d.index[7], "x4"] = value  # the 8th data row
    _csv(d, hs_dir, "bad.csv")
    p = write_yaml(hs_dir / "bad.yaml", hs_doc("bad.csv", levels=["configural"]))
    for cmd in (["run", p, "--out", hs_dir / "out"], ["check", p]):
        refused(capsys, cmd, "Item 'x4' holds", "data row 8", "must be finite", "data.missing", cwd_tree=hs_dir)
    with pytest.raises(DataError, match="must be finite"):
        invariance.run(p, out=hs_dir / "out", quiet=True)
    assert not (hs_dir / "out").exists()


@pytest.mark.parametrize("frac,seed", [(0.75, 1), (0.8, 0)])
def test_saturated_model_failure_is_a_data_error(hs_dir, hs_frame, capsys, frac, seed):
    # these draws made the EM step raise LinAlgError before the fix
    d = hs_frame.copy()
    items = [f"x{i}" for i in range(1, 10)]
    v = d[items].to_numpy(dtype=float).copy()
    v[np.random.default_rng(seed).random(v.shape) < frac] = np.nan
    d[items] = v
    _csv(d, hs_dir, "holes.csv")
    doc = hs_doc("holes.csv", levels=["configural"])
    doc["data"]["incomplete"] = "full_information"
    p = write_yaml(hs_dir / "holes.yaml", doc)
    refused(capsys, ["check", p], "saturated model", "drop the items observed least often", cwd_tree=hs_dir)


# --------------------------------------------------------- 4. no longer silently accepted
def test_duplicate_column_header(hs_dir, hs_frame, capsys):
    d = hs_frame.copy()
    d.columns = ["x1" if c == "x2" else c for c in d.columns]
    _csv(d, hs_dir, "dup.csv")
    p = write_yaml(hs_dir / "dup.yaml", hs_doc("dup.csv", levels=["configural"]))
    refused(capsys, ["check", p], "names column 'x1' twice", "rename one", cwd_tree=hs_dir)


def test_excel_duplicate_header_and_na_group(hs_dir, hs_frame):
    from invariance.data.read import read_table

    d = hs_frame[["school", "x1", "x2", "x3"]].replace({"Pasteur": "NA"})
    d.to_excel(hs_dir / "book.xlsx", index=False)
    assert set(read_table(hs_dir / "book.xlsx", text_columns=("school",))["school"]) == {"Grant-White", "NA"}
    d.columns = ["school", "x1", "x1", "x3"]
    d.to_excel(hs_dir / "dup.xlsx", index=False)
    before = snapshot(hs_dir)
    with pytest.raises(DataError, match="names column 'x1' twice"):
        read_table(hs_dir / "dup.xlsx")
    assert snapshot(hs_dir) == before


@pytest.mark.parametrize("label", ["NA", "None", "null", "N/A"])
def test_group_labelled_like_missing_stays_a_group(hs_dir, hs_frame, label):
    d = hs_frame.copy()
    d["school"] = d["school"].replace({"Pasteur": label})
    _csv(d, hs_dir, "na.csv")
    info = invariance.check(hs_doc(str(hs_dir / "na.csv"), levels=["configural"]))
    assert info["groups"] == {"Grant-White": 145, label: 156}


def test_group_labels_differing_only_by_spaces(hs_dir, hs_frame, capsys):
    d = hs_frame.copy()
    d.loc[d.index[:20], "school"] = d.loc[d.index[:20], "school"] + " "
    _csv(d, hs_dir, "spaces.csv")
    p = write_yaml(hs_dir / "spaces.yaml", hs_doc("spaces.csv", levels=["configural"]))
    refused(capsys, ["check", p], "differ only by spaces", "correct the data", cwd_tree=hs_dir)
    doc = hs_doc("hs.csv", levels=["configural"])
    doc["data"]["groups"] = ["Pasteur", "Pasteur ", "Grant-White"]
    refused(capsys, ["check", write_yaml(hs_dir / "g.yaml", doc)], "leading or trailing spaces", cwd_tree=hs_dir)


def _model(**model):
    doc = hs_doc("hs.csv", levels=["configural"])
    doc["model"] = model
    return doc


@pytest.mark.parametrize(
    "name,doc,needles",
    [
        ("alpha_nan", "decision: {alpha: .nan}", ("decision.alpha is nan", "finite")),
        ("cutoff_inf", "decision: {cutoffs: {cfi: .inf}}", ("decision.cutoffs.cfi is inf", "finite")),
        ("cutoff_minus_inf", "decision: {cutoffs: {cfi: -.inf}}", ("is -inf",)),
        ("factor_named_like_item", _model(factors={"x1": ["x1", "x2", "x3"], "textual": ["x4", "x5", "x6"]}),
         ("factor 'x1' has the name of an item", "rename the factor")),
        ("general_named_like_item", _model(factors={"a": ["x1", "x2", "x3"], "b": ["x4", "x5", "x6"]}, general="x4"),
         ("factor 'x4' has the name of an item",)),
        ("two_specifics", _model(factors={"a": ["x1", "x2", "x3"], "b": ["x3", "x4", "x5"]}, general="g"),
         ("item 'x3' is listed under two specific factors", "keep it under one")),
        ("one_item", _model(factors={"visual": ["x1", "x2", "x3"], "lonely": ["x4"]}),
         ("model.factors.lonely has one item ('x4')", "at least two items")),
    ],
)
def test_meaning_refused_at_load(hs_dir, capsys, name, doc, needles):
    p = hs_dir / f"{name}.yaml"
    if isinstance(doc, str):
        p.write_text(yaml.safe_dump(hs_doc("hs.csv", levels=["configural"]), sort_keys=False) + doc + "\n")
    else:
        write_yaml(p, doc)
    for cmd in (["check", p], ["run", p, "--out", hs_dir / "out"]):
        refused(capsys, cmd, *needles, cwd_tree=hs_dir)


# ----------------------------------------------------------------- 5. interrupted runs
def test_sigterm_while_writing_leaves_nothing(hs_dir):
    from invariance.pipeline.output import write_outputs
    from invariance.pipeline.runner import Interrupted, _stop_signals_interrupt

    def writer(folder):
        (folder / "half.txt").write_text("half")
        os.kill(os.getpid(), signal.SIGTERM)
        (folder / "never.txt").write_text("x")

    before = snapshot(hs_dir)
    with pytest.raises(Interrupted) as caught, _stop_signals_interrupt():
        write_outputs(hs_dir / "out", [writer])
    assert caught.value.signum == signal.SIGTERM
    assert snapshot(hs_dir) == before  # no hidden .partial folder either
    assert signal.getsignal(signal.SIGTERM) == signal.SIG_DFL  # handler given back


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGHUP])
def test_cli_run_stopped_by_signal_while_writing(hs_dir, sig):
    doc = hs_doc("hs.csv", levels=["configural", "metric", "scalar", "strict"])
    p = write_yaml(hs_dir / "p.yaml", doc)
    out = hs_dir / "out"
    first = run_cli("run", p, "--out", out, "--quiet")
    assert first.returncode == 0, first.stderr
    before = snapshot(hs_dir)
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen([sys.executable, "-m", "invariance", "run", str(p), "--out", str(out), "--quiet"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    seen = False
    deadline = time.monotonic() + 300
    while proc.poll() is None and time.monotonic() < deadline:
        if any(q.name.endswith(".partial") for q in hs_dir.iterdir()):
            proc.send_signal(sig)
            seen = True
            break
        time.sleep(0.002)
    _, err = proc.communicate(timeout=120)
    assert seen, "the run finished before its output folder was being written"
    assert proc.returncode == 128 + sig, err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert signal.Signals(sig).name in err and "run again" in err
    assert snapshot(hs_dir) == before  # the earlier output is intact, nothing half-written


# ---------------------------------------------------------------------- 6. outputs
@pytest.mark.parametrize("mask,mode", [(0o022, 0o755), (0o077, 0o700), (0o002, 0o775)])
def test_output_folder_mode_follows_umask(hs_dir, mask, mode):
    old = os.umask(mask)
    try:
        res = invariance.run(hs_doc(str(hs_dir / "hs.csv"), levels=["configural"]), out=hs_dir / "o", quiet=True)
    finally:
        os.umask(old)
    assert res.out_dir.stat().st_mode & 0o777 == mode
    assert (res.out_dir / "results.json").stat().st_mode & 0o777 == mode & 0o666


def _formula_cells(path: pathlib.Path) -> list[str]:
    bad = []
    with open(path, newline="", encoding="utf-8") as fh:
        for row in csv.reader(fh):
            for cell in row:
                if cell[:1] in ("=", "+", "-", "@"):
                    try:
                        float(cell)
                    except ValueError:
                        bad.append(cell)
    return bad


def test_labels_with_control_characters_and_formulas(hs_dir, hs_frame):
    d = hs_frame.copy()
    d["school"] = d["school"].replace({"Pasteur": "=HYPERLINK(\"http://x\")\x1b[31m", "Grant-White": "@SUM(A1)\x07"})
    _csv(d, hs_dir, "evil.csv")
    doc = hs_doc("evil.csv", levels=["configural", "metric"], title="Evil\x1b]0;pwned\x07 title")
    p = write_yaml(hs_dir / "evil.yaml", doc)
    out = hs_dir / "out"
    proc = run_cli("run", p, "--out", out)
    assert proc.returncode == 0, proc.stderr
    assert "\x1b" not in proc.stdout and "\x07" not in proc.stdout
    assert "\\x1b" in proc.stdout  # shown, escaped
    for name in ("report.md", "report.html", "table_levels.tex", "table_levels.md"):
        text = (out / name).read_text(encoding="utf-8")
        assert "\x1b" not in text and "\x07" not in text, name
    for name in ("levels.csv", "estimates.csv", "table_levels.csv"):
        assert _formula_cells(out / name) == [], name
    groups = {row["group"] for row in csv.DictReader(open(out / "estimates.csv", encoding="utf-8"))}
    assert "'=HYPERLINK(\"http://x\")\\x1b[31m" in groups


def test_escape_functions():
    from invariance.escape import csv_cell, terminal_text, visible
    from invariance.report.render import md_escape
    from invariance.report.tables import latex_escape

    assert visible("a\x1bb\u202e") == "a\\x1bb\\u202e"
    assert terminal_text("a\nb\tc\x9b") == "a\nb\tc\\x9b"
    assert [csv_cell(v) for v in ("=1+1", "+1+cmd", "-x", "@a", "\tx", "ok", -1.5, "-0.25", "+1")] == [
        "'=1+1", "'+1+cmd", "'-x", "'@a", "\\x09x", "ok", -1.5, "-0.25", "+1"]  # signed numbers stay
    assert "\x1b" not in md_escape("x\x1b") and "\x00" not in latex_escape("a\x00b")


# ----------------------------------------------------------------- 7. Python API
def test_numpy_scalars_in_a_dict_pipeline(hs_dir):
    doc = hs_doc(str(hs_dir / "hs.csv"), levels=["configural"], seed=np.int64(7))
    doc["decision"] = {"alpha": np.float64(0.01), "stop_at_failure": np.bool_(True)}
    doc["data"]["path"] = hs_dir / "hs.csv"
    spec = invariance.load_pipeline(doc)
    assert spec.seed == 7 and type(spec.seed) is int
    doc["decision"] = {"alpha": {1, 2}}
    with pytest.raises(SpecificationError, match="decision.alpha is a set"):
        invariance.load_pipeline(doc)
    doc["decision"] = {"alpha": np.float64("nan")}
    with pytest.raises(SpecificationError, match="decision.alpha is nan"):
        invariance.load_pipeline(doc)


# ------------------------------------------------------------ 8. misleading messages
def test_semicolon_and_tab_files_named_csv(hs_dir, hs_frame, capsys):
    _csv(hs_frame, hs_dir, "semi.csv", sep=";")
    _csv(hs_frame, hs_dir, "tabs.csv", sep="\t")
    for name, needles in (("semi", ("looks semicolon-separated", "save it comma-separated")),
                          ("tabs", ("looks tab-separated", "data.format: tsv"))):
        p = write_yaml(hs_dir / f"{name}.yaml", hs_doc(f"{name}.csv", levels=["configural"]))
        refused(capsys, ["check", p], *needles, cwd_tree=hs_dir)


def test_folder_as_data_or_pipeline_path(hs_dir, capsys):
    (hs_dir / "data.csv").mkdir()
    p = write_yaml(hs_dir / "p.yaml", hs_doc("data.csv", levels=["configural"]))
    refused(capsys, ["check", p], "is a folder, not a file", "data.path", cwd_tree=hs_dir)
    refused(capsys, ["check", hs_dir], "is a folder, not a file", cwd_tree=hs_dir)


def test_minus_nine_codes_are_named(hs_dir, hs_frame, capsys):
    d = hs_frame[["school", "x1", "x2", "x3", "x4", "x5", "x6"]].copy()
    d[["x1", "x2", "x3", "x4", "x5", "x6"]] = d[["x1", "x2", "x3", "x4", "x5", "x6"]].round()
    d.loc[d.index[::25], "x2"] = -9
    _csv(d, hs_dir, "coded.csv")
    assert main(["new", str(hs_dir / "coded.csv"), "--group", "school", "--out", str(hs_dir / "new.yaml")]) == 0
    text = (hs_dir / "new.yaml").read_text()
    assert yaml.safe_load(text)["data"]["missing"] == [-9]
    assert "data.missing was filled with -9" in text
    capsys.readouterr()
    assert main(["check", str(hs_dir / "new.yaml")]) == 0
    info = invariance.check(hs_dir / "new.yaml")
    assert sum(m["x2"] for m in info["missing"].values()) == 13  # -9 now counted as missing
    # without the code listed: check names the value and the key to add
    doc = yaml.safe_load(text)
    doc["data"]["missing"] = []
    write_yaml(hs_dir / "nocodes.yaml", doc)
    assert main(["check", str(hs_dir / "nocodes.yaml")]) == 0
    out = capsys.readouterr().out
    assert "item x2 holds -9 (13 times), far outside its other values" in out
    assert "add data.missing: [-9]" in out


def test_second_opinion_with_spaces_in_names(hs_dir, hs_frame):
    items = {f"x{i}": f"item {i}" for i in range(1, 10)}
    d = hs_frame.rename(columns=items)
    _csv(d, hs_dir, "spaced.csv")
    doc = hs_doc(str(hs_dir / "spaced.csv"), levels=["configural"])
    doc["model"]["factors"] = {"visual ability": ["item 1", "item 2", "item 3"],
                               "text-ual": ["item 4", "item 5", "item 6"], "speed": ["item 7", "item 8", "item 9"]}
    res = invariance.run(doc, quiet=True, crosscheck=True, write=False).to_dict()
    # semopy is the independent reference: each group's configural chi-square agrees
    assert [r["agreement"] for r in res["crosscheck"]["groups"]] == ["agree", "agree"]
