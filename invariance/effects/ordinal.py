"""Effect sizes of noninvariance and bifactor quality for ordered items.

Pure functions of estimated matrices (theta parameterization, see
:mod:`invariance.ordinal.levels`). What is computed:

* :func:`dmacs_latent`: dMACS (Nye & Drasgow 2011; METHODS section 9) on the
  latent-response scale y*: sqrt((dnu + dlambda' alpha_F)^2 + dlambda' Phi_F dlambda)
  divided by the pooled SD of y* (sqrt Sigma_ii of each group, pooled with N_g - 1
  weights). It measures the loading and intercept part of the noninvariance and is
  complete only when the item's thresholds are equal across the two groups.
* :func:`dmacs_expected_score`: dMACS on the observed response scale, which also covers
  threshold differences: with E_g[x | eta] = sum_k Phi((nu_g + lambda_g' eta - tau_gk)
  / sqrt(theta_g)) the expected item score (categories coded 0 .. K - 1),
  sqrt(E_F[(E_R[x | eta] - E_F[x | eta])^2]) / SD_pooled(x), the expectation over the
  focal group's factor distribution N(alpha_F, Phi_F) by two-dimensional Gauss-Hermite
  quadrature over (lambda_R' eta, lambda_F' eta), and SD_pooled from the two groups'
  observed category proportions.
* :func:`bifactor_indices_latent`: omega, omegaH, ECV, PUC, H and the subscale omegas
  of METHODS section 10 from the standardized latent-response solution (Rodriguez,
  Reise & Haviland 2016 formulas applied to y*): these describe the reliability of the
  latent responses' sum, not of the observed sum score (which is lower).
"""

from __future__ import annotations

from typing import Mapping, Sequence

import numpy as np
from scipy.special import ndtr

from ..data.ordinal_stats import OrdinalStats
from ..estimate.result import FitResult

__all__ = ["dmacs_latent", "dmacs_expected_score", "category_sd", "bifactor_indices_latent", "ordinal_effects"]

_GH_X, _GH_W = np.polynomial.hermite_e.hermegauss(40)   # weight exp(-x^2/2)
_GH_W = _GH_W / _GH_W.sum()


def _pooled(sd_r: float, sd_f: float, n_r: float, n_f: float) -> float:
    return float(np.sqrt(((n_r - 1) * sd_r**2 + (n_f - 1) * sd_f**2) / (n_r + n_f - 2)))


def dmacs_latent(
    nu_r: float, lam_r: np.ndarray, nu_f: float, lam_f: np.ndarray, alpha_f: np.ndarray,
    phi_f: np.ndarray, *, sd_r: float, sd_f: float, n_r: float, n_f: float,
) -> float:
    """dMACS of one item on the latent-response scale (reference minus focal).

    Parameters
    ----------
    nu_r, lam_r, nu_f, lam_f
        Intercept and loadings (m,) of the item in the reference and focal groups.
    alpha_f, phi_f
        Focal factor means (m,) and total factor covariance (m, m).
    sd_r, sd_f, n_r, n_f
        Latent-response SDs (sqrt Sigma_ii) and group sizes.
    """
    dl = np.asarray(lam_r, float) - np.asarray(lam_f, float)
    dn = float(nu_r - nu_f)
    e2 = (dn + dl @ alpha_f) ** 2 + dl @ phi_f @ dl
    return float(np.sqrt(max(e2, 0.0)) / _pooled(sd_r, sd_f, n_r, n_f))


def category_sd(thresholds: np.ndarray) -> float:
    """SD of an item coded 0 .. K - 1 from its (standardized) thresholds."""
    t = np.asarray(thresholds, float)
    t = t[np.isfinite(t)]
    cum = np.r_[0.0, ndtr(t), 1.0]
    p = np.diff(cum)
    k = np.arange(p.size)
    m = p @ k
    return float(np.sqrt(p @ (k - m) ** 2))


def _expected_score(nu, a, theta, tau):
    tau = np.asarray(tau, float)
    tau = tau[np.isfinite(tau)]
    z = (nu + a[..., None] - tau) / np.sqrt(theta)
    return ndtr(z).sum(axis=-1)


def dmacs_expected_score(
    ref: Mapping[str, object], focal: Mapping[str, object], alpha_f: np.ndarray, phi_f: np.ndarray,
    *, sd_pooled: float,
) -> float:
    """dMACS of one item on the expected-score scale (covers threshold differences).

    Parameters
    ----------
    ref, focal
        Item parameters per group: ``nu`` (float), ``lam`` (m,), ``theta`` (unique
        variance), ``tau`` (thresholds on the latent-response scale).
    alpha_f, phi_f
        Focal factor means and total factor covariance.
    sd_pooled
        Pooled SD of the observed item (see :func:`category_sd`).
    """
    lr = np.asarray(ref["lam"], float)
    lf = np.asarray(focal["lam"], float)
    L = np.stack([lr, lf])                     # (2, m)
    mean = L @ alpha_f
    cov = L @ phi_f @ L.T
    w, v = np.linalg.eigh(cov)
    root = v * np.sqrt(np.clip(w, 0.0, None))  # cov = root root'
    z1, z2 = np.meshgrid(_GH_X, _GH_X, indexing="ij")
    wt = np.outer(_GH_W, _GH_W)
    pts = mean[:, None, None] + np.einsum("ij,jab->iab", root, np.stack([z1, z2]))
    er = _expected_score(float(ref["nu"]), pts[0], float(ref["theta"]), ref["tau"])
    ef = _expected_score(float(focal["nu"]), pts[1], float(focal["theta"]), focal["tau"])
    return float(np.sqrt(np.sum(wt * (er - ef) ** 2)) / sd_pooled)


def bifactor_indices_latent(
    loadings: np.ndarray, residuals: np.ndarray, *, general: int, specifics: Mapping[str, Sequence[int]],
) -> dict:
    """Bifactor indices from a standardized latent-response solution.

    Parameters
    ----------
    loadings
        Standardized loadings (p, m).
    residuals
        Standardized unique variances (p,).
    general
        Column of the general factor.
    specifics
        Specific factor name -> (column, item indices) as ``{name: [col, i1, i2, ...]}``.

    Returns
    -------
    dict
        ``omega``, ``omega_h``, ``ecv``, ``puc``, ``h_general`` and per specific factor
        ``omega_s``, ``omega_hs``, ``h``.
    """
    lam = np.asarray(loadings, float)
    th = np.asarray(residuals, float)
    p = lam.shape[0]
    lg = lam[:, general]
    spec_sum = 0.0
    spec_sq = 0.0
    per = {}
    sizes = []
    for name, (col, *its) in specifics.items():
        its = list(its)
        ls = lam[its, col]
        spec_sum += ls.sum() ** 2
        spec_sq += np.sum(ls**2)
        sizes.append(len(its))
        num_g = lg[its].sum() ** 2
        num_s = ls.sum() ** 2
        den = num_g + num_s + th[its].sum()
        per[name] = {
            "omega_s": float((num_g + num_s) / den),
            "omega_hs": float(num_s / den),
            "h": float(1.0 / (1.0 + 1.0 / np.sum(ls**2 / (1.0 - ls**2)))),
        }
    total = lg.sum() ** 2 + spec_sum
    den = total + th.sum()
    pairs = p * (p - 1) / 2
    within = sum(n * (n - 1) / 2 for n in sizes)
    return {
        "omega": float(total / den),
        "omega_h": float(lg.sum() ** 2 / den),
        "ecv": float(np.sum(lg**2) / (np.sum(lg**2) + spec_sq)),
        "puc": float(1.0 - within / pairs),
        "h_general": float(1.0 / (1.0 + 1.0 / np.sum(lg**2 / (1.0 - lg**2)))),
        "specific": per,
    }


def ordinal_effects(result: FitResult, stats: OrdinalStats, *, focal: str, reference: str | None = None) -> dict:
    """dMACS per item (latent-response and expected-score scales) and, for bifactor
    structures, latent-response bifactor indices per group.

    Parameters
    ----------
    result
        A DWLS fit of an ordinal level (usually scalar with its releases).
    stats
        The ordinal statistics it was fitted to.
    focal, reference
        The two groups compared (reference: the model's reference group by default).

    Returns
    -------
    dict
        ``dmacs``: item -> {``latent``, ``expected_score``}; ``bifactor``: group ->
        indices (only when the model has one factor loading on every item and others).
    """
    spec = result.spec
    if tuple(stats.items) != tuple(spec.items):
        stats = stats.reorder_items(spec.items)
    ref = reference or spec.reference
    gr, gf = spec.groups.index(ref), spec.groups.index(focal)
    mats = {g: result.matrices[g] for g in (gr, gf)}
    fits = {g: stats.fits[stats.names.index(spec.groups[g])] for g in (gr, gf)}
    lam_f, beta_f, psi_f, th_f, nu_f, al_f, tau_f = mats[gf]
    A = np.linalg.inv(np.eye(beta_f.shape[0]) - beta_f)
    phi_f = A @ psi_f @ A.T
    alpha_f = A @ al_f
    dm = {}
    for i, it in enumerate(spec.items):
        pr = {"nu": mats[gr][4][i], "lam": mats[gr][0][i], "theta": mats[gr][3][i, i], "tau": mats[gr][6][i]}
        pf = {"nu": nu_f[i], "lam": lam_f[i], "theta": th_f[i, i], "tau": tau_f[i]}
        nr, nf = fits[gr].n, fits[gf].n
        sd_lat = [np.sqrt(result.sigma[g][i, i]) for g in (gr, gf)]
        sd_obs = [category_sd(fits[g].thresholds[i]) for g in (gr, gf)]
        pooled = float(np.sqrt(((nr - 1) * sd_obs[0] ** 2 + (nf - 1) * sd_obs[1] ** 2) / (nr + nf - 2)))
        lat = dmacs_latent(pr["nu"], pr["lam"], pf["nu"], pf["lam"], alpha_f, phi_f,
                           sd_r=sd_lat[0], sd_f=sd_lat[1], n_r=nr, n_f=nf)
        if stats.n_categories[i] == 0:
            # a continuous item is its own response scale: the two versions coincide
            dm[it] = {"latent": lat, "expected_score": lat}
            continue
        dm[it] = {"latent": lat, "expected_score": dmacs_expected_score(pr, pf, alpha_f, phi_f, sd_pooled=pooled)}
    out = {"reference": ref, "focal": focal, "dmacs": dm}
    p = len(spec.items)
    lam0 = result.matrices[0][0]
    full = [c for c in range(lam0.shape[1]) if np.all(lam0[:, c] != 0)]
    if len(full) == 1 and lam0.shape[1] > 1:
        gcol = full[0]
        bif = {}
        for g, gname in enumerate(spec.groups):
            std = result.standardized(gname)
            L, T = std["lambda"], np.diag(std["theta"])
            specifics = {spec.factors[c]: [c, *np.flatnonzero(L[:, c] != 0).tolist()]
                         for c in range(L.shape[1]) if c != gcol and np.any(L[:, c] != 0)}
            bif[gname] = bifactor_indices_latent(L, T, general=gcol, specifics=specifics)
        out["bifactor"] = bif
    return out
