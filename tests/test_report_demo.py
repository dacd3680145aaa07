"""The demo pipeline end to end through the command line: every report file and section.

The demo data are the project's invented Shift Outlook scenario (examples/, simulated with
planted effects); this checks the report's wiring into ``invariance run``, not numbers.
"""

from __future__ import annotations

import base64
import io
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
from PIL import Image

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "pipelines" / "shift_outlook_by_site.yaml"
SECTIONS = ["summary", "data", "model", "levels", "changes", "profiles", "cautions", "provenance"]


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "out"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.run(
        [sys.executable, "-m", "invariance", "run", str(DEMO), "--out", str(out), "--quiet"],
        capture_output=True, text=True, env=env, cwd=str(ROOT), timeout=300, stdin=subprocess.DEVNULL,
    )
    return out, proc


def test_quiet_run_prints_nothing(demo_run):
    _, proc = demo_run
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout == "" and proc.stderr == ""


def test_demo_writes_every_report_file(demo_run):
    out, _ = demo_run
    for name in ("report.html", "report.md", "table_levels.csv", "table_levels.md", "table_levels.tex"):
        assert (out / name).stat().st_size > 0, name
    assert (out / "figures" / "model.png").exists()


def test_demo_report_has_every_section(demo_run):
    out, _ = demo_run
    html = (out / "report.html").read_text(encoding="utf-8")
    md = (out / "report.md").read_text(encoding="utf-8")
    assert re.findall(r'<section id="([a-z_]+)">', html) == SECTIONS
    titles = re.findall(r"<h2>\d+\. (.*?)</h2>", html)
    assert re.findall(r"^## \d+\. (.*)$", md, flags=re.M) == titles
    assert "could not be drawn" not in html
    # the pipeline's own words reach the report: verdict, the rule, the reason of each level
    assert "The data support metric invariance" in html and "Chen (2007)" in html
    assert "not tested" in html and "Shift Outlook Survey by site" in html
    # provenance: the pipeline file as run, byte for byte (escaped), and the data hash
    pipeline_text = DEMO.read_text(encoding="utf-8")
    assert "reference: harbor" in html and pipeline_text.splitlines()[0] in html
    assert re.search(r"[0-9a-f]{64}", html)
    for b64 in re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', html):
        Image.open(io.BytesIO(base64.b64decode(b64))).load()


def test_demo_publication_table_rows(demo_run):
    out, _ = demo_run
    md = (out / "table_levels.md").read_text(encoding="utf-8").splitlines()
    rows = [l.split("|")[1].strip() for l in md[2:] if l.startswith("|")]
    assert rows == ["Configural", "Metric", "Scalar", "Strict"]
    assert "not tested" in md[5]
