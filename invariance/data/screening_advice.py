"""The plain recommendation drawn from per-group screening records.

The rules and their sources are in :mod:`invariance.data.screening` (module docstring
and ``SCREENING_RULES``); this module only reads the records that
:func:`~invariance.data.screening.screen` builds.
"""

from __future__ import annotations

from typing import Mapping, Sequence

__all__ = ["recommend"]


def _item_notes(it: dict, name: str, rules: Mapping[str, float]) -> list[str]:
    """Sentences on one item in one group: floor or ceiling, item-total correlation, absent categories."""
    notes = []
    for side in ("floor", "ceiling"):
        if it[side] is not None and it[side] > rules["floor_ceiling_share"]:
            notes.append(
                f"Item {it['item']} has {100 * it[side]:.0f}% of its values at the {side} in group {name}; "
                "scores near that end are measured poorly."
            )
    for scale, r in (it.get("item_total") or {}).items():
        if r is not None and r < rules["item_total_min"]:
            notes.append(
                f"Item {it['item']} correlates {r:.2f} with the rest of scale {scale} in group {name} "
                f"(below {rules['item_total_min']:.2f}); check its wording, scoring direction or fit to the scale."
            )
    if it.get("absent_categories"):
        notes.append(
            f"Item {it['item']} has no case in category {', '.join(map(str, it['absent_categories']))} "
            f"in group {name}; merge categories before an ordinal multi-group model."
        )
    return notes


def _headline(
    kurt_groups: list[str], item_flags: list[str], ordinal: dict[str, int], any_missing: bool,
    rules: Mapping[str, float],
) -> list[str]:
    """The leading sentences: estimator, ordered-categorical items, missing values."""
    head = []
    if kurt_groups or item_flags:
        why = []
        if kurt_groups:
            why.append("multivariate kurtosis is marked in group " + ", ".join(kurt_groups))
        if item_flags:
            why.append("items are strongly skewed or kurtotic: " + ", ".join(item_flags))
        head.append(
            "Use robust ML (estimator: ml_robust; scaled test statistics, sandwich standard errors): "
            + "; ".join(why)
            + "."
        )
    else:
        head.append("Normal-theory ML is reasonable: no marked multivariate kurtosis and no extreme item.")
    if ordinal:
        head.append(
            "Treat as ordered categories (fewer than "
            f"{int(rules['ordinal_below_categories'])} categories): " + ", ".join(sorted(ordinal)) + "."
        )
    if any_missing:
        head.append(
            "Some values are missing: prefer full-information ML (data.incomplete: full_information) to complete cases."
        )
    return head


def recommend(groups: Sequence[dict], *, rules: Mapping[str, float]) -> dict:
    """Plain recommendation from per-group screening records (see :func:`~invariance.data.screening.screen`).

    Returns
    -------
    dict
        ``estimator`` (``ml`` or ``ml_robust``), ``ordinal_items``, ``missing``
        (``listwise`` or ``full_information``; the names of the pipeline's
        ``estimator`` and ``data.incomplete`` keys), and ``notes`` (one sentence each).
    """
    notes: list[str] = []
    kurt_groups, item_flags = [], []
    ordinal: dict[str, int] = {}
    any_missing = False
    for g in groups:
        name = g["group"]
        mm = g.get("mardia")
        if mm and mm["kurtosis_p"] < rules["mardia_alpha"] and mm["kurtosis_relative"] > rules["relative_kurtosis"]:
            kurt_groups.append(name)
        for it in g["items"]:
            if it["missing"] and it["missing"] > 0:
                any_missing = True
            sk, ku = it["skewness"], it["kurtosis"]
            if (sk is not None and abs(sk) > rules["item_skewness"]) or (ku is not None and ku > rules["item_kurtosis"]):
                item_flags.append(f"{it['item']} ({name})")
            k = it["n_categories"]
            if 0 < k < rules["ordinal_below_categories"]:
                ordinal[it["item"]] = max(ordinal.get(it["item"], 0), k)
            notes += _item_notes(it, name, rules)
        if g["n"] < rules["small_group"]:
            notes.append(
                f"Group {name} has {g['n']} cases (under {int(rules['small_group'])}); every test on it will be weak."
            )
    return {
        "estimator": "ml_robust" if (kurt_groups or item_flags) else "ml",
        "ordinal_items": sorted(ordinal),
        "missing": "full_information" if any_missing else "listwise",
        "kurtosis_groups": kurt_groups,
        "notes": _headline(kurt_groups, item_flags, ordinal, any_missing, rules) + notes,
    }
