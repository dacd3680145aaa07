"""The demo pipeline end to end through the command line: every report file and section.

The demo data are the project's invented Shift Outlook scenario (examples/, simulated with
planted effects); this checks the report's wiring into ``invariance run``, not numbers.
"""

from __future__ import annotations

import base64
import io
import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
from PIL import Image

from invariance.report.parts import FOLD_ROWS

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "pipelines" / "shift_outlook_by_site.yaml"
CORE = ["summary", "data", "model", "levels", "changes", "profiles", "cautions", "provenance"]
# results.json key -> the report section that shows it (when the key has content)
OPTIONAL = {"screening": "screening", "group_fit": "group_fit", "reliability": "bifactor",
            "scale_bias": "effects", "flagged": "flagged"}


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
    ids = re.findall(r'<section id="([a-z_]+)">', html)
    assert [i for i in ids if i in CORE] == CORE
    results = json.loads((out / "results.json").read_text(encoding="utf-8"))
    for key, sid in OPTIONAL.items():
        assert (sid in ids) == bool(results.get(key)), (key, sid)
    assert "further" not in ids  # every results key of the demo has its own section
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


def test_demo_paper_tables_and_folded_long_tables(demo_run):
    out, _ = demo_run
    for name in ("loadings", "latent"):
        for ext in ("csv", "md", "tex"):
            assert (out / f"table_{name}.{ext}").stat().st_size > 0, (name, ext)
    for path in out.glob("table_*.md"):
        text = path.read_text(encoding="utf-8")
        assert "&lt;" not in text and "&gt;" not in text, path.name
    html = (out / "report.html").read_text(encoding="utf-8")
    md = (out / "report.md").read_text(encoding="utf-8")
    # long tables (the 48-row screening table, the loadings) are folded; the levels table is not
    folded = re.findall(r"<details><summary>[^<]*\((\d+) rows\)</summary>", html)
    assert folded and all(int(n) > FOLD_ROWS for n in folded)
    assert len(re.findall(r"<details><summary>", md)) == len(folded)
    levels = html.split('<section id="levels">')[1].split("</section>")[0]
    assert "<details>" not in levels
    # user-facing text cites published sources, not the project's internal documents
    assert "METHODS" not in html and "METHODS" not in md
