"""Diagonally weighted least squares for ordered items (METHODS section 7).

Per group g the observed statistics s_g are the thresholds and polychoric correlations
(:mod:`invariance.ordinal.polychoric`) and V_g their asymptotic covariance. The
model implies, from the latent-response matrices and the thresholds tau,

    thresholds   (tau_ik - mu_i) / sigma_i,      sigma_i = sqrt(Sigma_ii)
    correlations Sigma_ij / (sigma_i sigma_j)

and the estimator minimizes T = sum_g (s_g - sigma_g)' D_g^-1 (s_g - sigma_g) with
D_g = diag(V_g). :class:`DWLSObjective` has the interface of
:class:`~invariance.estimate.objective.MLObjective`, so
:func:`~invariance.estimate.optimize.minimize` (Gauss-Newton / Fisher scoring with the
information 2 Delta' D^-1 Delta) serves it. Robust statistics are in
:mod:`invariance.estimate.dwls_robust`.
"""

from __future__ import annotations

import numpy as np

from ..model.spec import ALPHA, LAMBDA, NU, PSI, TAU, THETA, ModelSpec
from ..data.ordinal_stats import OrdinalStats
from .kernels import compile_spec, group_matrices, implied_moments, moment_jacobian
from .linalg import partition
from .start import _group_starts, pool_starts

__all__ = ["DWLSObjective", "ordinal_start_values", "start_from"]


class DWLSObjective:
    """DWLS discrepancy of a multi-group ordinal model.

    Parameters
    ----------
    spec
        An ordinal model (threshold entries, see
        :func:`invariance.ordinal.levels.build_ordinal_level`).
    stats
        Ordinal statistics, groups and items in the order of ``spec``.
    targets
        Replacement statistic vectors per group (used to evaluate a model at another
        model's implied statistics); the observed ones by default.
    """

    def __init__(self, spec: ModelSpec, stats: OrdinalStats, *, targets=None) -> None:
        self.spec = spec
        self.stats = stats
        self.layouts = compile_spec(spec)
        self.n_params = spec.n_params
        #: shared vs group-local parameters: the information is arrow-shaped
        self.partition = partition([lay.params for lay in self.layouts], self.n_params)
        self.n = stats.n
        p = len(spec.items)
        self.K = stats.n_categories
        self.kmax = max(int(self.K.max()), 2)
        self.valid = np.arange(self.kmax - 1)[None, :] < (self.K - 1)[:, None]
        #: continuous items of a mixed set (K = 0): their means and variances are observed
        self.cont = self.K == 0
        self.pairs = np.triu_indices(p, 1)
        self.s = [np.asarray(f.stats, float) for f in stats.fits] if targets is None else [np.asarray(t, float) for t in targets]
        self.V = [f.acov for f in stats.fits]
        self.w = [1.0 / np.diag(v) for v in self.V]
        # threshold entries of each group: (entry positions in the layout, rows, cols)
        self._tau = []
        for g, lay in enumerate(self.layouts):
            idx = spec.group_entries(g)
            fixed = idx[(spec.matrix[idx] == TAU) & ~spec.free[idx]]
            base = np.full((p, self.kmax - 1), np.nan)
            base[spec.row[fixed], spec.col[fixed]] = spec.value[fixed]
            pos = np.flatnonzero(lay.ent_mat == TAU)
            self._tau.append((base, pos, lay.ent_row[pos], lay.ent_col[pos], lay.ent_param[pos]))

    # ------------------------------------------------------------ implied values
    def tau_matrix(self, g: int, theta: np.ndarray) -> np.ndarray:
        """Thresholds (p, Kmax - 1) of group ``g`` on the latent-response scale."""
        base, pos, r, c, par = self._tau[g]
        out = base.copy()
        out[r, c] = theta[par]
        return out

    def matrices(self, g: int, theta: np.ndarray) -> tuple[np.ndarray, ...]:
        """The six matrices plus the thresholds of group ``g``."""
        return group_matrices(self.layouts[g], theta) + (self.tau_matrix(g, theta),)

    def _implied(self, g, theta, jac: bool):
        lay = self.layouts[g]
        mats = group_matrices(lay, theta)
        sigma, mu, G, A = implied_moments(mats)
        d = np.diag(sigma)
        if np.any(d <= 0):
            raise np.linalg.LinAlgError("latent response variance not positive")
        sd = np.sqrt(d)
        tau = self.tau_matrix(g, theta)
        i, j = self.pairs
        thr = (tau - mu[:, None]) / sd[:, None]
        corr = sigma[i, j] / (sd[i] * sd[j])
        c = self.cont
        implied = np.concatenate([thr[self.valid], mu[c], d[c], corr])
        if not jac:
            return implied, None
        dS, dm = moment_jacobian(lay, mats, G, A)            # (u, p, p), (u, p)
        u = dS.shape[0]
        _, pos, r, c, _ = self._tau[g]
        dtau_e = np.zeros((lay.ent_mat.size, tau.shape[0], tau.shape[1]))
        dtau_e[pos, r, c] = 1.0
        dtau = np.tensordot(lay.P.T, dtau_e, axes=1)          # (u, p, Kmax-1)
        dvar = np.einsum("uii->ui", dS) / d[None, :]          # dSigma_ii / Sigma_ii
        dthr = (dtau - dm[:, :, None]) / sd[None, :, None] - thr[None] * dvar[:, :, None] / 2.0
        dcorr = dS[:, i, j] / (sd[i] * sd[j])[None] - corr[None] * (dvar[:, i] + dvar[:, j]) / 2.0
        c = self.cont
        delta = np.concatenate(
            [dthr[:, self.valid], dm[:, c], np.einsum("uii->ui", dS)[:, c], dcorr], axis=1
        ).T   # (q_g, u)
        return implied, delta

    def implied(self, theta: np.ndarray) -> list[np.ndarray]:
        """Implied statistic vector of every group."""
        return [self._implied(g, theta, False)[0] for g in range(len(self.layouts))]

    def jacobians(self, theta: np.ndarray) -> list[np.ndarray]:
        """Per group: Delta_g (q_g, n_params) over the global parameters."""
        out = []
        for g, lay in enumerate(self.layouts):
            _, dl = self._implied(g, theta, True)
            full = np.zeros((dl.shape[0], self.n_params))
            full[:, lay.params] = dl
            out.append(full)
        return out

    # ------------------------------------------------------------ objective API
    def value(self, theta: np.ndarray) -> float:
        try:
            total = 0.0
            for g in range(len(self.layouts)):
                r = self.s[g] - self._implied(g, theta, False)[0]
                total += float(r @ (self.w[g] * r))
            return total if np.isfinite(total) else np.inf
        except np.linalg.LinAlgError:
            return np.inf

    def derivatives(self, theta: np.ndarray, *, information: bool = True):
        q = self.n_params
        grad = np.zeros(q)
        info = np.zeros((q, q)) if information else None
        total = 0.0
        for g, lay in enumerate(self.layouts):
            imp, dl = self._implied(g, theta, True)
            r = self.s[g] - imp
            wr = self.w[g] * r
            total += float(r @ wr)
            u = lay.params
            grad[u] += -2.0 * dl.T @ wr
            if information:
                info[np.ix_(u, u)] += 2.0 * dl.T @ (self.w[g][:, None] * dl)
        return total, grad, info


def ordinal_start_values(spec: ModelSpec, stats: OrdinalStats) -> np.ndarray:
    """Starting values in the theta parameterization.

    Standardized loadings come from the polychoric matrix (as for continuous items);
    with unique variances 1 the loadings are those divided by sqrt(1 - h^2) and the
    thresholds the sample thresholds times 1 / sqrt(1 - h^2). Intercepts and factor
    means start at 0, variances at 1; shared labels average their group starts.
    """
    p = len(spec.items)
    per_group = []
    for g, fit in enumerate(stats.fits):
        idx = spec.group_entries(g)
        st = _group_starts(spec, g, fit.corr, np.zeros(p))
        mats, rows, cols = spec.matrix[idx], spec.row[idx], spec.col[idx]
        lam = np.zeros((p, len(spec.factors)))
        sel = mats == LAMBDA
        lam[rows[sel], cols[sel]] = st[sel]
        h2 = np.clip((lam**2).sum(axis=1), 0.0, 0.85)
        scale = 1.0 / np.sqrt(1.0 - h2)
        cont = stats.n_categories == 0
        nt = fit.n_thresholds
        nc = int(cont.sum())
        mean_c = np.zeros(p)
        var_c = np.ones(p)
        mean_c[cont] = fit.stats[nt : nt + nc]
        var_c[cont] = fit.stats[nt + nc : nt + 2 * nc]
        # continuous items: loadings in item units, residual (1 - h2) var, intercept = mean
        scale = np.where(cont, np.sqrt(var_c), scale)
        for k, (m, r, c) in enumerate(zip(mats, rows, cols)):
            if m == LAMBDA:
                st[k] = lam[r, c] * scale[r]
            elif m == TAU:
                st[k] = fit.thresholds[r, c] * scale[r]
            elif m == THETA:
                st[k] = ((1.0 - h2[r]) * var_c[r] if cont[r] else 1.0) if r == c else 0.0
            elif m == NU:
                st[k] = mean_c[r] if cont[r] else 0.0
            elif m == ALPHA:
                st[k] = 0.0
            elif m == PSI and r == c:
                st[k] = 1.0
        per_group.append(st)
    return pool_starts(spec, per_group)


def start_from(previous_labels, previous_theta, spec: ModelSpec, default: np.ndarray) -> np.ndarray:
    """Starting values for ``spec`` taken from a related fit, by parameter label.

    A label of ``spec`` found in the previous fit takes its estimate; a group-specific
    label ``name|group`` whose shared ``name`` was estimated takes that; the rest keep
    ``default``; a shared label whose group-specific versions were estimated takes
    their average. Used to warm-start the refits of a release search and the next
    level of a sequence.
    """
    prev = dict(zip(previous_labels, np.asarray(previous_theta, float)))
    by_base: dict[str, list[float]] = {}
    for lab, v in prev.items():
        if "|" in lab:
            by_base.setdefault(lab.split("|", 1)[0], []).append(v)
    out = np.asarray(default, float).copy()
    for j, lab in enumerate(spec.param_labels):
        base = lab.split("|", 1)[0]
        if lab in prev:
            out[j] = prev[lab]
        elif base in prev:
            out[j] = prev[base]
        elif lab == base and base in by_base:
            out[j] = float(np.mean(by_base[base]))
    return out
