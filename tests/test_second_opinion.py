"""The second opinion on a suspected run-away (invariance.estimate.optimize).

A slow approach to a finite optimum in a flat valley must end at the optimum that
scipy.optimize finds from many starts; a genuine run-away must be confirmed within a few
iterations and named, and an independent optimizer (scipy's L-BFGS-B on the ML
discrepancy of METHODS section 2, written here, numerical gradients) must carry the named
parameter further out from the reported point while lowering the discrepancy.

The data are simulated (tests/optimum_sim.py, seed 3 with weak crew loadings, the
complete cases after deleting 20% of the values of six items: the run-away data of
tests/benchmarks/bench_speed.py).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize

from invariance.data.moments import sample_stats
from invariance.estimate import optimize as opt
from invariance.estimate.objective import MLObjective
from invariance.estimate.separate import group_spec
from invariance.estimate.start import start_values
from invariance.model.levels import build_level

import optimum_sim as sim
from test_optimum import P, _scipy_global

WEAK_CREW = sim.SPECIFIC * np.r_[np.full(6, 0.6), np.ones(6)]


@pytest.fixture(scope="module")
def groups():
    """Per group: (single-group spec, its statistics) of the configural bifactor model."""
    frame = sim.bifactor_frame(seed=3, specific=WEAK_CREW, missing=0.2).dropna()
    st = sample_stats(frame, list(sim.ITEMS), "site")
    spec = build_level(sim.STRUCTURE, st.names, "configural")
    return {name: (group_spec(spec, g), st.subset([name])) for g, name in enumerate(st.names)}


@pytest.fixture(scope="module")
def harbor_optimum(groups):
    """Lowest T of group harbor over 12 starts of scipy's L-BFGS-B (independent reference)."""
    g = groups["harbor"][1].groups[0]
    return _scipy_global(g.cov, g.mean, g.n)


def _t_admissible(x: np.ndarray, S: np.ndarray, m: np.ndarray, n: int) -> float:
    """T = N [log|Sigma| + tr(S Sigma^-1) - log|S| - p + (m - mu)' Sigma^-1 (m - mu)]
    (METHODS section 2) of the one-group bifactor model, for any estimates whose implied
    covariance is positive definite (negative residual variances allowed): general
    loadings x[0:12], specific x[12:24], residual variances x[24:36], intercepts x[36:48]."""
    lam = np.zeros((P, 3))
    lam[:, 0] = x[:12]
    lam[:6, 1] = x[12:18]
    lam[6:, 2] = x[18:24]
    sigma = lam @ lam.T + np.diag(x[24:36])
    try:
        root = np.linalg.cholesky(sigma)
    except np.linalg.LinAlgError:
        return 1e10
    d = m - x[36:48]
    w = np.linalg.inv(sigma)
    return float(n * (2 * np.log(np.diag(root)).sum() + np.sum(S * w) - np.linalg.slogdet(S)[1] - P + d @ w @ d))


def _layout(spec) -> np.ndarray:
    """Index of each parameter of ``spec`` in the layout of :func:`_t_admissible`."""
    labels, g = list(spec.param_labels), spec.groups[0]
    order = []
    for kind in ("outlook", "specific", "residual", "intercept"):
        for i, item in enumerate(sim.ITEMS):
            if kind == "outlook":
                order.append(f"loading:{item}<-outlook|{g}")
            elif kind == "specific":
                order.append(f"loading:{item}<-{'crew' if i < 6 else 'tools'}|{g}")
            else:
                order.append(f"{kind}:{item}|{g}")
    return np.array([labels.index(lab) for lab in order])


def test_promises_not_delivered_tell_a_run_away_from_a_flat_valley():
    # The Newton decrement lambda = g' H^-1 g promises a decrease of lambda / 2 (the
    # quadratic model's; Boyd & Vandenberghe 2004, section 9.5.1).
    k = np.arange(opt.PROBE_WINDOW)
    path = [np.array([-0.5 - 0.07 * j, 0.3]) for j in k]           # parameter 0 runs on
    steady = np.full(k.size, 4.0)
    away = 50.0 - 0.02 * k                                         # delivers 1% of the promise
    crawl = 50.0 - 2.0 * k                                         # delivers what was promised
    assert opt._keeps_running(path, list(away), list(steady), (0,))
    assert not opt._keeps_running(path, list(crawl), list(steady), (0,))
    assert not opt._keeps_running(path, list(away), list(4.0 * 0.5**k), (0,))       # lambda shrinks
    assert not opt._keeps_running(path, list(away), list(np.full(k.size, 1e-9)), (0,))  # noise
    assert not opt._keeps_running(path, list(away), list(steady), (1,))             # not that one
    back = [p * (1 if j % 2 else -1) for j, p in enumerate(path)]
    assert not opt._keeps_running(back, list(away), list(steady), (0,))             # no one way


@pytest.mark.parametrize("after", [15, 22])
def test_flat_valley_suspicion_is_dismissed_at_the_scipy_optimum(groups, harbor_optimum, after):
    spec, st = groups["harbor"]
    obj = MLObjective(spec, st)
    ref = harbor_optimum
    whole = opt.minimize(obj, start_values(spec, st))
    assert whole.converged and whole.fun == pytest.approx(ref, abs=1e-3)
    # scoring crawls along a flat valley here (about 0.006 a step); suspect the largest
    # gradient entries of where it stands and ask the watched polish alone (no L-BFGS-B)
    x, f, grad, info, _, it, _ = opt._scoring(obj, start_values(spec, st), max_iter=after, tol=1e-12)
    suspect = opt.Outcome(x, f, grad, info, 6, it, tuple(int(j) for j in np.argsort(-np.abs(grad))[:3]))
    out = opt._second_opinion(obj, suspect, x, it, max_iter=200, tol=1e-12, lower=None)
    assert out.status == 4 and out.fun == pytest.approx(ref, abs=1e-3)


@pytest.mark.parametrize("group, item", [("ridge", "so11"), ("valley", "so08")])
def test_run_away_is_confirmed_within_a_window_and_named(groups, monkeypatch, group, item):
    spec, st = groups[group]
    g = st.groups[0]
    seen = []
    scoring = opt._scoring

    def spy(obj, x, **kw):
        seen.append(obj)
        return scoring(obj, x, **kw)

    monkeypatch.setattr(opt, "_scoring", spy)
    out = opt.minimize(MLObjective(spec, st), start_values(spec, st))
    assert out.status == 6
    named = [spec.param_labels[j] for j in out.running]
    assert f"residual:{item}|{group}" in named
    # the second opinion was one watched scoring run, stopped after one window
    assert len(seen) == 2 and isinstance(seen[1], opt._Watch)
    assert len(seen[1].points) == opt.PROBE_WINDOW
    # independent check: scipy from the reported point lowers the discrepancy while the
    # named residual variance runs much further below zero (no finite optimum there)
    z = np.empty(48)
    z[:] = out.x[_layout(spec)]
    j = 24 + sim.ITEMS.index(item)
    ref = optimize.minimize(_t_admissible, z, args=(g.cov, g.mean, g.n), method="L-BFGS-B",
                            options={"maxiter": 20000})
    assert _t_admissible(z, g.cov, g.mean, g.n) == pytest.approx(out.fun, rel=1e-9)
    assert ref.fun < out.fun - 0.1
    assert z[j] < 0 and ref.x[j] < 3 * z[j]
