"""Ordered and continuous items together: polyserial and Pearson correlations, means and
variances, their ACOV, and the DWLS model with continuous items.

References: a plain polyserial likelihood maximized with scipy.optimize.minimize_scalar
(Olsson, Drasgow & Dorans 1982, two-step); Monte Carlo spread of the estimates; the
closed-form sampling variance of a mean (s^2 / n); counting of degrees of freedom.
"""

import os
import sys

import numpy as np
import pandas as pd
import pytest
from scipy import optimize
from scipy.stats import norm

sys.path.insert(0, os.path.dirname(__file__))
from conftest import write_yaml  # noqa: E402

import invariance
from invariance.estimate.dwls import DWLSObjective, ordinal_start_values
from invariance.estimate.dwls_robust import fit_dwls
from invariance.model import Structure
from invariance.model.ordinal_levels import build_ordinal_level
from invariance.data.ordinal_stats import ordinal_stats_from_arrays
from invariance.data.polyserial import mixed_statistics

LOADS = np.array([0.7, 0.6, 0.5, 0.65, 0.55])
ORD = np.array([True, False, True, False, True])
CUTS = {0: [-1.0, 0.0, 1.0], 2: [-0.5, 0.7], 4: [0.2]}


def _draw(rng, n, mean=0.0):
    R = np.outer(LOADS, LOADS)
    np.fill_diagonal(R, 1.0)
    z = rng.multivariate_normal(np.zeros(5), R, size=n) + mean * LOADS
    x = z.copy()
    for i, c in CUTS.items():
        x[:, i] = (z[:, i, None] > np.asarray(c)[None]).sum(1)
    x[:, 1] = 3.0 + 2.0 * z[:, 1]
    x[:, 3] = 10.0 - 0.5 * z[:, 3]          # reversed scale: negative correlations
    return x


def _ref_polyserial(xc, y):
    z = (xc - xc.mean()) / xc.std()
    n = y.size
    tau = norm.ppf(np.cumsum(np.bincount(y))[:-1] / n)
    lim = np.r_[-np.inf, tau, np.inf]

    def nll(r):
        s = np.sqrt(1 - r * r)
        return -np.sum(np.log(norm.cdf((lim[y + 1] - r * z) / s) - norm.cdf((lim[y] - r * z) / s)))

    return optimize.minimize_scalar(nll, bounds=(-0.99, 0.99), method="bounded", options={"xatol": 1e-10}).x


def test_polyserial_matches_plain_reference():
    rng = np.random.default_rng(1)
    x = _draw(rng, 700)
    f = mixed_statistics(x, ORD, np.array([4, 0, 3, 0, 2]))
    for c in (1, 3):
        for o in (0, 2, 4):
            ref = _ref_polyserial(x[:, c], x[:, o].astype(int))
            assert f.corr[c, o] == pytest.approx(ref, abs=1e-4)
    # Pearson block and the mean / variance statistics
    assert f.corr[1, 3] == pytest.approx(np.corrcoef(x[:, 1], x[:, 3])[0, 1], abs=1e-12)
    nt = f.n_thresholds
    np.testing.assert_allclose(f.stats[nt:nt + 2], x[:, [1, 3]].mean(0))
    np.testing.assert_allclose(f.stats[nt + 2:nt + 4], x[:, [1, 3]].var(0))
    # sampling variance of a mean: s^2 / n
    assert f.acov[nt, nt] == pytest.approx(x[:, 1].var() / 700, rel=1e-10)


def test_polyserial_standard_error_monte_carlo():
    rng = np.random.default_rng(2)
    est, se = [], []
    for _ in range(150):
        f = mixed_statistics(_draw(rng, 400), ORD, np.array([4, 0, 3, 0, 2]))
        q = f.corr_start + 0        # pair (0, 1): ordered item 0, continuous item 1
        est.append(f.stats[q])
        se.append(np.sqrt(f.acov[q, q]))
    assert np.mean(est) == pytest.approx(0.7 * 0.6, abs=0.01)
    assert np.std(est) == pytest.approx(np.mean(se), rel=0.15)


def test_dwls_with_continuous_items():
    rng = np.random.default_rng(3)
    items = [f"v{i + 1}" for i in range(5)]
    st = Structure(factors={"f": tuple(items)}, family="single")
    arrs = [_draw(rng, 3000), _draw(rng, 3000, mean=0.4)]
    ost = ordinal_stats_from_arrays(arrs, ["a", "b"], items, continuous=["v2", "v4"])
    assert list(ost.n_categories) == [4, 0, 3, 0, 2]
    # df by counting: per group 3 + 2 + 1 thresholds, 2 means, 2 variances, 10 correlations
    dfs = {lv: build_ordinal_level(st, ["a", "b"], lv, ost.n_categories).df
           for lv in ("configural", "thresholds", "metric", "scalar", "strict")}
    per_group = 6 + 4 + 10
    assert dfs["configural"] == 2 * per_group - 2 * (6 + 5 + 2 + 2)
    assert dfs["thresholds"] - dfs["configural"] == 1 * 0 + 0 + 1   # K-3: 4-cat +1, 3-cat 0, binary 0
    spec = build_ordinal_level(st, ["a", "b"], "scalar", ost.n_categories)
    obj = DWLSObjective(spec, ost)
    x0 = ordinal_start_values(spec, ost)
    _, g, _ = obj.derivatives(x0)
    e = 1e-6
    num = np.array([(obj.value(x0 + e * np.eye(x0.size)[k]) - obj.value(x0 - e * np.eye(x0.size)[k])) / (2 * e)
                    for k in range(x0.size)])
    np.testing.assert_allclose(g, num, rtol=1e-5, atol=1e-5)
    res = fit_dwls(spec, ost)
    assert res.converged and res.extra["robust"]["pvalue_scaled_shifted"] > 0.001
    std = res.standardized("a")["lambda"][:, 0]
    np.testing.assert_allclose(np.abs(std), LOADS, atol=0.04)       # recovery (invented population)
    assert std[3] < 0                                                # the reversed continuous item
    lab = spec.param_labels
    alpha_b = res.theta[lab.index("mean:f|b")]
    assert alpha_b == pytest.approx(0.4, abs=0.08)


def test_pipeline_with_a_list_of_ordinal_items(tmp_path):
    rng = np.random.default_rng(4)
    items = [f"v{i + 1}" for i in range(5)]
    frames = []
    for g, m in (("north", 0.0), ("south", 0.3)):
        df = pd.DataFrame(_draw(rng, 600, mean=m), columns=items)
        df["region"] = g
        frames.append(df)
    pd.concat(frames).to_csv(tmp_path / "d.csv", index=False)
    doc = {"data": {"path": "d.csv", "group": "region", "ordinal": ["v1", "v3", "v5"]},
           "model": {"factors": {"f": items}}, "decision": {"stop_at_failure": False}}
    res = invariance.run(write_yaml(tmp_path / "p.yaml", doc), quiet=True, write=False)
    d = res.to_dict()
    assert d["estimator"] == "dwls"
    assert d["ordinal"]["continuous_items"] == ["v2", "v4"]
    assert [lv["decision"] for lv in d["levels"]][:4] == ["holds"] * 4
