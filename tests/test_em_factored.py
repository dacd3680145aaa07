"""The factored saturated likelihood behind EM (invariance.data.em_factored).

References written in the tests: the casewise normal log-likelihood of every case on its
observed items (scipy.stats.multivariate_normal.logpdf), the plain per-case E-step of
Little & Rubin (2002, section 11.2: conditional mean and covariance of the missing items
given the observed ones, written with numpy), and central finite differences for the
gradient and Hessian (common practice: agreement to about 1e-5 relative).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import stats as sst

from invariance.data.em import em_saturated
from invariance.data.patterns import CACHE, pattern_moments
from invariance.data.moments import stats_from_arrays
from invariance.errors import DataError
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


_NAN = np.nan
#: 21 cases, 5 items, about 40% missing on three of them (a seeded draw of a random normal
#: model, rounded): too few cases observe the first three items together
_DEGENERATE = np.array([
    [_NAN, -2.15, -0.27, 2.41, -1.0], [-3.81, 1.25, _NAN, 0.55, -0.44], [-0.92, _NAN, -0.94, -1.72, 0.28],
    [-2.45, _NAN, _NAN, 0.9, -1.77], [0.51, 1.35, -1.06, -0.21, -0.02], [_NAN, -3.49, -1.51, 1.86, -0.8],
    [0.38, _NAN, -2.59, -0.64, 0.83], [-2.04, _NAN, -1.37, 0.05, -1.33], [_NAN, -2.25, -2.29, 0.02, -1.33],
    [-0.59, -0.49, _NAN, -1.18, -0.01], [_NAN, _NAN, -1.25, 0.26, -0.78], [_NAN, _NAN, _NAN, -0.12, -0.24],
    [-2.29, _NAN, -3.11, -2.59, -1.45], [_NAN, -1.97, _NAN, -1.07, -0.62], [_NAN, -2.3, _NAN, 1.5, -2.6],
    [-3.1, -0.03, _NAN, 0.8, 1.83], [-2.28, -4.3, -0.4, 1.09, -2.6], [_NAN, _NAN, _NAN, -1.33, -1.57],
    [_NAN, -1.13, _NAN, 0.44, -1.39], [-0.92, _NAN, _NAN, -1.82, 0.08], [-1.28, _NAN, _NAN, 0.35, -0.14],
])


def test_iterates_running_to_a_singular_covariance_are_refused_in_one_line():
    # the saturated ML estimate of these data is singular: the EM iterates approach a
    # covariance with a zero eigenvalue until an update is no longer positive definite.
    # EM says so (LinAlgError, as the pattern blocks do), and the statistics turn it into
    # the one-line data error that names the cause, never a traceback or a NaN warning
    CACHE.clear()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(np.linalg.LinAlgError):
            em_saturated(_DEGENERATE)
        CACHE.clear()
        with pytest.raises(DataError, match="saturated model of group 'g' cannot be estimated") as exc:
            stats_from_arrays([_DEGENERATE], ["g"], list("abcde"), missing="fiml")
    assert "\n" not in str(exc.value)
