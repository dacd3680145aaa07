"""Analytic derivatives against finite differences (METHODS section 2: "test the analytic
gradient against finite differences"), for every model family, at random parameter points.

Checked: the model Jacobian d(Sigma, mu)/d theta, the gradient of T, and the exact Hessian
of T, each against central differences (scipy-free plain numerics; a general numerical
identity, not a reference value).
"""

from __future__ import annotations

import numpy as np
import pytest

semopy = pytest.importorskip("semopy")

import invariance as inv  # noqa: E402
from invariance.estimate.kernels import group_matrices, implied_moments, moment_jacobian  # noqa: E402
from invariance.estimate.objective import MLObjective  # noqa: E402

F = {"visual": ["x1", "x2", "x3"], "textual": ["x4", "x5", "x6"], "speed": ["x7", "x8", "x9"]}
STRUCTURES = {
    "single": inv.Structure({"g": [f"x{i}" for i in range(1, 10)]}, family="single"),
    "correlated": inv.Structure(F, family="correlated"),
    "second_order": inv.Structure(F, family="second_order", general="g"),
    "bifactor": inv.Structure(F, family="bifactor", general="g"),
    "paths_and_residual_covs": inv.Structure(
        F,
        family="correlated",
        regressions=(("textual", "visual"), ("speed", "textual"), ("speed", "visual")),
        residual_covariances=(("x1", "x4"), ("x7", "x8")),
    ),
}


@pytest.fixture(scope="module")
def stats():
    hs = semopy.examples.holzinger39.get_data()
    return inv.sample_stats(hs, [f"x{i}" for i in range(1, 10)], "school")


def _point(spec, stats, seed):
    rng = np.random.default_rng(seed)
    return inv.estimate.start_values(spec, stats) + rng.normal(0, 0.08, spec.n_params)


@pytest.mark.parametrize("family", sorted(STRUCTURES))
@pytest.mark.parametrize("level", ["configural", "scalar", "strict"])
def test_jacobian_gradient_hessian(stats, family, level):
    st = STRUCTURES[family]
    spec = inv.build_level(st, stats.names, level)
    obj = MLObjective(spec, stats)
    x = _point(spec, stats, seed=len(family) * 7 + len(level))
    f, grad, info = obj.derivatives(x)
    hess = obj.hessian(x)
    q = spec.n_params
    h = 1e-6
    gfd = np.empty(q)
    hfd = np.empty((q, q))
    for j in range(q):
        e = np.zeros(q)
        e[j] = h
        gfd[j] = (obj.value(x + e) - obj.value(x - e)) / (2 * h)
        hfd[:, j] = (obj.derivatives(x + e, information=False)[1] - obj.derivatives(x - e, information=False)[1]) / (2 * h)
    assert np.allclose(grad, gfd, rtol=1e-5, atol=1e-5 * np.abs(grad).max())
    assert np.allclose(hess, hfd, rtol=1e-5, atol=1e-6 * np.abs(hfd).max())
    # Jacobian of the implied moments, group by group
    for lay in obj.layouts:
        mats = group_matrices(lay, x)
        sigma, mu, G, A = implied_moments(mats)
        dS, dm = moment_jacobian(lay, mats, G, A)
        for a, j in enumerate(lay.params):
            e = np.zeros(q)
            e[j] = h
            sp, mp, _, _ = implied_moments(group_matrices(lay, x + e))
            sm, mm, _, _ = implied_moments(group_matrices(lay, x - e))
            assert np.allclose(dS[a], (sp - sm) / (2 * h), atol=1e-6)
            assert np.allclose(dm[a], (mp - mm) / (2 * h), atol=1e-6)
    # the expected information is symmetric positive semi-definite
    assert np.allclose(info, info.T)
    assert np.linalg.eigvalsh(info)[0] > -1e-8 * np.abs(info).max()
