"""One interface over every estimator: statistics, fit, difference test, release tests.

The pipeline and the release search talk to an estimator only through
:class:`Estimator`, so neither branches on estimator names:

=================  ===========================================================================
method             job
=================  ===========================================================================
``statistics``     per-group statistics from a DataFrame (sufficient statistics, casewise
                   patterns for full information, or thresholds and polychorics)
``group_statistics`` the same from one item array per group (the pipeline's checked data)
``fit``            estimate one model (:class:`~invariance.estimate.result.FitResult`)
``difference``     the difference test between two nested fits (:class:`Difference`)
``score_tests``    whether release candidates are ranked by score tests (else by refits,
                   :mod:`invariance.partial.candidates`)
``level_row``      the level's row of results.json (the statistics that decide)
``step_delta``     the change between a level and the previous accepted one
=================  ===========================================================================

Implementations: :class:`MaximumLikelihood` (``ml``; full-information ML when the
statistics hold incomplete cases), :class:`RobustML` (``ml_robust``: scaled statistics,
robust indices, Satorra-Bentler differences) and :class:`DiagonallyWeighted` (``dwls``:
ordered-categorical and mixed items, Satorra 2000 differences). :func:`estimator_for`
maps a name and the typed options to an instance.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any, Mapping, Protocol, Sequence, runtime_checkable

import numpy as np
from scipy import special as _sp

from ..data.moments import group_arrays, stats_from_arrays
from ..data.ordinal_stats import ordinal_stats_from_arrays
from ..decide.compare import level_delta
from ..errors import EstimationError, InvarianceWarning, SpecificationError
from .dwls import ordinal_start_values, start_from
from .dwls_robust import dwls_difference, fit_dwls
from .ml import fit as ml_fit
from ..model.spec import ModelSpec
from .result import FitResult
from .robust import H1Moments, robust_difference
from .start import start_values

__all__ = [
    "ESTIMATOR_NAMES",
    "FIT_KEYS",
    "INCOMPLETE",
    "ROBUST_KEYS",
    "Difference",
    "DiagonallyWeighted",
    "Estimator",
    "MaximumLikelihood",
    "RobustML",
    "estimator_for",
]

#: Estimator names (pipeline key ``estimator``, Python API ``estimator=``).
ESTIMATOR_NAMES = ("ml", "ml_robust", "dwls")
#: How incomplete cases are used (pipeline ``data.incomplete``, Python API ``incomplete=``).
INCOMPLETE = ("full_information", "listwise")
#: Fit statistics copied into each level row of results.json.
FIT_KEYS = ("chi2", "df", "pvalue", "cfi", "tli", "rmsea", "rmsea_ci90", "srmr", "aic", "bic")
#: Robust statistics of a level row (``None`` unless the estimator computes them).
ROBUST_KEYS = ("chi2_scaled", "scaling_factor", "pvalue_scaled", "cfi_robust", "tli_robust", "rmsea_robust")


def _num(v) -> float | None:
    return None if v is None or not np.isfinite(v) else float(v)


@dataclass(frozen=True)
class Difference:
    """A difference test between nested fits: the statistic that decides and its source.

    ``test`` is ``likelihood_ratio``, ``satorra_bentler_2001``, ``satorra_bentler_2010``,
    ``normal_theory`` (robust ML when no scaled test can be formed; ``note`` says why)
    or ``satorra_2000`` (DWLS, scale-shifted).
    """

    chi2: float
    df: int
    pvalue: float
    test: str
    chi2_unadjusted: float
    scaling: float | None = None
    note: str | None = None


@runtime_checkable
class Estimator(Protocol):
    """What the pipeline and the release search need from an estimator.

    ``score_tests`` says how the release search ranks candidate releases: by score
    tests at the restricted estimates (``True``), or by refitting each candidate and
    testing it with :meth:`difference` (``False``; releases that rebuild an item's
    identification, as for ordered items, have no score test).
    """

    name: str
    score_tests: bool

    def statistics(self, frame, items: Sequence[str], group: str | None, *, groups=None): ...

    def group_statistics(self, arrays: Sequence[np.ndarray], names: Sequence[str], items: Sequence[str]): ...

    def fit(self, spec: ModelSpec, stats, *, start: np.ndarray | None = None) -> FitResult: ...

    def warm_start(self, previous: FitResult, spec: ModelSpec, stats) -> np.ndarray: ...

    def difference(self, restricted: FitResult, free: FitResult, stats) -> Difference: ...

    def level_row(self, level: str, res: FitResult) -> dict: ...

    def step_delta(self, row: Mapping, base_row: Mapping, res: FitResult, base: FitResult, stats) -> dict: ...

    def decision_view(self, row: Mapping) -> dict: ...


def quiet_fit(estimator: Estimator, spec: ModelSpec, stats, *, start=None) -> tuple[FitResult, list[str]]:
    """Fit and collect the :class:`~invariance.errors.InvarianceWarning` messages."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InvarianceWarning)
        res = estimator.fit(spec, stats, start=start)
    return res, [str(w.message) for w in caught if issubclass(w.category, InvarianceWarning)]


class _FromFrame:
    """``statistics`` of an estimator from a data frame: the frame split into one item
    array per group (:func:`~invariance.data.moments.group_arrays`), then the estimator's
    own ``group_statistics``."""

    def statistics(self, frame, items, group, *, groups=None):
        """Per-group statistics of ``frame`` (see the estimator's ``group_statistics``)."""
        arrays, names = group_arrays(frame, items, group, groups=groups)
        return self.group_statistics(arrays, names, items)


@dataclass(frozen=True)
class MaximumLikelihood(_FromFrame):
    """Normal-theory ML; full-information ML when the statistics hold incomplete cases.

    Attributes
    ----------
    incomplete
        ``full_information`` (every case with an observed item, casewise likelihood) or
        ``listwise`` (complete cases only): how :meth:`statistics` treats incomplete rows.
    information
        ``expected`` (default) or ``observed`` information for standard errors.
    options
        Further keywords of every fit, as (name, value) pairs (``variances``, ``starts``,
        ``seed`` of :func:`invariance.estimate.ml.fit`; the pipeline's ``estimation`` section).
    """

    incomplete: str = "full_information"
    information: str = "expected"
    options: tuple[tuple[str, Any], ...] = ()
    name: str = field(default="ml", init=False)
    score_tests: bool = field(default=True, init=False)

    def group_statistics(self, arrays, names, items):
        """Per-group sufficient statistics (casewise patterns under full information) from
        one (n_g, p) item array per group (NaN = missing)."""
        incomplete = any(np.isnan(x).any() for x in arrays)
        method = "fiml" if self.incomplete == "full_information" and incomplete else "listwise"
        return stats_from_arrays(arrays, names, items, missing=method)

    def fit(self, spec, stats, *, start=None) -> FitResult:
        return ml_fit(spec, stats, start=start, estimator=self.name, information=self.information, **dict(self.options))

    def warm_start(self, previous: FitResult, spec: ModelSpec, stats) -> np.ndarray:
        """Starting values for ``spec`` from a related fit's estimates, by label (the rest analytic)."""
        return start_from(previous.spec.param_labels, previous.theta, spec, start_values(spec, stats))

    def difference(self, restricted, free, stats) -> Difference:
        dt = max(float(restricted.fit.chi2 - free.fit.chi2), 0.0)
        ddf = int(restricted.spec.df - free.spec.df)
        p = float(_sp.chdtrc(ddf, dt)) if ddf > 0 else float("nan")
        return Difference(dt, ddf, p, "likelihood_ratio", dt)

    def level_row(self, level: str, res: FitResult) -> dict:
        """The level's row: fit statistics, robust ones (``None`` when not computed), problems."""
        fs = res.fit.to_dict()
        row = {"level": level, "converged": bool(res.converged), "status": res.status}
        row.update({k: fs.get(k) for k in FIT_KEYS})
        row.update({k: _num(res.extra.get(k)) for k in ROBUST_KEYS})
        row["problems"] = list(res.problems)
        row["estimation"] = res.extra.get("estimation")
        row["released"] = [r.to_dict() for r in res.spec.released]
        return row

    def decision_view(self, row: Mapping) -> dict:
        """The row as judged (plain ML: as it is)."""
        return dict(row)

    def step_delta(self, row, base_row, res, base, stats) -> dict:
        """Changes from the previous accepted level (``level_delta``: chi-square difference)."""
        return level_delta(row, base_row)


@dataclass(frozen=True)
class RobustML(MaximumLikelihood):
    """ML estimates with sandwich standard errors, scaled statistics and robust indices.

    Decisions use the scaled difference (Satorra & Bentler 2001, or 2010 when
    ``scaled_difference="2010"`` or when the 2001 scaling is not positive) and the
    changes in the robust indices. Release candidates are ranked by the normal-theory
    score tests at the (identical) ML estimates; with ``verify`` they are confirmed by
    the scaled difference of their refits.
    """

    scaled_difference: str = "auto"
    name: str = field(default="ml_robust", init=False)
    _h1: dict = field(default_factory=dict, init=False, compare=False, repr=False)

    def _moments(self, stats) -> H1Moments:
        key = id(stats)
        if key not in self._h1:
            self._h1.clear()
            self._h1[key] = (stats, H1Moments(stats))
        return self._h1[key][1]

    def difference(self, restricted, free, stats) -> Difference:
        plain = MaximumLikelihood.difference(self, restricted, free, stats)
        try:
            d = robust_difference(restricted, free, stats, method=self.scaled_difference, h1=self._moments(stats))
        except EstimationError as exc:
            return Difference(plain.chi2, plain.df, plain.pvalue, "normal_theory", plain.chi2, None, str(exc))
        return Difference(float(d.chi2), int(d.df), float(d.pvalue), d.test, float(d.chi2_unscaled),
                          _num(d.scaling))

    def decision_view(self, row: Mapping) -> dict:
        """The row with its CFI, TLI and RMSEA replaced by the robust ones."""
        view = dict(row)
        for k in ("cfi", "tli", "rmsea"):
            v = row.get(f"{k}_robust")
            if v is not None:
                view[k] = v
        return view

    def step_delta(self, row, base_row, res, base, stats) -> dict:
        """Robust-index changes; the scaled difference's p value decides."""
        delta = level_delta(self.decision_view(row), self.decision_view(base_row))
        out = dict(delta)
        out["pvalue_normal"] = delta.get("pvalue")
        d = self.difference(res, base, stats)
        if d.test == "normal_theory":
            out.update({"chi2_scaled": None, "scaling": None, "test": "normal_theory", "note": d.note})
            return out
        out.update({"chi2_scaled": _num(d.chi2), "scaling": _num(d.scaling), "test": d.test, "pvalue": _num(d.pvalue)})
        return out


@dataclass(frozen=True)
class DiagonallyWeighted(_FromFrame):
    """DWLS for ordered-categorical and mixed items, with robust statistics.

    Attributes
    ----------
    ordinal
        The ordered items (the other items are continuous); ``None``: every item.
    merge
        (item, groups of adjacent category values merged into one) pairs.
    options
        Further keywords of every fit, as (name, value) pairs (``variances``, ``starts``,
        ``seed`` of :func:`invariance.estimate.dwls_robust.fit_dwls`).
    """

    ordinal: tuple[str, ...] | None = None
    merge: tuple[tuple[str, tuple[tuple[float, ...], ...]], ...] | None = None
    options: tuple[tuple[str, Any], ...] = ()
    name: str = field(default="dwls", init=False)
    score_tests: bool = field(default=False, init=False)

    def group_statistics(self, arrays, names, items):
        """Thresholds, polychoric (and polyserial) correlations and their ACOV, complete
        cases, from one (n_g, p) item array per group (NaN = missing)."""
        merge = None if self.merge is None else {k: [list(b) for b in v] for k, v in self.merge}
        continuous = [] if self.ordinal is None else [i for i in items if i not in self.ordinal]
        return ordinal_stats_from_arrays(arrays, names, list(items), merge=merge, continuous=continuous)

    def fit(self, spec, stats, *, start=None) -> FitResult:
        return fit_dwls(spec, stats, start=start, **dict(self.options))

    def warm_start(self, previous: FitResult, spec: ModelSpec, stats) -> np.ndarray:
        """Starting values for ``spec`` from a related fit's estimates, by label (the rest analytic)."""
        return start_from(previous.spec.param_labels, previous.theta, spec, ordinal_start_values(spec, stats))

    def difference(self, restricted, free, stats) -> Difference:
        d = dwls_difference(restricted, free, stats)
        return Difference(float(d["chi2"]), int(d["delta_df"]), float(d["pvalue"]), "satorra_2000",
                          float(d["delta_chi2"]), _num(d.get("scale")))

    def level_row(self, level: str, res: FitResult) -> dict:
        """chi2 is the mean-and-variance adjusted statistic, cfi/tli/rmsea the robust indices;
        the unadjusted DWLS value and the scaled indices are kept under ``dwls``."""
        row = MaximumLikelihood.level_row(self, level, res)
        rob = res.extra["robust"]
        row["dwls"] = {
            "chi2_unadjusted": row["chi2"],
            "pvalue_unadjusted": row["pvalue"],
            **{k: _num(rob[k]) for k in ("chi2_mean_scaled", "pvalue_mean_scaled", "scaling_factor", "scale",
                                         "shift", "cfi_scaled", "tli_scaled", "rmsea_scaled")},
        }
        row.update({
            "chi2": _num(rob["chi2_scaled_shifted"]),
            "pvalue": _num(rob["pvalue_scaled_shifted"]),
            "cfi": _num(rob["cfi_robust"]),
            "tli": _num(rob["tli_robust"]),
            "rmsea": _num(rob["rmsea_robust"]),
            "rmsea_ci90": [_num(v) for v in rob["rmsea_robust_ci90"]],
        })
        return row

    decision_view = MaximumLikelihood.decision_view

    def step_delta(self, row, base_row, res, base, stats) -> dict:
        """Index changes; the chi-square difference is the Satorra (2000) one, scale-shifted."""
        out = level_delta(row, base_row)
        d = self.difference(res, base, stats)
        out["chi2_unadjusted"] = d.chi2_unadjusted
        out["chi2"] = _num(d.chi2)
        out["df"] = d.df
        out["pvalue"] = _num(d.pvalue) if d.df > 0 else None
        return out


def estimator_for(name: str, *, incomplete: str = "full_information", scaled_difference: str = "auto",
                  information: str = "expected", ordinal: tuple[str, ...] | None = None,
                  merge=None, options: Mapping[str, Any] | None = None) -> Estimator:
    """The estimator called ``name`` with its typed options.

    Parameters
    ----------
    name
        One of :data:`ESTIMATOR_NAMES`.
    incomplete
        ML family: one of :data:`INCOMPLETE`.
    scaled_difference
        ``ml_robust``: ``auto`` or ``2010``.
    information
        ML family: ``expected`` or ``observed`` information for standard errors.
    ordinal, merge
        ``dwls``: the ordered items (``None``: all) and category merges.
    options
        Keywords of every fit (``variances``, ``starts``, ``seed``).
    """
    opts = tuple(sorted((options or {}).items()))
    if name == "ml":
        return MaximumLikelihood(incomplete=incomplete, information=information, options=opts)
    if name == "ml_robust":
        return RobustML(incomplete=incomplete, information=information, options=opts,
                        scaled_difference=scaled_difference)
    if name == "dwls":
        if information != "expected":
            raise SpecificationError("dwls standard errors are the robust sandwich; drop information=.")
        pairs = None if merge is None else tuple(
            (str(k), tuple(tuple(float(x) for x in b) for b in v)) for k, v in merge.items())
        return DiagonallyWeighted(ordinal=ordinal, merge=pairs, options=opts)
    raise SpecificationError(f"The estimator must be one of {', '.join(ESTIMATOR_NAMES)}; got {name!r}.")
