"""The committed demo: reproducible from its seed, and the README shows what it prints."""

import pathlib
import re

import numpy as np
import pandas as pd

import invariance
from invariance.demo import PLANTED, simulate

ROOT = pathlib.Path(__file__).resolve().parents[1]


def test_committed_csv_is_the_seeded_simulation():
    committed = pd.read_csv(ROOT / "examples" / "shift_outlook.csv")
    fresh = simulate(seed=20261201, n_per_site=400)
    assert list(committed.columns) == list(fresh.columns)
    np.testing.assert_array_equal(committed.to_numpy(), fresh.to_numpy())
    items = [c for c in fresh.columns if c.startswith("so")]
    values = set(np.unique(fresh[items].to_numpy()))
    assert values <= {-9, 1, 2, 3, 4, 5}  # five-point items and the missing code


def test_planted_effects_are_declared():
    kinds = {(g, p) for g, _, p, *_ in PLANTED}
    assert ("site", "loading") in kinds and ("site", "intercept") in kinds and ("occupation", "intercept") in kinds


def test_readme_shows_what_the_site_demo_prints(tmp_path):
    res = invariance.run(ROOT / "pipelines" / "shift_outlook_by_site.yaml", out=tmp_path / "o", quiet=True)
    printed = res.summary().splitlines()
    readme = (ROOT / "README.md").read_text()
    block = readme.split("$ invariance run pipelines/shift_outlook_by_site.yaml", 1)[1].split("```", 1)[0]
    shown = [line for line in block.splitlines() if re.match(r"^(configural|metric|scalar|strict) ", line)]
    assert len(shown) == 4
    assert shown == [line for line in printed if re.match(r"^(configural|metric|scalar|strict) ", line)]
    assert all(not lv["problems"] for lv in res.to_dict()["levels"] if lv["converged"] is not None)


def test_partial_demo_flags_exactly_the_planted_site_effects(tmp_path):
    # recovery check on the invented demo (planted effects declared in invariance.demo.PLANTED)
    res = invariance.run(ROOT / "pipelines" / "shift_outlook_by_site_partial.yaml", out=tmp_path / "p", quiet=True)
    d = res.to_dict()
    flagged = {(f["parameter"], f["item"]) for f in d["flagged"]}
    planted = {(p, item) for grouping, _, p, item, *_ in PLANTED if grouping == "site"}
    assert flagged == planted
    scalar = next(lv for lv in d["levels"] if lv["level"] == "scalar")
    assert scalar["decision"] in ("holds", "holds_partially")
    assert all(f["dmacs_max"] > 0.2 for f in d["flagged"])  # .2 small guide, Nye et al. (2019)
