"""Thresholds, polychoric correlations and their asymptotic covariance.

References: scipy.stats.multivariate_normal.cdf (bivariate CDF and exact cell
probabilities); the plain cell-by-cell pairwise ML and numerical sandwich in
tests/polychoric_reference.py (Olsson 1979; Muthen 1984); a Monte Carlo check of the
standard error.
"""

import os
import sys

import numpy as np
import pytest
from scipy.special import ndtri
from scipy.stats import multivariate_normal, norm

sys.path.insert(0, os.path.dirname(__file__))
from polychoric_reference import ref_cell_probs, ref_polychoric, ref_rho  # noqa: E402

from invariance.data.bivariate import bvn_cdf, bvn_pdf
from invariance.data.polychoric import cell_probabilities, polychoric, polychoric_pairs


def _codes(rng, R, cuts, n):
    z = rng.multivariate_normal(np.zeros(R.shape[0]), R, size=n)
    return np.stack([(z[:, i, None] > np.asarray(c)[None, :]).sum(1) for i, c in enumerate(cuts)], 1)


def test_bvn_cdf_matches_scipy_on_grid():
    # scipy.stats.multivariate_normal.cdf as the reference, |rho| up to .999 (both branches)
    hs = np.array([-3.1, -1.7, -0.6, 0.0, 0.45, 1.3, 2.6])
    rhos = np.array([-0.999, -0.96, -0.93, -0.7, -0.2, 0.0, 0.3, 0.8, 0.924, 0.926, 0.97, 0.999])
    H, Kk, Rr = np.meshgrid(hs, hs, rhos, indexing="ij")
    ours = bvn_cdf(H, Kk, Rr)
    ref = np.empty(H.shape)
    for idx in np.ndindex(H.shape):
        r = Rr[idx]
        ref[idx] = multivariate_normal(mean=[0, 0], cov=[[1, r], [r, 1]]).cdf([H[idx], Kk[idx]])
    assert np.max(np.abs(ours - ref)) < 1e-7


def test_bvn_limits_and_density():
    # infinite limits reduce to the univariate normal
    assert bvn_cdf(np.inf, 0.3, 0.5) == pytest.approx(norm.cdf(0.3), abs=1e-12)
    assert bvn_cdf(-np.inf, 0.3, 0.5) == pytest.approx(0.0, abs=1e-12)
    # Plackett (1954): dPhi2/drho = phi2; central differences
    h, k, r, e = 0.4, -0.7, 0.35, 1e-5
    fd = (bvn_cdf(h, k, r + e) - bvn_cdf(h, k, r - e)) / (2 * e)
    assert float(fd) == pytest.approx(float(bvn_pdf(h, k, r)), rel=1e-6)


@pytest.mark.parametrize("rho", [-0.45, 0.3, 0.72, 0.95])
def test_expected_counts_recover_rho(rho):
    # exact expected cell counts of a known bivariate normal (scipy cell probabilities)
    ti = np.array([-1.1, -0.2, 0.6, 1.5])
    tj = np.array([-0.8, 0.3, 1.2])
    N = 1000.0
    table = N * ref_cell_probs(ti, tj, rho)
    # thresholds from the table's own marginals equal the known ones
    cum_i = np.cumsum(table.sum(1))[:-1] / N
    cum_j = np.cumsum(table.sum(0))[:-1] / N
    np.testing.assert_allclose(ndtri(cum_i), ti, atol=1e-10)
    lim_i = np.r_[-10.0, ndtri(cum_i), 10.0][None, :]
    lim_j = np.r_[-10.0, ndtri(cum_j), 10.0, 10.0][None, :]   # padded to Kmax = 5
    tab5 = np.zeros((1, 5, 5))
    tab5[0, :, :4] = table
    r, _ = polychoric_pairs(tab5, lim_i, lim_j)
    assert r[0] == pytest.approx(rho, abs=1e-4)
    assert abs(r[0] - rho) < 1e-7


def test_casewise_expected_counts_recover_rho():
    # casewise data whose cells are the rounded expected counts (N = 200000)
    ti, tj, rho = np.array([-0.9, 0.1, 0.9]), np.array([-1.3, -0.4, 0.5, 1.4]), 0.55
    cnt = np.round(200000 * ref_cell_probs(ti, tj, rho)).astype(int)
    a, b = np.meshgrid(np.arange(4), np.arange(5), indexing="ij")
    codes = np.stack([np.repeat(a.ravel(), cnt.ravel()), np.repeat(b.ravel(), cnt.ravel())], 1)
    fit = polychoric(codes, [4, 5])
    assert fit.corr[0, 1] == pytest.approx(rho, abs=1e-4)
    np.testing.assert_allclose(fit.thresholds[0, :3], ti, atol=1e-3)


def test_agrees_with_cell_by_cell_reference():
    rng = np.random.default_rng(20261201)
    R = np.array([[1, .6, .3, .5], [.6, 1, .2, .4], [.3, .2, 1, .35], [.5, .4, .35, 1.]])
    cuts = [[-1.0, 0.0, 1.0], [-0.5, 0.7], [-1.4, -0.6, 0.2, 1.1], [0.3]]
    codes = _codes(rng, R, cuts, 600)
    K = np.array([4, 3, 5, 2])
    fit = polychoric(codes, K)
    taus, rhos, if_t, infl = ref_polychoric(codes, K)
    np.testing.assert_allclose(fit.stats[: fit.n_thresholds], np.concatenate(taus), atol=1e-12)
    i, j = fit.pairs
    ours = fit.corr[i, j]
    ref = np.array([rhos[(a, b)] for a, b in zip(i, j)])
    np.testing.assert_allclose(ours, ref, atol=1e-4)
    # asymptotic covariance from the reference's numerical sandwich
    ref_if = np.concatenate([if_t, np.stack([infl[(a, b)] for a, b in zip(i, j)], 1)], 1)
    ref_acov = ref_if.T @ ref_if / codes.shape[0] ** 2
    np.testing.assert_allclose(fit.acov, ref_acov, rtol=2e-3, atol=1e-7)


def test_standard_error_monte_carlo():
    # Monte Carlo: the ACOV standard error of rho matches the spread of the estimates
    rng = np.random.default_rng(7)
    R = np.array([[1.0, 0.5], [0.5, 1.0]])
    cuts = [[-0.8, 0.2, 1.0], [-1.0, -0.1, 0.9, 1.6]]
    est, se = [], []
    for _ in range(300):
        f = polychoric(_codes(rng, R, cuts, 400), [4, 5])
        est.append(f.stats[-1])
        se.append(np.sqrt(f.acov[-1, -1]))
    assert np.std(est) == pytest.approx(np.mean(se), rel=0.12)
    assert np.mean(est) == pytest.approx(0.5, abs=0.01)


def test_boundary_correlation_stops_and_warns():
    # two copies of one item: the pairwise ML sits at the boundary; a warning names the pair
    import warnings

    from invariance.errors import ImproperSolutionWarning
    from invariance.data.ordinal_stats import ordinal_stats_from_arrays

    rng = np.random.default_rng(1)
    z = rng.normal(size=(500, 2))
    x = np.digitize(z, [-0.5, 0.5])
    arr = np.column_stack([x[:, 0], x[:, 0], x[:, 1]])
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        st = ordinal_stats_from_arrays([arr], ["g"], ["a", "b", "c"])
    assert st.fits[0].corr[0, 1] > 0.999
    assert any(issubclass(w.category, ImproperSolutionWarning) and "a and b" in str(w.message) for w in rec)
