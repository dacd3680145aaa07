"""Recovery and invariance properties on simulated data (invented populations, seeded).

- A four-group bifactor population (N = 2000 per group) satisfying scalar invariance:
  the scalar model returns the population values within 3 standard errors.
- Permuting group order or item order does not change chi-square (a property of ML:
  the likelihood does not depend on how groups or items are listed).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import invariance as inv
from invariance.data.simulate import draw_group, implied_from_matrices

ITEMS = [f"i{k:02d}" for k in range(1, 13)]
SPECIFIC = {"s1": ITEMS[0:4], "s2": ITEMS[4:8], "s3": ITEMS[8:12]}
STRUCT = inv.Structure(SPECIFIC, family="bifactor", general="gen")
GROUPS = ["g1", "g2", "g3", "g4"]


def _population():
    rng = np.random.default_rng(20261201)
    lam_g = rng.uniform(0.5, 0.8, 12)
    lam_s = rng.uniform(0.3, 0.55, 12)
    nu = rng.uniform(2.5, 3.5, 12)
    theta = rng.uniform(0.3, 0.6, 12)
    lam = np.zeros((12, 4))
    for j, its in enumerate(SPECIFIC.values()):
        for it in its:
            k = ITEMS.index(it)
            lam[k, j] = lam_s[k]
    lam[:, 3] = lam_g
    var = {"g1": [1, 1, 1, 1], "g2": [1.2, 0.8, 1.1, 1.3], "g3": [0.9, 1.0, 1.2, 0.8], "g4": [1.1, 1.3, 0.9, 1.0]}
    mean = {"g1": [0, 0, 0, 0], "g2": [0.2, -0.1, 0.0, 0.3], "g3": [-0.2, 0.1, 0.2, -0.3], "g4": [0.1, 0.0, -0.2, 0.5]}
    return lam, nu, theta, var, mean


def _data(seed=7):
    lam, nu, theta, var, mean = _population()
    rng = np.random.default_rng(seed)
    frames = []
    for g in GROUPS:
        sigma, mu = implied_from_matrices(lam, np.diag(var[g]), np.diag(theta), nu, np.array(mean[g], float))
        x = draw_group(2000, sigma, mu, rng)
        f = pd.DataFrame(x, columns=ITEMS)
        f["grp"] = g
        frames.append(f)
    return pd.concat(frames, ignore_index=True)


@pytest.fixture(scope="module")
def data():
    return _data()


def test_bifactor_scalar_recovers_population(data):
    lam, nu, theta, var, mean = _population()
    r = inv.fit_level(data, STRUCT, "scalar", group="grp", reference="g1")
    assert r.converged and not r.problems
    est = r.estimates()
    est = est[est.free].drop_duplicates("label")  # one row per distinct parameter
    fac = {"s1": 0, "s2": 1, "s3": 2, "gen": 3}
    z = []
    for row in est.itertuples():
        if row.parameter == "loading":
            truth = lam[ITEMS.index(row.variable), fac[row.other]]
        elif row.parameter == "intercept":
            truth = nu[ITEMS.index(row.variable)]
        elif row.parameter == "residual":
            truth = theta[ITEMS.index(row.variable)]
        elif row.parameter == "variance":
            truth = var[row.group][fac[row.variable]]
        elif row.parameter == "mean":
            truth = mean[row.group][fac[row.variable]]
        else:  # pragma: no cover - no other free parameters in this model
            raise AssertionError(row.parameter)
        z.append((row.estimate - truth) / row.se)
    z = np.abs(np.array(z))
    assert len(z) == r.spec.n_params == 24 + 12 + 48 + 12 + 12
    assert z.max() < 3.0, f"largest |estimate - truth| / SE = {z.max():.2f}"
    # the model holds in the population: the chi-square test should not reject
    assert r.fit.pvalue > 0.001


def test_group_order_does_not_change_chi_square(data):
    a = inv.fit_level(data, STRUCT, "scalar", group="grp", reference="g1")
    shuffled = data.iloc[np.random.default_rng(3).permutation(len(data))]
    b = inv.fit_level(
        inv.sample_stats(shuffled, STRUCT.items, "grp", groups=["g3", "g1", "g4", "g2"]),
        STRUCT,
        "scalar",
        reference="g1",
    )
    assert b.spec.groups == ("g3", "g1", "g4", "g2")
    assert b.fit.chi2 == pytest.approx(a.fit.chi2, rel=1e-8)
    assert b.fit.df == a.fit.df


def test_item_order_does_not_change_chi_square(data):
    a = inv.fit_level(data, STRUCT, "metric", group="grp")
    perm = list(np.random.default_rng(5).permutation(ITEMS))
    specific = {f: [it for it in perm if it in its] for f, its in reversed(list(SPECIFIC.items()))}
    st2 = inv.Structure(specific, family="bifactor", general="gen")
    b = inv.fit_level(data[perm + ["grp"]], st2, "metric", group="grp")
    assert b.fit.chi2 == pytest.approx(a.fit.chi2, rel=1e-8)
    assert b.fit.df == a.fit.df
