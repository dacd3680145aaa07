"""Little's (1988) MCAR test and the EM saturated estimates it uses.

Reference values are computed in the test from closed forms: for a bivariate monotone
pattern (x1 always observed, x2 sometimes) the ML estimates factor into the marginal of
x1 and the regression of x2 on x1 (Anderson 1957; Little & Rubin 2002, section 7.2),
and Little's statistic is then the sum over the two patterns written out by hand.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats as sst

from invariance.data import SampleStats, em_saturated, little_mcar, missing_report, stats_from_arrays


def _monotone(seed=4, n=40, m=25):
    rng = np.random.default_rng(seed)
    x = rng.multivariate_normal([1.0, 2.0], [[1.0, 0.6], [0.6, 2.0]], size=n)
    x[m:, 1] = np.nan
    return x, m


def _closed_form(x, m):
    """Anderson (1957) factored-likelihood ML estimates for the monotone pattern."""
    n = x.shape[0]
    mu1 = x[:, 0].mean()
    s11 = x[:, 0].var()                      # divisor n
    xc = x[:m]
    b = np.cov(xc.T, bias=True)
    beta = b[0, 1] / b[0, 0]
    alpha = xc[:, 1].mean() - beta * xc[:, 0].mean()
    s22_1 = b[1, 1] - beta**2 * b[0, 0]
    mu = np.array([mu1, alpha + beta * mu1])
    cov = np.array([[s11, beta * s11], [beta * s11, s22_1 + beta**2 * s11]])
    return mu, cov


def test_em_matches_factored_likelihood_closed_form():
    x, m = _monotone()
    mu, cov = _closed_form(x, m)
    em = em_saturated(x)
    assert em.converged
    assert np.allclose(em.mean, mu, atol=1e-8)
    assert np.allclose(em.cov, cov, atol=1e-8)


def _little_by_hand(x, m):
    """Little's (1988) statistic of the two monotone patterns written out."""
    n = x.shape[0]
    mu, cov = _closed_form(x, m)
    # pattern 1: both items, m cases; pattern 2: x1 only, n - m cases
    d1 = x[:m].mean(axis=0) - mu
    d2 = x[m:, 0].mean() - mu[0]
    return m * d1 @ np.linalg.solve(cov, d1) + (n - m) * d2**2 / cov[0, 0]


def test_little_statistic_against_the_formula_worked_by_hand():
    x, m = _monotone()
    n = x.shape[0]
    stat = _little_by_hand(x, m)
    df = (2 + 1) - 2   # sum of observed items over patterns minus p (Little 1988)
    res = little_mcar(x)
    assert res.statistic == pytest.approx(stat, rel=1e-7)
    assert res.df == df == 1
    assert res.pvalue == pytest.approx(sst.chi2.sf(stat, 1), rel=1e-6)
    assert res.n_patterns == 2 and res.n == n


def test_little_complete_data_and_all_missing_rows():
    rng = np.random.default_rng(0)
    x = rng.standard_normal((30, 3))
    r = little_mcar(x)
    assert r.statistic == pytest.approx(0.0, abs=1e-20) and r.df == 0 and np.isnan(r.pvalue)
    x[0] = np.nan  # a row with nothing observed carries no information and is ignored
    x[1:10, 2] = np.nan
    assert little_mcar(x).n == 29


def test_little_detects_missingness_that_depends_on_values():
    # x2 deleted whenever x1 is above its median: the complete cases have a lower x1 mean,
    # which Little's test must flag (strongly, with n = 400)
    rng = np.random.default_rng(12)
    x = rng.multivariate_normal([0, 0, 0], np.eye(3) + 0.5, size=400)
    x[x[:, 0] > np.median(x[:, 0]), 1] = np.nan
    assert little_mcar(x).pvalue < 1e-6
    # the same amount deleted completely at random is not flagged at alpha .001
    y = rng.multivariate_normal([0, 0, 0], np.eye(3) + 0.5, size=400)
    y[rng.permutation(400)[:200], 1] = np.nan
    assert little_mcar(y).pvalue > 1e-3


def test_little_test_kept_with_the_full_information_statistics():
    # the statistics of a group carry Little's test at their EM estimates: the same
    # hand-worked two-pattern statistic as above (Little 1988), with no second pass
    x, m = _monotone()
    n = x.shape[0]
    stat = _little_by_hand(x, m)
    g = stats_from_arrays([x], ["g"], ["a", "b"], missing="fiml").groups[0]
    assert g.missing.little.statistic == pytest.approx(stat, rel=1e-7)
    assert g.missing.little.df == 1 and g.missing.little.n == n
    assert missing_report(SampleStats(("a", "b"), (g,)))["g"]["little"] == g.missing.little.to_dict()
    # complete data: one pattern, no test
    assert stats_from_arrays([x[:m]], ["g"], ["a", "b"], missing="fiml").groups[0].missing.little is None
