"""Factor scores: regression (Thurstone 1935) and Bartlett (Bartlett 1937) methods."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from invariance import Structure, fit_level
from invariance.errors import DataError, EstimationError, SpecificationError
from invariance.model import Release
from invariance.effects.scores import determinacy, factor_scores, score_cases


def _population(m_general=False):
    """Two correlated factors, three items each (invented values for a recovery check)."""
    lam = np.zeros((6, 2))
    lam[:3, 0] = [0.8, 0.7, 0.6]
    lam[3:, 1] = [0.9, 0.5, 0.7]
    beta = np.zeros((2, 2))
    psi = np.array([[1.0, 0.4], [0.4, 1.3]])
    theta = np.diag([0.5, 0.6, 0.7, 0.4, 0.8, 0.5])
    nu = np.array([3.0, 2.5, 2.0, 1.0, 1.5, 2.0])
    alpha = np.array([0.3, -0.2])
    return (lam, beta, psi, theta, nu, alpha)


def _simulate(mats, n, rng):
    lam, beta, psi, theta, nu, alpha = mats
    eta = rng.multivariate_normal(alpha, psi, size=n)
    eps = rng.multivariate_normal(np.zeros(theta.shape[0]), theta, size=n)
    return eta, nu + eta @ lam.T + eps


def test_regression_scores_correlate_at_determinacy():
    # Grice (2001): corr(regression score, factor) = determinacy sqrt(diag(Phi L' S^-1 L Phi)/diag(Phi))
    rng = np.random.default_rng(11)
    mats = _population()
    eta, x = _simulate(mats, 40000, rng)
    s = score_cases(mats, x, method="regression")
    rho, val = determinacy(mats, method="regression")
    assert np.allclose(rho, val)
    for f in range(2):
        r = np.corrcoef(s[:, f], eta[:, f])[0, 1]
        assert r == pytest.approx(rho[f], abs=0.01)
    # the regression score is the conditional mean: its mean equals the factor mean
    assert s.mean(axis=0) == pytest.approx(mats[5], abs=0.02)


def test_bartlett_scores_conditionally_unbiased():
    # Bartlett (1937): E[score | eta] = eta; check in narrow bins of the true value
    rng = np.random.default_rng(12)
    mats = _population()
    eta, x = _simulate(mats, 60000, rng)
    s = score_cases(mats, x, method="bartlett")
    r = score_cases(mats, x, method="regression")
    for f in range(2):
        for c in (-1.0, 0.3, 1.5):
            sel = np.abs(eta[:, f] - c) < 0.05
            assert sel.sum() > 300
            assert s[sel, f].mean() == pytest.approx(c, abs=0.06)
        # regression scores are shrunk: at a high true value they fall short of it
        sel = np.abs(eta[:, f] - 2.0) < 0.05
        assert r[sel, f].mean() < 2.0 - 0.1
    # validity of Bartlett scores: model-implied correlation with the factor, checked empirically
    _, val = determinacy(mats, method="bartlett")
    for f in range(2):
        assert np.corrcoef(s[:, f], eta[:, f])[0, 1] == pytest.approx(val[f], abs=0.01)


def test_second_order_bartlett_for_higher_order_factor():
    # the higher-order factor has no direct loadings: the one-factor Bartlett form with
    # l = cov(x, g) / var(g) is conditionally unbiased for g (Bartlett 1937 applied to x = mu + l g + e)
    rng = np.random.default_rng(13)
    lam = np.zeros((9, 4))
    for k in range(3):
        lam[3 * k : 3 * k + 3, k] = [0.8, 0.7, 0.6]
    beta = np.zeros((4, 4))
    beta[:3, 3] = [0.8, 0.7, 0.9]
    psi = np.diag([0.36, 0.51, 0.19, 1.0])
    theta = np.eye(9) * 0.4
    nu, alpha = np.zeros(9), np.zeros(4)
    mats = (lam, beta, psi, theta, nu, alpha)
    A = np.linalg.inv(np.eye(4) - beta)
    zeta = rng.multivariate_normal(np.zeros(4), psi, size=60000)
    eta = zeta @ A.T
    x = eta @ lam.T + rng.normal(scale=np.sqrt(0.4), size=(60000, 9))
    s = score_cases(mats, x, method="bartlett")
    for c in (-1.0, 1.0):
        sel = np.abs(eta[:, 3] - c) < 0.05
        assert s[sel, 3].mean() == pytest.approx(c, abs=0.08)
    rho, _ = determinacy(mats)
    r = score_cases(mats, x, method="regression")
    assert np.corrcoef(r[:, 3], eta[:, 3])[0, 1] == pytest.approx(rho[3], abs=0.01)


def _two_group_frame(rng):
    mats = _population()
    frames = []
    for gname, shift in (("north", 0.0), ("south", 0.5)):
        lam, beta, psi, theta, nu, alpha = mats
        _, x = _simulate((lam, beta, psi, theta, nu, alpha + shift), 400, rng)
        d = pd.DataFrame(x, columns=[f"q{k}" for k in range(1, 7)])
        d["site"] = gname
        frames.append(d)
    d = pd.concat(frames, ignore_index=True)
    d["case"] = [f"c{k:04d}" for k in range(len(d))]
    d.loc[[3, 500], "q2"] = np.nan
    return d


STRUCT = Structure(factors={"alpha": ("q1", "q2", "q3"), "beta": ("q4", "q5", "q6")})


def test_factor_scores_table_one_row_per_case_used(tmp_path):
    rng = np.random.default_rng(14)
    d = _two_group_frame(rng)
    res = fit_level(d, STRUCT, "scalar", group="site", incomplete="listwise")
    fs = factor_scores(res, d, group="site", method="bartlett", id="case")
    assert len(fs.table) == sum(res.group_n) == len(d) - 2
    assert list(fs.table.columns) == ["case", "group", "alpha", "beta"]
    assert "c0003" not in set(fs.table.case)
    assert fs.table.case.is_unique
    # scalar model: south mean shift of 0.5 is recovered by the Bartlett score means
    # (factor units are the north group's: variance 1 in the reference group)
    m = fs.table.groupby("group")[["alpha"]].mean()
    diff = m.loc["south", "alpha"] - m.loc["north", "alpha"]
    assert diff == pytest.approx(0.5, abs=0.2)  # planted shift; factor variance 1 in the reference group
    assert "scalar" in fs.statement
    d_ = fs.to_dict()
    assert set(d_["determinacy"]) == {"north", "south"}
    assert 0.7 < d_["determinacy"]["north"]["alpha"] < 1.0
    # incomplete cases scored from their observed items on request
    full = factor_scores(res, d, group="site", incomplete=True)
    assert len(full.table) == len(d) and full.id_column == "row"
    assert full.table.loc[3, ["alpha", "beta"]].notna().all()
    # scores.csv: one row per case used, read back unchanged
    path = tmp_path / "scores.csv"
    fs.to_csv(path)
    back = pd.read_csv(path)
    assert len(back) == len(fs.table) and list(back.columns) == list(fs.table.columns)
    assert np.allclose(back.alpha, fs.table.alpha)
    # a case id that a spreadsheet would run as a formula is written as text (the escaping
    # of every CSV the tool writes; OWASP "CSV injection" guidance: prefix a quote)
    d.loc[0, "case"] = "=1+2"
    risky = factor_scores(res, d, group="site", method="bartlett", id="case")
    risky.to_csv(path)
    assert pd.read_csv(path, dtype={"case": str}).case.iloc[0] == "'=1+2"


def test_partial_model_statement_and_errors():
    rng = np.random.default_rng(15)
    d = _two_group_frame(rng)
    res = fit_level(d, STRUCT, "scalar", group="site", released=[Release("intercept", "q3")])
    fs = factor_scores(res, d, group="site")
    assert "partial" in fs.statement and "intercept of q3" in fs.statement
    bad = list(_population())
    bad[3] = np.diag([0.5, -0.1, 0.7, 0.4, 0.8, 0.5])
    with pytest.raises(EstimationError, match="positive residual variances"):
        score_cases(bad, np.zeros((2, 6)), method="bartlett")
    with pytest.raises(SpecificationError, match="score method"):
        factor_scores(res, d, group="site", method="mean")
    with pytest.raises(SpecificationError, match="name the grouping column"):
        factor_scores(res, d)
    d2 = d.copy()
    d2.loc[1, "case"] = d2.loc[0, "case"]
    with pytest.raises(DataError, match="repeats the value"):
        factor_scores(res, d2, group="site", id="case")


def test_bifactor_scores_unbiased_and_determinacy():
    # Bartlett (1937) with a general factor over all items and three orthogonal specifics;
    # Grice (2001) determinacy as the correlation of regression scores with the factor
    rng = np.random.default_rng(16)
    p, m = 9, 4
    lam = np.zeros((p, m))
    lam[:, 0] = 0.6
    for k in range(3):
        lam[3 * k : 3 * k + 3, k + 1] = [0.5, 0.4, 0.6]
    mats = (lam, np.zeros((m, m)), np.eye(m), np.eye(p) * 0.4, np.zeros(p), np.zeros(m))
    eta = rng.normal(size=(40000, m))
    x = eta @ lam.T + rng.normal(scale=np.sqrt(0.4), size=(40000, p))
    s = score_cases(mats, x, method="bartlett")
    sel = np.abs(eta[:, 0] - 1.0) < 0.05
    assert s[sel, 0].mean() == pytest.approx(1.0, abs=0.06)
    rho, _ = determinacy(mats)
    r = score_cases(mats, x, method="regression")
    for f in range(m):
        assert np.corrcoef(r[:, f], eta[:, f])[0, 1] == pytest.approx(rho[f], abs=0.015)


def test_regression_scores_against_semopy():
    # semopy 2.3 Model.predict_factors (MAP: (L'T^-1 L + Phi^-1)^-1 L'T^-1 x, which is the
    # regression method by the Woodbury identity). semopy fixes first loadings at 1, so the
    # scores differ by a scale per factor: compare by correlation.
    import semopy

    hs = semopy.examples.holzinger39.get_data()
    m = semopy.Model("visual =~ x1 + x2 + x3\ntextual =~ x4 + x5 + x6\nspeed =~ x7 + x8 + x9")
    m.fit(hs)
    ref = m.predict_factors(hs)
    st = Structure(factors={"visual": ("x1", "x2", "x3"), "textual": ("x4", "x5", "x6"), "speed": ("x7", "x8", "x9")})
    mine = factor_scores(fit_level(hs, st), hs, method="regression").table
    for f in ("visual", "textual", "speed"):
        assert np.corrcoef(mine[f], ref[f])[0, 1] > 0.9999
    bart = factor_scores(fit_level(hs, st), hs, method="bartlett").table
    assert np.corrcoef(bart["visual"], ref["visual"])[0, 1] < 0.999  # a different method, not a copy


def test_woodbury_form_of_regression_weights():
    # Phi L' Sigma^-1 = (L' Theta^-1 L + Phi^-1)^-1 L' Theta^-1 (Woodbury identity)
    from invariance.effects.scores import score_weights

    lam, beta, psi, theta, nu, alpha = _population()
    sigma = lam @ psi @ lam.T + theta
    W = score_weights(lam, theta, psi, sigma, method="regression")
    Ti = np.linalg.inv(theta)
    alt = np.linalg.solve(lam.T @ Ti @ lam + np.linalg.inv(psi), lam.T @ Ti)
    assert np.allclose(W, alt)
