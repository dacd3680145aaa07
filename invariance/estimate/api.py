"""Convenience functions over the engine: fit levels straight from a DataFrame."""

from __future__ import annotations

from typing import Iterable, Sequence

from ..data.moments import SampleStats, sample_stats
from .ml import fit
from ..model.levels import LEVELS, build_level
from ..model.spec import Release
from ..model.structure import Structure
from .result import FitResult

__all__ = ["fit_level", "fit_levels"]


def _stats(data, structure: Structure, group: str | None, missing: str = "listwise") -> SampleStats:
    if isinstance(data, SampleStats):
        return data
    return sample_stats(data, structure.items, group, missing=missing)


def fit_level(
    data,
    structure: Structure,
    level: str = "configural",
    *,
    group: str | None = None,
    reference: str | None = None,
    released: Iterable[Release] = (),
    information: str = "expected",
    estimator: str = "ml",
    missing: str = "listwise",
) -> FitResult:
    """Fit one invariance level.

    Parameters
    ----------
    data
        A pandas DataFrame (with ``group`` naming the grouping column) or
        precomputed :class:`~invariance.data.SampleStats`.
    structure
        The measurement structure.
    level
        ``configural``, ``metric``, ``scalar`` or ``strict``.
    group, reference, released, information
        Grouping column, reference group, constraints released up front, and the
        information used for standard errors.
    estimator
        ``"ml"`` or ``"ml_robust"`` (see :func:`invariance.estimate.fit`).
    missing
        ``"listwise"`` (default) or ``"fiml"`` (full-information ML) for a DataFrame.
    """
    stats = _stats(data, structure, group, missing)
    spec = build_level(structure, stats.names, level, reference=reference, released=released)
    return fit(spec, stats, information=information, estimator=estimator)


def fit_levels(
    data,
    structure: Structure,
    levels: Sequence[str] = LEVELS,
    *,
    group: str | None = None,
    reference: str | None = None,
    released: Iterable[Release] = (),
    estimator: str = "ml",
    missing: str = "listwise",
) -> dict[str, FitResult]:
    """Fit several levels on the same statistics; returns level -> result.

    ``estimator`` and ``missing`` as in :func:`fit_level`.
    """
    stats = _stats(data, structure, group, missing)
    released = tuple(released)
    return {
        lv: fit(build_level(structure, stats.names, lv, reference=reference, released=released), stats, estimator=estimator)
        for lv in levels
    }
