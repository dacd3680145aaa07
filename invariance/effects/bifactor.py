"""Reliability and dimensionality indices per group, from the standardized solution.

METHODS section 10 (Rodriguez, Reise & Haviland 2016; Reise 2012). With standardized
general loadings g_i, specific loadings s_i (item i on its specific factor) and residual
variances t_i:

- omega   = [(sum g)^2 + sum_s (sum_{i in s} s_i)^2] / [that + sum t]
- omegaH  = (sum g)^2 / same denominator
- omegaS (subscale s)  = [(sum_{i in s} g_i)^2 + (sum_{i in s} s_i)^2] / [that + sum_{i in s} t_i]
- omegaHS (subscale s) = (sum_{i in s} s_i)^2 / same denominator
- ECV (general)  = sum g^2 / (sum g^2 + sum_s sum s^2); ECV of a specific factor is its
  share sum_{i in s} s_i^2 of that same total common variance (the ECVs add up to 1);
  ``ecv_subscale`` is the specific share of the common variance of the subscale's items.
- PUC = 1 - [sum_s n_s(n_s - 1)/2] / [n(n - 1)/2]
- H = 1 / (1 + 1 / sum[l^2 / (1 - l^2)]) per factor (Hancock & Mueller 2001)
- factor determinacy = sqrt(diag(Phi Lambda' Sigma^-1 Lambda Phi)) (Grice 2001)

Common practice: ECV and PUC above .70 suggest an essentially unidimensional scale;
omegaH above .80; H above .70. For the other families: omega per factor (the factor's
items, its loadings); for second-order models also omega hierarchical of the higher-order
factor through the products of first- and second-order loadings.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..model.structure import Structure
from ..estimate.result import FitResult, standardize

__all__ = [
    "omega",
    "coefficient_alpha",
    "construct_reliability",
    "determinacy",
    "bifactor_kernel",
    "GroupQuality",
    "quality_indices",
]


def omega(loadings: np.ndarray, residuals: np.ndarray) -> float:
    """Omega of a unidimensional sum: (sum l)^2 / ((sum l)^2 + sum t)."""
    a = float(np.sum(loadings)) ** 2
    return a / (a + float(np.sum(residuals)))


def coefficient_alpha(cov: np.ndarray) -> float:
    """Coefficient alpha of a covariance matrix: k/(k-1) (1 - tr C / 1'C1) (Cronbach 1951)."""
    cov = np.asarray(cov, float)
    k = cov.shape[0]
    return float(k / (k - 1) * (1.0 - np.trace(cov) / cov.sum()))


def construct_reliability(loadings: np.ndarray) -> float:
    """Coefficient H of standardized loadings (Hancock & Mueller 2001)."""
    l2 = np.asarray(loadings, float) ** 2
    l2 = l2[l2 > 0]
    if not l2.size:
        return float("nan")
    if np.any(l2 >= 1):
        return 1.0
    return float(1.0 / (1.0 + 1.0 / np.sum(l2 / (1.0 - l2))))


def determinacy(lam: np.ndarray, phi: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """Factor score determinacy sqrt(diag(Phi Lambda' Sigma^-1 Lambda Phi)) (Grice 2001);
    standardized inputs (factor correlations, implied item correlations)."""
    C = phi @ lam.T @ np.linalg.solve(sigma, lam @ phi)
    return np.sqrt(np.clip(np.diag(C), 0, None))


def bifactor_kernel(
    general: np.ndarray, specific: np.ndarray, residual: np.ndarray, membership: np.ndarray
) -> dict:
    """Bifactor indices from standardized arrays (pure function).

    Parameters
    ----------
    general
        General loadings (p,).
    specific
        Specific loadings (p,): each item's loading on its specific factor (0 if none).
    residual
        Residual variances (p,).
    membership
        Specific factor index of each item (p,), -1 for items with no specific factor.

    Returns
    -------
    dict
        ``omega``, ``omega_h``, ``ecv``, ``puc`` and per specific factor index a dict
        with ``omega_s``, ``omega_hs``, ``ecv``, ``ecv_subscale``.
    """
    g, s, t = (np.asarray(a, float) for a in (general, specific, residual))
    mem = np.asarray(membership)
    facs = [k for k in np.unique(mem) if k >= 0]
    spec_sums = sum(float(s[mem == k].sum()) ** 2 for k in facs)
    common = float(g.sum()) ** 2 + spec_sums
    denom = common + float(t.sum())
    total_sq = float((g**2).sum() + sum((s[mem == k] ** 2).sum() for k in facs))
    n = g.size
    pairs = sum(int((mem == k).sum()) * (int((mem == k).sum()) - 1) / 2 for k in facs)
    out = {
        "omega": common / denom,
        "omega_h": float(g.sum()) ** 2 / denom,
        "ecv": float((g**2).sum()) / total_sq,
        "puc": 1.0 - pairs / (n * (n - 1) / 2),
        "specific": {},
    }
    for k in facs:
        ix = mem == k
        a, b = float(g[ix].sum()) ** 2, float(s[ix].sum()) ** 2
        d = a + b + float(t[ix].sum())
        out["specific"][int(k)] = {
            "omega_s": (a + b) / d,
            "omega_hs": b / d,
            "ecv": float((s[ix] ** 2).sum()) / total_sq,
            "ecv_subscale": float((s[ix] ** 2).sum()) / float((g[ix] ** 2).sum() + (s[ix] ** 2).sum()),
        }
    return out


@dataclass(frozen=True)
class GroupQuality:
    """Quality indices of one group.

    ``overall`` holds model-level indices (bifactor: omega, omega_h, ecv, puc; second
    order: omega_h of the higher-order factor); ``factors`` maps each factor to its
    indices (omega or omega_s/omega_hs, ecv, H, determinacy).
    """

    group: str
    family: str
    overall: dict = field(default_factory=dict)
    factors: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {"group": self.group, "family": self.family, "overall": dict(self.overall),
                "factors": {k: dict(v) for k, v in self.factors.items()}}


def _one_group(fit: FitResult, g: int, structure: Structure) -> GroupQuality:
    spec = fit.spec
    lam, beta, psi, theta, nu, alpha = standardize(fit.matrices[g])
    mats = fit.matrices[g]
    A = np.linalg.inv(np.eye(mats[1].shape[0]) - mats[1])
    phi_raw = A @ mats[2] @ A.T
    sf = np.sqrt(np.clip(np.diag(phi_raw), 1e-300, None))
    phi = phi_raw / np.outer(sf, sf)
    sig_raw = mats[0] @ phi_raw @ mats[0].T + mats[3]
    sx = np.sqrt(np.diag(sig_raw))
    sig = sig_raw / np.outer(sx, sx)
    det = determinacy(lam, phi, sig)
    items = spec.items
    fx = {f: k for k, f in enumerate(spec.factors)}
    t = np.diag(theta)
    gname = spec.groups[g]
    factors: dict = {}
    overall: dict = {}
    if structure.family == "bifactor":
        G = fx[structure.general]
        names = list(structure.factors)
        mem = np.full(len(items), -1)
        spl = np.zeros(len(items))
        for k, f in enumerate(names):
            for it in structure.factors[f]:
                i = items.index(it)
                mem[i] = k
                spl[i] = lam[i, fx[f]]
        res = bifactor_kernel(lam[:, G], spl, t, mem)
        overall = {k: res[k] for k in ("omega", "omega_h", "ecv", "puc")}
        factors[structure.general] = {
            "ecv": res["ecv"], "H": construct_reliability(lam[:, G]), "determinacy": float(det[G])}
        for k, f in enumerate(names):
            r = res["specific"].get(k, {})
            ix = [items.index(i) for i in structure.factors[f]]
            factors[f] = {**r, "H": construct_reliability(lam[ix, fx[f]]), "determinacy": float(det[fx[f]])}
    else:
        for f, its in structure.measured_by.items():
            ix = [items.index(i) for i in its]
            l = lam[ix, fx[f]]
            factors[f] = {"omega": omega(l, t[ix]), "H": construct_reliability(l), "determinacy": float(det[fx[f]])}
        if structure.family == "second_order":
            # loadings of each item on the higher-order factor: first-order loading x
            # standardized second-order loading (Schmid-Leiman products)
            H = fx[structure.general]
            gl = np.zeros(len(items))
            for f, its in structure.factors.items():
                for it in its:
                    i = items.index(it)
                    gl[i] = lam[i, fx[f]] * beta[fx[f], H]
            total = float(np.sum(sig))
            overall = {"omega_h": float(gl.sum()) ** 2 / total,
                       "omega": 1.0 - float(t.sum()) / total}
            factors[structure.general] = {"H": construct_reliability(gl), "determinacy": float(det[H])}
    return GroupQuality(gname, structure.family, overall, factors)


def quality_indices(fit: FitResult, structure: Structure) -> tuple[GroupQuality, ...]:
    """Reliability and dimensionality indices of every group of a fitted model.

    Parameters
    ----------
    fit
        A fitted level (any level; the configural one describes each group freely).
    structure
        The measurement structure the model was built from.
    """
    return tuple(_one_group(fit, g, structure) for g in range(len(fit.groups)))
