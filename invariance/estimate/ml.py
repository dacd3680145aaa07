"""The estimation front door: :func:`fit` a :class:`~invariance.model.ModelSpec`.

Complete-data ML from sufficient statistics; standard errors from the expected
information (or, on request, the observed information: the finite-difference Jacobian
of the analytic gradient). Improper solutions are named in ``FitResult.problems`` and
emitted as :class:`~invariance.errors.ImproperSolutionWarning`.

When the statistics carry missing values (built with ``missing="fiml"``) the fit is
full-information ML (:mod:`invariance.estimate.fiml`). ``estimator="ml_robust"`` adds
the sandwich covariance, the scaled statistic and robust fit indices
(:mod:`invariance.estimate.robust`), with or without missing data (Yuan & Bentler 2000).
"""

from __future__ import annotations

import dataclasses
import functools

import numpy as np
from scipy import special as _sp

from ..data.moments import SampleStats
from ..data.ordinal_stats import OrdinalStats
from ..errors import EstimationError, SpecificationError
from ..data.mcar import missing_report
from .indices import cfi as _cfi
from .indices import compute_fit, information_criteria
from .indices import tli as _tli
from ..model.spec import ModelSpec
from .result import FitResult
from .dwls_robust import fit_dwls
from .fiml import FIMLObjective, independence_loglik
from .linalg import arrow_inverse
from .objective import MLObjective
from .robust import H1Moments, baseline_trace, robust_indices, sandwich, scaling_trace, score_products
from .runaway import VARIANCE_CHOICES, weak_identification
from .solution import diagnose, estimation_record, observed_information, warn_problems
from .separate import fit_by_group, shares_nothing
from .start import start_values
from .starts import DEFAULT_STARTS, general_factors, run_starts, variance_bounds

__all__ = ["ESTIMATORS", "fit", "diagnose", "observed_information", "estimation_record"]

#: Estimators accepted by :func:`fit`.
ESTIMATORS = ("ml", "ml_robust")


def fit(
    spec: ModelSpec,
    stats: SampleStats,
    *,
    information: str = "expected",
    start: np.ndarray | None = None,
    max_iter: int = 200,
    estimator: str = "ml",
    variances: str = "unrestricted",
    starts: int = DEFAULT_STARTS,
    seed: int | None = None,
) -> FitResult:
    """Estimate a multi-group model by maximum likelihood.

    Parameters
    ----------
    spec
        The model (see :func:`invariance.model.build_level`).
    stats
        Per-group sample statistics, groups in the order of ``spec.groups``.
    information
        ``"expected"`` (default) or ``"observed"`` information for standard errors.
    start
        Warm start; the analytic and alternative starts follow when it fails.
    max_iter
        Iteration limit of the scoring runs.
    estimator
        ``"ml"`` (normal theory, default) or ``"ml_robust"`` (sandwich ``acov``, scaled
        statistic and robust indices in ``extra``; see the module docstring). Missing
        values in ``stats`` mean full-information ML, reported in ``extra["missing"]``.
    variances
        ``"unrestricted"`` (default; negative variances or a run-away are reported as
        improper) or ``"nonnegative"`` (variances estimated within [0, inf)).
    starts
        Alternative starts for bifactor and second-order models (0: the analytic start only).
    seed
        Seed of the alternative starts (default :data:`~invariance.estimate.starts.DEFAULT_SEED`).

    Returns
    -------
    FitResult
        ``extra["estimation"]``: what was estimated, the starts and optima, estimates
        at a bound, run-away parameters. Groups sharing no parameter (configural) are
        fitted one by one (``extra["groups"]``); ordinal statistics go to
        :func:`~invariance.estimate.dwls_robust.fit_dwls`.

    """
    _check_options(variances=variances, estimator=estimator, information=information,
                   ordinal=isinstance(stats, OrdinalStats))
    opts = dict(max_iter=max_iter, variances=variances, starts=starts, seed=seed)
    if isinstance(stats, OrdinalStats):
        return fit_dwls(spec, stats, start=start, **opts)
    if tuple(stats.names) != tuple(spec.groups):
        stats = stats.subset(spec.groups)
    if tuple(stats.items) != tuple(spec.items):
        stats = stats.reorder_items(spec.items)
    if shares_nothing(spec):
        return _fit_separately(spec, stats, start, information=information, estimator=estimator, opts=opts)
    obj, out, estimation = _estimate(spec, stats, start=start, options=opts)
    return _finish(spec, stats, obj, out, information=information, estimator=estimator, estimation=estimation)


def _fit_separately(spec: ModelSpec, stats: SampleStats, start, *, information: str, estimator: str,
                    opts: dict) -> FitResult:
    """A model whose groups share nothing, as one fit per group (:func:`fit_by_group`)."""
    one = functools.partial(fit, information=information, estimator=estimator, **opts)
    res = fit_by_group(spec, stats, one, start=start)
    if any(g.missing is not None for g in stats.groups):
        res.extra["missing"] = missing_report(stats)
    return res


def _check_options(*, variances: str, estimator: str, information: str, ordinal: bool) -> None:
    """Refuse an unknown ``variances``, ``estimator`` or ``information`` in one line."""
    if variances not in VARIANCE_CHOICES:
        raise SpecificationError(
            f"The variances option must be one of {', '.join(VARIANCE_CHOICES)}; got {variances!r}."
        )
    if ordinal:
        return
    if estimator not in ESTIMATORS:
        raise SpecificationError(
            f"The estimator must be one of {', '.join(ESTIMATORS)}; got {estimator!r}."
        )
    if information not in ("expected", "observed"):
        raise SpecificationError(
            f"The information for standard errors must be 'expected' or 'observed'; got {information!r}."
        )


def _estimate(spec: ModelSpec, stats: SampleStats, *, start, options: dict):
    """Run the starts on the (full-information) ML objective of a model whose groups share
    parameters; returns (objective, optimizer outcome, ``extra["estimation"]``)."""
    full_info = any(g.has_missing for g in stats.groups)
    obj = FIMLObjective(spec, stats) if full_info else MLObjective(spec, stats)
    tol = 1e-12
    if full_info:
        # T is a difference of casewise log-likelihoods of size |logL_H1|: allow for their
        # rounding error in the convergence test (it is far below any reported digit)
        tol = max(tol, 2e-14 * abs(2.0 * obj.loglik_h1) / max(1.0, float(spec.df)))
    lower = variance_bounds(spec) if options["variances"] == "nonnegative" else None
    out, record = run_starts(obj, spec, lambda: start_values(spec, stats), start=start, starts=options["starts"],
                             seed=options["seed"], lower=lower, max_iter=options["max_iter"], tol=tol)
    if not np.isfinite(out.fun):
        raise EstimationError(
            f"The {spec.level or 'model'} model could not be estimated: {out.message}; "
            "check the model structure and the items of each factor."
        )
    return obj, out, estimation_record(spec, out, record, lower, options=options)


def _standard_errors(spec, obj, out, matrices, sigmas, *, information: str, estimation: dict):
    """Information for standard errors, the problems found and the normal-theory acov."""
    theta = out.x
    if information == "observed":
        info_se = obj.hessian(theta) if hasattr(obj, "hessian") else observed_information(obj, theta)
    else:
        info_se = out.info if out.info is not None else obj.derivatives(theta)[2]
    part = getattr(obj, "partition", None)
    problems = estimation["runaway"] + diagnose(spec, matrices, sigmas, info_se, part) + estimation["at_bound"]
    general = sorted(general_factors(spec))
    if not estimation["runaway"]:
        lower = variance_bounds(spec) if estimation["variances"] == "nonnegative" else None
        problems += weak_identification(spec, info_se, part, matrices, exclude=out.at_bound(lower),
                                        general=spec.factors[general[0]] if len(general) == 1 else None)
    acov = None
    if not any(p.startswith("singular information") for p in problems):
        try:
            # T = -2 logL + const: the information of logL is half the Hessian of T
            acov = 2.0 * (arrow_inverse(info_se, part) if part is not None else np.linalg.inv(info_se))
        except np.linalg.LinAlgError:
            acov = None
    return info_se, problems, acov


def _finish(spec, stats, obj, out, *, information: str, estimator: str, estimation: dict) -> FitResult:
    """Standard errors, diagnosis, fit statistics and the result of one optimizer outcome."""
    theta = out.x
    matrices, sigmas, mus = obj.implied(theta)
    info_se, problems, acov = _standard_errors(spec, obj, out, matrices, sigmas, information=information,
                                               estimation=estimation)
    warn_problems(spec, out, problems, estimation["notes"])
    fs = compute_fit(out.fun, spec.df, spec.n_params, obj.S, obj.mean, sigmas, mus, obj.n)
    extra: dict = {"estimation": estimation}
    if isinstance(obj, FIMLObjective):
        fs = _full_information_fit(fs, obj, spec)
        extra["likelihood"] = "full_information"
    if any(g.missing is not None for g in stats.groups):
        extra["missing"] = missing_report(stats)
    if estimator == "ml_robust":
        acov = _robust(extra, spec, stats, theta, info_se, acov, fs)
    return FitResult(
        spec=spec, estimator=estimator, theta=theta, acov=acov, converged=out.converged, status=out.message,
        iterations=out.iterations, fit=fs, problems=tuple(problems), matrices=matrices, sigma=sigmas, mu=mus,
        group_n=tuple(int(g.n) for g in stats.groups), extra=extra,
    )


def _full_information_fit(fs, obj: FIMLObjective, spec: ModelSpec):
    """Fit statistics whose likelihoods are the casewise (full-information) ones."""
    ll_h1 = obj.loglik_h1
    loglik = ll_h1 - 0.5 * fs.chi2
    t_b = -2.0 * sum(independence_loglik(d.x) for d in obj.data) + 2.0 * ll_h1
    aic, bic, bic_adjusted = information_criteria(loglik, spec.n_params, fs.n)
    return dataclasses.replace(
        fs,
        loglik=float(loglik),
        loglik_saturated=float(ll_h1),
        aic=aic,
        bic=bic,
        bic_adjusted=bic_adjusted,
        baseline_chi2=float(t_b),
        cfi=_cfi(fs.chi2, fs.df, t_b, fs.baseline_df),
        tli=_tli(fs.chi2, fs.df, t_b, fs.baseline_df),
    )


def _robust(extra: dict, spec: ModelSpec, stats: SampleStats, theta, info_se, acov, fs):
    """Fill ``extra`` with the robust statistics; return the sandwich covariance."""
    h1 = H1Moments(stats)
    df = spec.df
    tr = scaling_trace(spec, theta, h1)
    c = tr / df if df > 0 else float("nan")
    tr_b = baseline_trace(h1)
    c_b = tr_b / fs.baseline_df if fs.baseline_df > 0 else float("nan")
    t_s = fs.chi2 / c if df > 0 else float("nan")
    extra.update(
        chi2_scaled=float(t_s),
        scaling_factor=float(c),
        pvalue_scaled=float(_sp.chdtrc(df, t_s)) if df > 0 else float("nan"),
        baseline_chi2_scaled=float(fs.baseline_chi2 / c_b),
        baseline_scaling_factor=float(c_b),
        **robust_indices(fs.chi2, df, c, fs.baseline_chi2, fs.baseline_df, c_b, fs.n, len(spec.groups)),
    )
    extra["acov_normal"] = acov
    if acov is None:
        return None
    B = score_products(spec, theta, h1)
    # info_se is the Hessian of T = -2 logL + const: the information of logL is half of it
    return sandwich(info_se / 2.0, B)
