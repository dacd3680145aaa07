"""Shared fixtures: the Holzinger & Swineford (1939) data shipped with semopy, and a
reduced copy of the invented demo scenario."""

from __future__ import annotations

import os
import pathlib
import subprocess
import sys

import pytest
import yaml

ROOT = pathlib.Path(__file__).resolve().parents[1]

HS_FACTORS = {"visual": ["x1", "x2", "x3"], "textual": ["x4", "x5", "x6"], "speed": ["x7", "x8", "x9"]}


def hs_doc(data_path: str = "hs.csv", **extra) -> dict:
    """A pipeline for the Holzinger & Swineford data by school (three correlated factors)."""
    doc = {
        "data": {"path": data_path, "group": "school"},
        "model": {"factors": {k: list(v) for k, v in HS_FACTORS.items()}},
        "levels": ["configural", "metric", "scalar", "strict"],
    }
    doc.update(extra)
    return doc


@pytest.fixture(scope="session")
def hs_frame():
    from semopy.examples import holzinger39

    return holzinger39.get_data()


@pytest.fixture()
def hs_dir(tmp_path, hs_frame):
    """A folder holding hs.csv (Holzinger & Swineford 1939, via semopy)."""
    hs_frame.to_csv(tmp_path / "hs.csv", index=False)
    return tmp_path


def write_yaml(path: pathlib.Path, doc: dict) -> pathlib.Path:
    path.write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    return path


def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    return env


def run_cli(*args, cwd=None, timeout=180):
    """Run ``python -m invariance`` in a subprocess with this repository on the path."""
    return subprocess.run(
        [sys.executable, "-m", "invariance", *map(str, args)],
        capture_output=True,
        text=True,
        cwd=cwd,
        env=_env(),
        timeout=timeout,
    )


def run_cli_many(arglists, *, timeout=180):
    """Run several ``python -m invariance`` commands at once; returns CompletedProcess-like
    objects in the same order."""
    procs = [
        subprocess.Popen(
            [sys.executable, "-m", "invariance", *map(str, args)],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
            env=_env(),
        )
        for args in arglists
    ]
    out = []
    for args, p in zip(arglists, procs):
        stdout, stderr = p.communicate(timeout=timeout)
        out.append(subprocess.CompletedProcess(args, p.returncode, stdout, stderr))
    return out


@pytest.fixture(scope="session")
def small_demo(tmp_path_factory):
    """The demo scenario at 250 respondents per site (data + both pipelines).

    (At 200 per site one site's bifactor model has a Heywood case: a bifactor model with
    two specific factors is only weakly identified in small samples.)"""
    from invariance.demo import write_demo

    folder = tmp_path_factory.mktemp("demo")
    write_demo(folder, n_per_site=250)
    return folder
