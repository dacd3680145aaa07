"""The factored saturated likelihood behind EM (invariance.data.em_factored).

References written in the tests: the casewise normal log-likelihood of every case on its
observed items (scipy.stats.multivariate_normal.logpdf), the plain per-case E-step of
Little & Rubin (2002, section 11.2: conditional mean and covariance of the missing items
given the observed ones, written with numpy), and central finite differences for the
gradient and Hessian (common practice: agreement to about 1e-5 relative).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats as sst

from invariance.data.em import CACHE, em_saturated, pattern_moments
from invariance.data.em_factored import Factored


def _data(seed: int, n: int = 120, always: tuple = (0, 2), rate: float = 0.25) -> np.ndarray:
    rng = np.random.default_rng(seed)
    p = 5
    a = rng.normal(size=(p, p))
    x = rng.multivariate_normal(rng.normal(size=p), a @ a.T / p + np.eye(p), size=n)
    for j in range(p):
        if j not in always:
            x[rng.random(n) < rate, j] = np.nan
    return x[~np.isnan(x).all(axis=1)]


def _point(x: np.ndarray, seed: int = 1):
    """A mean and covariance away from the optimum (positive definite)."""
    rng = np.random.default_rng(seed)
    p = x.shape[1]
    b = rng.normal(size=(p, p))
    return np.nanmean(x, axis=0) + 0.1 * rng.normal(size=p), np.cov(np.nan_to_num(x).T) + b @ b.T / p


def _casewise(x, mean, cov) -> float:
    tot = 0.0
    for row in x:
        o = ~np.isnan(row)
        tot += sst.multivariate_normal(mean[o], cov[np.ix_(o, o)]).logpdf(row[o])
    return tot


def _plain_em_update(x, mean, cov):
    """Little & Rubin (2002, 11.2): fill each case's missing items by their conditional
    mean given its observed items, add the conditional covariance, average."""
    n, p = x.shape
    s1, s2 = np.zeros(p), np.zeros((p, p))
    for row in x:
        o = ~np.isnan(row)
        m = ~o
        xh = row.copy()
        c = np.zeros((p, p))
        if m.any():
            b = cov[np.ix_(m, o)] @ np.linalg.inv(cov[np.ix_(o, o)])
            xh[m] = mean[m] + b @ (row[o] - mean[o])
            c[np.ix_(m, m)] = cov[np.ix_(m, m)] - b @ cov[np.ix_(o, m)]
        s1 += xh
        s2 += np.outer(xh, xh) + c
    mu = s1 / n
    return mu, s2 / n - np.outer(mu, mu)


def _fac(x):
    CACHE.clear()
    return Factored.of(pattern_moments(x))


@pytest.mark.parametrize("always", [(0, 2), ()])
def test_factored_loglik_and_em_update_equal_the_casewise_formulas(always):
    x = _data(3, always=always)
    fac = _fac(x)
    assert fac.a == len(always)
    mean, cov = _point(x)
    th = fac.regression(mean, cov)
    m0, c0 = fac.moments(*th)
    # the moments of A are the sample ones (numpy, divisor n); the regression of the
    # other items on A is the one of (mean, cov)
    a = list(always)
    assert np.allclose(m0[a], x[:, a].mean(axis=0)) and np.allclose(c0[np.ix_(a, a)], np.cov(x[:, a].T, bias=True))
    for u, v in zip(th, fac.regression(m0, c0)):
        assert np.allclose(u, v, rtol=1e-12, atol=1e-12)
    pt = fac.evaluate(*th)
    assert pt.ll == pytest.approx(_casewise(x, m0, c0), rel=1e-11)
    mu, sig = _plain_em_update(x, m0, c0)
    m1, c1 = fac.moments(*pt.update)
    assert np.allclose(m1, mu, rtol=1e-10, atol=1e-12) and np.allclose(c1, sig, rtol=1e-10, atol=1e-12)


def _vech(z):
    return z[np.triu_indices(z.shape[0])]


def _unvech(v, r):
    z = np.zeros((r, r))
    z[np.triu_indices(r)] = v
    return z + np.triu(z, 1).T


@pytest.mark.parametrize("always", [(0, 2), ()])
def test_newton_derivatives_against_finite_differences(always):
    x = _data(5, always=always)
    fac = _fac(x)
    beta, z = fac.regression(*_point(x, 2))
    q, r = beta.shape
    theta = np.concatenate([beta.ravel(), _vech(z)])

    def at(t):
        return t[: q * r].reshape(q, r), _unvech(t[q * r:], r)

    grad, hess = fac.derivatives(fac.evaluate(beta, z))
    h = 1e-5
    fd_g, fd_h = np.empty_like(grad), np.empty_like(hess)
    for i in range(theta.size):
        e = np.zeros_like(theta)
        e[i] = h
        fd_g[i] = (fac.evaluate(*at(theta + e)).ll - fac.evaluate(*at(theta - e)).ll) / (2 * h)
        gp = fac.derivatives(fac.evaluate(*at(theta + e)))[0]
        gm = fac.derivatives(fac.evaluate(*at(theta - e)))[0]
        fd_h[:, i] = (gp - gm) / (2 * h)
    scale = np.abs(fd_h).max()
    assert np.allclose(grad, fd_g, rtol=1e-5, atol=1e-5 * np.abs(fd_g).max())
    assert np.allclose(hess, fd_h, rtol=1e-5, atol=1e-6 * scale)
    assert np.allclose(hess, hess.T, atol=1e-9 * scale)


@pytest.mark.parametrize("always", [(0, 2), ()])
def test_em_with_newton_steps_reaches_the_stationary_point(always):
    # zero score of the casewise scipy log-likelihood at the EM estimates, and the same
    # point as many plain EM updates (the per-case formulas above) from the EM answer's
    # neighbourhood: both are independent of the factored code
    x = _data(7, n=90, always=always)
    CACHE.clear()
    em = em_saturated(x)
    assert em.converged
    assert em.loglik == pytest.approx(_casewise(x, em.mean, em.cov), rel=1e-11)
    mu, sig = em.mean, em.cov
    for _ in range(3):
        mu, sig = _plain_em_update(x, mu, sig)
    sd = np.sqrt(np.diag(em.cov))
    assert np.abs(mu - em.mean).max() / sd.min() < 1e-8
    assert np.abs(sig - em.cov).max() / sd.min() ** 2 < 1e-8
    h = 1e-5
    p = x.shape[1]
    for j in range(p):
        e = np.zeros(p)
        e[j] = h
        assert abs(_casewise(x, em.mean + e, em.cov) - _casewise(x, em.mean - e, em.cov)) / (2 * h) < 1e-4
        E = np.zeros((p, p))
        E[j, (j + 1) % p] = E[(j + 1) % p, j] = h
        assert abs(_casewise(x, em.mean, em.cov + E) - _casewise(x, em.mean, em.cov - E)) / (2 * h) < 1e-4


def test_complete_data_gives_the_sample_moments():
    rng = np.random.default_rng(2)
    x = rng.normal(size=(60, 4)) @ rng.normal(size=(4, 4))
    CACHE.clear()
    em = em_saturated(x)
    # numpy mean and covariance with divisor n; scipy log-likelihood of the rows
    assert np.allclose(em.mean, x.mean(axis=0), rtol=1e-12)
    assert np.allclose(em.cov, np.cov(x.T, bias=True), rtol=1e-12)
    assert em.loglik == pytest.approx(sst.multivariate_normal(em.mean, em.cov).logpdf(x).sum(), rel=1e-12)
