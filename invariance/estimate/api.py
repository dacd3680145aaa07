"""The Python front door: statistics, levels and their comparisons straight from a DataFrame.

One set of functions for every estimator and item type. The options mean what the
pipeline keys of the same names mean: ``estimator`` (``ml``, ``ml_robust``, ``dwls``),
``incomplete`` (``full_information`` or ``listwise``, the pipeline's ``data.incomplete``),
``ordinal`` (the pipeline's ``data.ordinal``: ``"all"`` or the ordered items) and
``merge`` (``data.merge``). Missing-value codes are the data's business: recode them to
NaN before calling (the pipeline's ``data.missing``).
"""

from __future__ import annotations

from typing import Iterable, Mapping, Sequence

from ..data.moments import SampleStats
from ..data.ordinal_stats import OrdinalStats
from ..errors import SpecificationError
from ..model.levels import LevelBuilder
from ..model.spec import Release
from ..model.structure import Structure
from .interface import INCOMPLETE, Estimator, estimator_for
from .result import FitResult

__all__ = ["compare_levels", "fit_level", "fit_levels", "level_builder", "make_estimator", "statistics"]


def make_estimator(
    structure: Structure,
    *,
    estimator: str | None = None,
    incomplete: str = "full_information",
    ordinal: str | Sequence[str] | None = None,
    merge: Mapping[str, Sequence[Sequence[float]]] | None = None,
    information: str = "expected",
) -> Estimator:
    """The :class:`~invariance.estimate.interface.Estimator` for these options.

    ``ordinal`` (``"all"`` or item names) selects ``dwls`` when ``estimator`` is not
    given; any other estimator with ordered items, or ``merge`` without them, is refused.
    """
    if incomplete not in INCOMPLETE:
        raise SpecificationError(f"incomplete must be one of {', '.join(INCOMPLETE)}; got {incomplete!r}.")
    if ordinal is None and estimator == "dwls":
        ordinal = "all"
    if ordinal is None:
        if merge is not None:
            raise SpecificationError("merge is for ordered items; pass ordinal= (\"all\" or the items) or drop merge.")
        return estimator_for(estimator or "ml", incomplete=incomplete, information=information)
    if estimator not in (None, "dwls"):
        raise SpecificationError(f"Ordered items are fitted by estimator 'dwls', not {estimator!r}; drop estimator= or use dwls.")
    if incomplete != "full_information":
        raise SpecificationError("dwls uses complete cases; drop incomplete= (listwise is what dwls does).")
    items = structure.items if ordinal == "all" else tuple(str(i) for i in ordinal)
    unknown = [i for i in items if i not in structure.items]
    if unknown:
        raise SpecificationError(f"ordinal names {unknown[0]!r}, which is not an item of the structure.")
    frozen = None if merge is None else {str(k): tuple(tuple(float(x) for x in b) for b in v) for k, v in merge.items()}
    return estimator_for("dwls", ordinal=tuple(i for i in structure.items if i in items), merge=frozen,
                         information=information)


def statistics(data, structure: Structure, estimator: Estimator, *, group: str | None = None):
    """The estimator's per-group statistics of ``data`` (passed through when already computed)."""
    if isinstance(data, (SampleStats, OrdinalStats)):
        return data
    return estimator.statistics(data, structure.items, group)


def level_builder(structure: Structure, stats, *, reference: str | None = None,
                  fixed_means: Sequence[str] = ()) -> LevelBuilder:
    """The :class:`~invariance.model.levels.LevelBuilder` for these statistics (ordinal
    statistics give the ordinal levels)."""
    K = tuple(int(k) for k in stats.n_categories) if isinstance(stats, OrdinalStats) else None
    return LevelBuilder(structure, tuple(stats.names), reference, tuple(fixed_means), K)


def fit_levels(
    data,
    structure: Structure,
    levels: Sequence[str] | None = None,
    *,
    group: str | None = None,
    reference: str | None = None,
    released: Iterable[Release] = (),
    estimator: str | None = None,
    incomplete: str = "full_information",
    ordinal: str | Sequence[str] | None = None,
    merge: Mapping[str, Sequence[Sequence[float]]] | None = None,
    fixed_means: Sequence[str] = (),
    information: str = "expected",
) -> dict[str, FitResult]:
    """Fit several levels on the same statistics; returns level -> result.

    Parameters
    ----------
    data
        A pandas DataFrame (``group`` names the grouping column) or precomputed
        statistics (:class:`~invariance.data.SampleStats` or
        :class:`~invariance.data.ordinal_stats.OrdinalStats`).
    structure
        The measurement structure.
    levels
        Levels in order (default: every level of the item type).
    group, reference, released, fixed_means
        Grouping column, reference group, constraints released up front, factors whose
        means stay 0.
    estimator
        ``ml`` (default for continuous items), ``ml_robust`` or ``dwls`` (default with
        ``ordinal``).
    incomplete
        ``full_information`` (default; every case with an observed item, casewise
        likelihood) or ``listwise``: as the pipeline's ``data.incomplete``.
    ordinal, merge
        Ordered items (``"all"`` or their names; the others are continuous) and
        category merges, as the pipeline's ``data.ordinal`` and ``data.merge``.
    information
        ``expected`` (default) or ``observed`` information for ML standard errors.
    """
    est = make_estimator(structure, estimator=estimator, incomplete=incomplete, ordinal=ordinal, merge=merge,
                         information=information)
    stats = statistics(data, structure, est, group=group)
    builder = level_builder(structure, stats, reference=reference, fixed_means=fixed_means)
    released = tuple(released)
    fits: dict[str, FitResult] = {}
    prev = None
    for lv in (builder.levels if levels is None else levels):
        spec = builder.build(lv, released)
        # each level starts from the previous level's estimates (by label)
        start = est.warm_start(prev, spec, stats) if prev is not None and prev.converged else None
        fits[lv] = prev = est.fit(spec, stats, start=start)
    return fits


def fit_level(data, structure: Structure, level: str = "configural", **options) -> FitResult:
    """Fit one level; the options are those of :func:`fit_levels`."""
    return fit_levels(data, structure, (level,), **options)[level]


def compare_levels(fits: Mapping[str, FitResult], stats, *, estimator: Estimator | None = None) -> list[dict]:
    """The estimator's difference test between consecutive fitted levels (in the order given).

    Returns one dict per step: ``free``, ``restricted`` and the fields of
    :class:`~invariance.estimate.interface.Difference`.
    """
    names = list(fits)
    out = []
    for a, b in zip(names[:-1], names[1:]):
        est = estimator if estimator is not None else estimator_for(fits[b].estimator)
        d = est.difference(fits[b], fits[a], stats)
        out.append({"free": a, "restricted": b, **d.__dict__})
    return out
