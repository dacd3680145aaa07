"""Flagged items: the measurement releases of a run, sized on the final model.

Plain records for results.json and the report. Each record names the item, the
parameter kind, its factor (loadings), the groups freed, the level where it was released,
the test statistic with its df and p-value (the score test, and the likelihood-ratio
statistic when the release was verified by a refit), and the effect size: dMACS of the
item in each group against the reference (Nye & Drasgow 2011), computed on the final
measurement model when intercepts are constrained there (scalar or strict, partial or
not), otherwise left empty; and ``differs_in``, the groups whose released estimate
differs from the others (:func:`invariance.partial.locate.differs_in`).
"""

from __future__ import annotations

from typing import Iterable

from ..data.moments import SampleStats
from ..effects.dmacs import item_effects
from ..estimate.result import FitResult
from .locate import differs_in
from .search import SearchResult

__all__ = ["ITEM_PARAMETERS", "flagged_items"]

#: Parameter kinds that belong to an item (a release of one flags the item).
ITEM_PARAMETERS = ("loading", "intercept", "residual", "residual_cov")


def flagged_items(
    searches: Iterable[SearchResult],
    stats: SampleStats,
    *,
    final: FitResult | None = None,
) -> list[dict]:
    """One record per released item parameter, in release order.

    Parameters
    ----------
    searches
        The release searches of the measurement levels, in level order.
    stats
        The statistics (continuous items: the pooled SDs of dMACS; ordinal statistics
        leave ``dmacs`` empty, their effects are reported per item by the effects stage).
    final
        The final accepted measurement model (default: the last search's final fit).

    Returns
    -------
    list of dict
        Keys ``item``, ``parameter``, ``factor``, ``groups``, ``level``, ``test``,
        ``statistic``, ``df``, ``pvalue``, ``adjusted_pvalue``, ``lr_statistic``,
        ``lr_pvalue``, ``epc``, ``dmacs`` (group -> value), ``dmacs_max`` and
        ``differs_in`` (groups, ``None`` when not located).
    """
    searches = list(searches)
    if final is None and searches:
        final = searches[-1].fit
    sized = {}
    if isinstance(stats, SampleStats) and final is not None and final.level.startswith(("scalar", "strict")):
        for e in item_effects(final, stats):
            sized.setdefault(e.item, {})[e.group] = e.dmacs
    out = []
    for s in searches:
        for r in s.releases:
            if r.parameter not in ITEM_PARAMETERS:
                continue
            d = sized.get(r.item, {}) if r.parameter in ("loading", "intercept") else {}
            where = differs_in(final, r.to_dict()) if final is not None else None
            out.append({
                "item": r.item,
                "parameter": r.parameter,
                "factor": r.factor,
                "groups": list(r.groups),
                "level": r.level,
                "test": r.test,
                "statistic": r.statistic,
                "df": r.df,
                "pvalue": r.pvalue,
                "adjusted_pvalue": r.adjusted_pvalue,
                "lr_statistic": r.lr_statistic,
                "lr_pvalue": r.lr_pvalue,
                "epc": [{"group": g, "epc": e, "epc_std": z} for g, e, z in r.epc],
                "dmacs": dict(d),
                "dmacs_max": max(d.values()) if d else None,
                "differs_in": None if where is None else list(where),
            })
    return out
