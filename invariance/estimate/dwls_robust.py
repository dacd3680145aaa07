"""DWLS front door and its robust statistics (METHODS section 7).

What is computed (all groups stacked; W = D^-1 diagonal, V the block-diagonal ACOV of
the statistics, Delta the model Jacobian at the estimates, d the model df):

* ``chi2``: the DWLS minimum T = sum_g (s - sigma)' D^-1 (s - sigma) (not chi-square
  distributed; its p-value and the indices from it are kept as "naive").
* Robust standard errors: the sandwich
  (Delta' W Delta)^-1 Delta' W V W Delta (Delta' W Delta)^-1 (stored as ``acov``).
* U = W - W Delta (Delta' W Delta)^-1 Delta' W; with M = U V:
  mean-scaled T / c, c = tr(M) / d (Satorra & Bentler 1994); mean-and-variance
  adjusted (scale-shift) T_mv = a T + b with a = sqrt(d / tr(M^2)), b = d - a tr(M),
  referred to chi-square on d df (Asparouhov & Muthen 2010).
* Baseline: all correlations zero, thresholds free per group; T_B = sum rho^2 / var(rho),
  d_B = G p(p-1)/2, and tr(U_B V) = d_B exactly, so its mean-scaled value is T_B.
* ``scaled`` CFI / TLI / RMSEA: the usual formulas with the scale-shift statistics of
  the model and the baseline plugged in (what is commonly printed for this estimator).
* ``robust`` CFI / TLI / RMSEA: the population-targeting versions of Brosseau-Liard,
  Savalei & Li (2012) and Brosseau-Liard & Savalei (2014) with T - tr(M) as the
  estimated noncentrality: RMSEA_r = sqrt(G) sqrt(max(T - tr M, 0) / (N d));
  CFI_r = 1 - max(T - tr M, 0) / max(T_B - d_B, T - tr M, 0);
  TLI_r = 1 - [(T - tr M) / d] / [(T_B - d_B) / d_B]. Savalei (2021) discusses these
  for categorical data.
* Differences between nested levels (:func:`dwls_difference`): Satorra (2000). With
  M_d = (U_0 - U_1) V, where U_1 uses the free model's Jacobian at the point that
  reproduces the restricted model's implied statistics (found by fitting the free model
  to them; Asparouhov & Muthen 2006 evaluate the free model there too), the difference
  dT = T_0 - T_1 is scale-shift adjusted: a = sqrt(ddf / tr(M_d^2)), b = ddf - a tr(M_d).
"""

from __future__ import annotations


import numpy as np
from scipy import stats as _st

from ..errors import EstimationError
from .indices import FitStats, cfi, rmsea, rmsea_interval, tli
from ..model.spec import ModelSpec
from ..data.polychoric import _single_thread
from ..data.ordinal_stats import OrdinalStats
from .result import FitResult
from .dwls import DWLSObjective, ordinal_start_values
from .kernels import implied_moments
from .solution import diagnose, estimation_record, warn_problems
from .optimize import minimize
from .starts import DEFAULT_STARTS, run_starts, variance_bounds

__all__ = ["fit_dwls", "dwls_difference", "robust_pieces"]


def _block_diag(blocks):
    n = sum(b.shape[0] for b in blocks)
    out = np.zeros((n, n))
    k = 0
    for b in blocks:
        m = b.shape[0]
        out[k : k + m, k : k + m] = b
        k += m
    return out


def _projector(delta: np.ndarray, w: np.ndarray) -> np.ndarray:
    """U = W - W Delta (Delta' W Delta)^-1 Delta' W for diagonal W = diag(w)."""
    wd = w[:, None] * delta
    mid = np.linalg.pinv(delta.T @ wd)
    return np.diag(w) - wd @ mid @ wd.T


def robust_pieces(obj: DWLSObjective, theta: np.ndarray):
    """Stacked (Delta, w, V) of an objective at ``theta``."""
    delta = np.vstack(obj.jacobians(theta))
    w = np.concatenate(obj.w)
    V = _block_diag(obj.V)
    return delta, w, V


def _scale_shift(t: float, df: int, M: np.ndarray) -> dict:
    tr1 = float(np.trace(M))
    tr2 = float(np.sum(M * M.T))
    if df <= 0 or tr2 <= 0:
        return {"chi2": float("nan"), "pvalue": float("nan"), "scale": float("nan"), "shift": float("nan"),
                "chi2_mean": float("nan"), "c": float("nan"), "pvalue_mean": float("nan"), "trace": tr1}
    a = np.sqrt(df / tr2)
    b = df - a * tr1
    c = tr1 / df
    tmv = a * t + b
    return {
        "chi2": float(tmv),
        "pvalue": float(_st.chi2.sf(tmv, df)),
        "scale": float(a),
        "shift": float(b),
        "chi2_mean": float(t / c),
        "c": float(c),
        "pvalue_mean": float(_st.chi2.sf(t / c, df)),
        "trace": tr1,
    }


def _baseline(stats: OrdinalStats) -> tuple[float, int, dict]:
    t_b, df_b, tr2 = 0.0, 0, 0.0
    for f in stats.fits:
        nt = f.corr_start
        rho = f.stats[nt:]
        Vr = f.acov[nt:, nt:]
        d = np.diag(Vr)
        t_b += float(np.sum(rho**2 / d))
        df_b += rho.size
        C = Vr / np.sqrt(np.outer(d, d))
        tr2 += float(np.sum(C * C))
    a = np.sqrt(df_b / tr2)
    return t_b, df_b, {"chi2": float(a * t_b + df_b - a * df_b), "scale": float(a)}


def fit_dwls(
    spec: ModelSpec,
    stats: OrdinalStats,
    *,
    start: np.ndarray | None = None,
    max_iter: int = 500,
    variances: str = "unrestricted",
    starts: int = DEFAULT_STARTS,
    seed: int | None = None,
) -> FitResult:
    """Estimate an ordinal multi-group model by DWLS with robust statistics.

    Parameters
    ----------
    spec
        An ordinal model (:func:`invariance.ordinal.levels.build_ordinal_level`).
    stats
        Ordinal statistics (:func:`invariance.ordinal.ordinal_stats`).
    start
        Starting vector (chosen from the statistics when omitted).
    max_iter
        Iteration limit of the scoring runs.
    variances, starts, seed
        As for :func:`invariance.estimate.ml.fit`: bounds on the free variance
        parameters, alternative starts and their seed. A factor collapsing onto one
        item shows, in the theta parameterization, as a loading and thresholds growing
        without bound: it is caught and named as a run-away solution.

    Returns
    -------
    FitResult
        ``estimator='dwls'``; ``acov`` is the robust sandwich; ``extra['robust']``
        holds the adjusted statistics and indices described in the module docstring.
    """
    with _single_thread():  # small products: BLAS threads only add overhead
        return _fit_dwls(spec, stats, start=start, max_iter=max_iter, variances=variances, starts=starts, seed=seed)


def _fit_dwls(spec, stats, *, start, max_iter, variances, starts, seed) -> FitResult:
    if tuple(stats.names) != tuple(spec.groups):
        stats = stats.subset(spec.groups)
    if tuple(stats.items) != tuple(spec.items):
        stats = stats.reorder_items(spec.items)
    obj = DWLSObjective(spec, stats)
    lower = variance_bounds(spec) if variances == "nonnegative" else None
    out, record = run_starts(obj, spec, lambda: ordinal_start_values(spec, stats), start=start, starts=starts,
                             seed=seed, lower=lower, max_iter=max_iter)
    estimation = estimation_record(spec, out, record, lower,
                                   options=dict(variances=variances, starts=starts, seed=seed))
    if not np.isfinite(out.fun):
        raise EstimationError(
            f"The {spec.level or 'ordinal'} model could not be estimated: {out.message}; "
            "check the model structure and the categories of the items."
        )
    theta = out.x
    delta, w, V = robust_pieces(obj, theta)
    matrices = tuple(obj.matrices(g, theta) for g in range(len(spec.groups)))
    moments = [implied_moments(m[:6])[:2] for m in matrices]
    sigmas = tuple(s_ for s_, _ in moments)
    mus = tuple(mu_ for _, mu_ in moments)
    problems, acov = _sandwich(spec, matrices, sigmas, delta, w, V, estimation)
    fs, robust = _dwls_fit_stats(spec, stats, obj, theta, float(out.fun), delta, w, V)
    warn_problems(spec, out, problems)
    return FitResult(
        spec=spec, estimator="dwls", theta=theta, acov=acov, converged=out.converged,
        status=out.message, iterations=out.iterations, fit=fs, problems=tuple(problems),
        matrices=matrices, sigma=sigmas, mu=mus,
        group_n=tuple(int(f.n) for f in stats.fits),
        extra={"robust": robust, "estimation": estimation},
    )


def _sandwich(spec, matrices, sigmas, delta, w, V, estimation: dict):
    """Problems of the solution and the robust sandwich covariance (None when singular)."""
    bread = delta.T @ (w[:, None] * delta)
    problems = estimation["runaway"] + diagnose(spec, [m[:6] for m in matrices], sigmas, bread) + estimation["at_bound"]
    acov = None
    if not any(p.startswith("singular information") for p in problems):
        binv = np.linalg.inv(bread)
        meat = delta.T @ ((w[:, None] * V) * w[None, :]) @ delta
        acov = binv @ meat @ binv
    return problems, acov


def _robust_indices(t: float, df: int, rob: dict, base: dict, t_b: float, df_b: int, N: int, G: int) -> dict:
    """Robust (population-targeting) and scaled CFI / TLI / RMSEA (module docstring)."""
    ncp = t - rob["trace"]
    return {
        "cfi_robust": float(1.0 - max(ncp, 0.0) / max(t_b - df_b, ncp, 0.0)) if max(t_b - df_b, ncp, 0.0) > 0 else 1.0,
        "tli_robust": float(1.0 - (ncp / df) / ((t_b - df_b) / df_b)) if df > 0 else float("nan"),
        "rmsea_robust": float(np.sqrt(G) * np.sqrt(max(ncp, 0.0) / (N * df))) if df > 0 else float("nan"),
        "rmsea_robust_ci90": (
            tuple(float(np.sqrt(rob["c"]) * v) for v in rmsea_interval(rob["chi2_mean"], df, N, G))
            if df > 0 and np.isfinite(rob["c"]) else (float("nan"), float("nan"))
        ),
        "cfi_scaled": cfi(rob["chi2"], df, base["chi2"], df_b) if df > 0 else float("nan"),
        "tli_scaled": tli(rob["chi2"], df, base["chi2"], df_b) if df > 0 else float("nan"),
        "rmsea_scaled": rmsea(rob["chi2"], df, N, G) if df > 0 else float("nan"),
    }


def _dwls_fit_stats(spec, stats, obj, theta, t: float, delta, w, V) -> tuple[FitStats, dict]:
    """Fit statistics of the DWLS minimum ``t`` and the robust (adjusted) statistics."""
    df = spec.df
    rob = _scale_shift(t, df, _projector(delta, w) @ V)
    t_b, df_b, base = _baseline(stats)
    N = stats.n_total
    G = len(spec.groups)
    rob_idx = _robust_indices(t, df, rob, base, t_b, df_b, N, G)
    # SRMR over correlation residuals, groups weighted by N_g
    imp = obj.implied(theta)
    sr = 0.0
    for g, f in enumerate(stats.fits):
        nt = f.corr_start
        res = f.stats[nt:] - imp[g][nt:]
        sr += f.n * np.sqrt(np.mean(res**2)) if res.size else 0.0
    srmr = float(sr / N)
    nan = float("nan")
    fs = FitStats(
        chi2=t, df=int(df), pvalue=float(_st.chi2.sf(t, df)) if df > 0 else nan,
        cfi=cfi(t, df, t_b, df_b), tli=tli(t, df, t_b, df_b), rmsea=rmsea(t, df, N, G),
        rmsea_ci90=rmsea_interval(t, df, N, G), srmr=srmr, loglik=nan, loglik_saturated=nan,
        aic=nan, bic=nan, bic_adjusted=nan, mc=nan, n_params=int(spec.n_params), n=int(N),
        baseline_chi2=float(t_b), baseline_df=int(df_b),
    )
    robust = {
        "chi2_scaled_shifted": rob["chi2"], "pvalue_scaled_shifted": rob["pvalue"],
        "scale": rob["scale"], "shift": rob["shift"], "chi2_mean_scaled": rob["chi2_mean"],
        "scaling_factor": rob["c"], "pvalue_mean_scaled": rob["pvalue_mean"], "trace_uv": rob["trace"],
        "baseline_chi2_scaled_shifted": base["chi2"], **rob_idx,
    }
    return fs, robust


def dwls_difference(restricted: FitResult, free: FitResult, stats: OrdinalStats) -> dict:
    """Robust difference test between two nested DWLS fits (Satorra 2000).

    Parameters
    ----------
    restricted, free
        Fits of the more and the less restricted model (same groups and items).
    stats
        The ordinal statistics both were fitted to.

    Returns
    -------
    dict
        ``delta_chi2`` (T_0 - T_1), ``delta_df``, ``chi2`` (scale-shift adjusted
        difference), ``pvalue``, ``scale``, ``shift``, ``chi2_mean``, ``pvalue_mean``
        (mean-scaled), ``nesting_gap`` (the free model's DWLS value at the restricted
        model's implied statistics: 0 for nested models).
    """
    with _single_thread():
        return _difference(restricted, free, stats)


def _difference(restricted: FitResult, free: FitResult, stats: OrdinalStats) -> dict:
    if tuple(stats.names) != tuple(restricted.spec.groups):
        stats = stats.subset(restricted.spec.groups)
    if tuple(stats.items) != tuple(restricted.spec.items):
        stats = stats.reorder_items(restricted.spec.items)
    ddf = int(restricted.fit.df - free.fit.df)
    dT = float(restricted.fit.chi2 - free.fit.chi2)
    obj0 = DWLSObjective(restricted.spec, stats)
    target = obj0.implied(restricted.theta)
    obj1 = DWLSObjective(free.spec, stats, targets=target)
    out1 = minimize(obj1, free.theta)
    gap = float(out1.fun)
    base = {"delta_chi2": dT, "delta_df": ddf, "nesting_gap": gap}
    if ddf <= 0:
        return {**base, "chi2": float("nan"), "pvalue": float("nan"), "scale": float("nan"),
                "shift": float("nan"), "chi2_mean": float("nan"), "pvalue_mean": float("nan")}
    d0, w, V = robust_pieces(obj0, restricted.theta)
    d1, _, _ = robust_pieces(obj1, out1.x)
    M = (_projector(d0, w) - _projector(d1, w)) @ V
    r = _scale_shift(dT, ddf, M)
    return {**base, "chi2": r["chi2"], "pvalue": r["pvalue"], "scale": r["scale"], "shift": r["shift"],
            "chi2_mean": r["chi2_mean"], "pvalue_mean": r["pvalue_mean"]}
