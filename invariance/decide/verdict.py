"""The verdict of a run: which level the data support, how fully, and what it permits.

Computed once, from plain level rows (the ``levels`` entries of results.json) and the
constraints released up front, by :func:`build_verdict`; the console, results.json, the
report and the batch summary all read the frozen :class:`Verdict` (or its
:meth:`Verdict.to_dict` fields) instead of deciding again.

What a level row may carry (read with ``.get``): ``level``, ``decision`` (``holds``,
``holds_partially``, ``fails``, ``not_tested``), ``converged``, ``problems``, ``released``
(every release of the row's model: ``parameter``, ``item``, ``factor``, ``groups``, and
optionally ``source`` = ``pipeline`` / ``carried`` / ``search`` and ``level``) and
``constrained``: when releases were made at this level, the row of the fully constrained
model (fit statistics, ``delta``, ``decision``, ``checks``, ``reason``) before them.

The supported level is the last level of the unbroken run of ``holds`` /
``holds_partially`` from the first level. It holds *partially* when its model releases any
constraint at or below it (:data:`CONSTRAINED_AT`), found by the search or named in
``model.released``; the configural level constrains nothing across groups and is never
partial.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

from .compare import DecisionRule

__all__ = [
    "CONSTRAINED_AT",
    "PERMITS",
    "PARTIAL_PERMITS",
    "Released",
    "Verdict",
    "build_verdict",
    "calibration_note",
    "constrained_record",
    "display_rows",
    "is_partial",
    "supported_level",
    "where_text",
]

#: Measurement levels in order (``thresholds`` only for ordered items).
ORDER = ("configural", "thresholds", "metric", "scalar", "strict")

#: Parameter kind -> the level that first holds it equal across groups.
CONSTRAINED_AT = {
    "threshold": "thresholds", "loading": "metric", "path": "metric", "intercept": "scalar",
    "mean": "scalar", "residual": "strict", "residual_cov": "strict",
}

HOLDS = ("holds", "holds_partially")

#: How a level is named in a sentence ("threshold invariance").
_NAMES = {"thresholds": "threshold"}

#: What each supported level permits when comparing groups.
PERMITS = {
    None: "no group comparison: not even the configural model is supported, so the "
    "questionnaire may not measure the same thing in every group",
    "configural": "the same factor structure holds in every group; no group comparison of "
    "scores, relations or means is justified",
    "thresholds": "thresholds are equal (ordered items): the response categories divide the latent "
    "responses alike in every group; no group comparison of scores, relations or means is justified yet",
    "metric": "loadings are equal: relations (correlations, regressions, covariances) of the "
    "factors can be compared across groups, but not their means",
    "scalar": "loadings and intercepts are equal: latent (factor) means can be compared across groups",
    "strict": "loadings, intercepts and residual variances are equal: observed sum scores can be "
    "compared across groups, as well as latent means",
}

#: What a partially supported level permits (the released parameters are group-specific).
PARTIAL_PERMITS = {
    "thresholds": PERMITS["thresholds"].replace("thresholds are equal", "thresholds are equal except the released ones"),
    "metric": "loadings are equal except the released ones: relations (correlations, regressions, "
    "covariances) of the factors can be compared across groups, but not their means",
    "scalar": "loadings and intercepts are equal except the released ones: latent (factor) means can be "
    "compared across groups, anchored on the items held equal; observed sum scores cannot "
    "(they need strict invariance)",
    "strict": "loadings, intercepts and residual variances are equal except the released ones: latent "
    "means can be compared across groups, and observed sum scores only over the items with no "
    "released parameter",
}

#: Common practice (Byrne, Shavelson & Muthen 1989): a partial comparison of latent means
#: needs at least this many items per factor with equal loading and intercept.
MIN_ANCHORS = 2


def supported_level(rows: Sequence[Mapping]) -> str | None:
    """The last level of the unbroken run of ``holds`` / ``holds_partially`` from the first."""
    best = None
    for r in rows:
        if r.get("decision") not in HOLDS:
            break
        best = r.get("level")
    return best


def _rank(level: str) -> int:
    return ORDER.index(level) if level in ORDER else len(ORDER)


def _counts_at(release: Mapping, level: str) -> bool:
    """Whether a release frees a constraint that ``level`` (or a level below it) imposes
    (a record that names no parameter counts at every level but configural)."""
    if level == "configural":
        return False
    if release.get("parameter") is None:
        return True
    at = CONSTRAINED_AT.get(str(release.get("parameter")))
    return at is not None and _rank(at) <= _rank(level)


def is_partial(row: Mapping) -> bool:
    """Whether a level row's model releases a constraint at or below its level."""
    return any(_counts_at(r, str(row.get("level"))) for r in row.get("released") or ())


def _key(r: Mapping) -> tuple:
    return (r.get("parameter"), r.get("item"), r.get("factor"))


def _same(a: Mapping, b: Mapping) -> bool:
    """The same released parameter (a factor left unnamed matches the one resolved)."""
    fa, fb = a.get("factor"), b.get("factor")
    return _key(a)[:2] == _key(b)[:2] and (fa is None or fb is None or fa == fb)


def where_text(groups: Sequence[str] | None, differs: Sequence[str] | None) -> str:
    """Where a released parameter differs: ``differs in mesa``, ``differs between a and b``
    (two groups), else the groups it was released in."""
    if differs is None:
        return "released in every group" if not groups else "released in " + ", ".join(groups)
    if not differs:
        return "released in every group; no single group stands out"
    if len(differs) == 2 and groups is not None and len(groups) == 2:
        return f"differs between {differs[0]} and {differs[1]}"
    return "differs in " + ", ".join(differs)


@dataclass(frozen=True)
class Released:
    """One released constraint the supported level rests on.

    ``source``: ``pipeline`` (``model.released``), ``search`` (found by the release
    search, at ``level``); ``differs_in``: the groups whose estimate differs from the
    others (``None`` when not located, empty when no single group stands out).
    """

    parameter: str
    item: str
    factor: str | None
    groups: tuple[str, ...] | None
    source: str
    level: str | None = None
    differs_in: tuple[str, ...] | None = None

    def describe(self) -> str:
        """``the intercept of so03 (differs in mesa)``."""
        on = f" on {self.factor}" if self.factor else ""
        if self.source == "pipeline":
            where = "every group" if not self.groups else ", ".join(self.groups)
            return f"the {self.parameter} of {self.item}{on} (released in model.released, {where})"
        return f"the {self.parameter} of {self.item}{on} ({where_text(self.groups, self.differs_in)})"

    def to_dict(self) -> dict:
        return {"parameter": self.parameter, "item": self.item, "factor": self.factor,
                "groups": None if self.groups is None else list(self.groups), "source": self.source,
                "level": self.level, "differs_in": None if self.differs_in is None else list(self.differs_in)}


@dataclass(frozen=True)
class Verdict:
    """The verdict of a run (see the module docstring); :meth:`to_dict` gives the
    results.json keys ``supported_level``, ``supported_partially``,
    ``released_constraints``, ``permits``, ``verdict``, ``cutoff_calibration``, ``next_step``."""

    supported_level: str | None
    supported_partially: bool
    released: tuple[Released, ...]
    text: str
    permits: str
    calibration: str | None = None
    next_step: str | None = None

    @property
    def label(self) -> str:
        """``partial scalar``, ``strict`` or ``none``."""
        if self.supported_level is None:
            return "none"
        return ("partial " if self.supported_partially else "") + self.supported_level

    def to_dict(self) -> dict:
        return {
            "supported_level": self.supported_level,
            "supported_partially": self.supported_partially,
            "released_constraints": [r.to_dict() for r in self.released],
            "permits": self.permits,
            "verdict": self.text,
            "cutoff_calibration": self.calibration,
            "next_step": self.next_step,
        }


def _released(rows: Sequence[Mapping], row: Mapping, up_front: Sequence[Mapping],
              differs: Mapping[tuple, Sequence[str]]) -> tuple[Released, ...]:
    """The releases of the supported row that count at its level, with where each was found."""
    found_at, found_in = {}, {}
    for r in rows:
        for x in r.get("released") or ():
            if x.get("source") == "search":
                found_at.setdefault(_key(x), x.get("level") or r.get("level"))
                found_in.setdefault(_key(x), x.get("groups"))
    out, seen = [], set()
    level = str(row.get("level"))
    for x in row.get("released") or ():
        if not _counts_at(x, level) or _key(x) in seen:
            continue
        seen.add(_key(x))
        source = "pipeline" if any(_same(x, u) for u in up_front) else "search"
        g = x.get("groups") if x.get("groups") is not None else found_in.get(_key(x))  # carried: as found
        d = differs.get(_key(x))
        out.append(Released(
            parameter=str(x.get("parameter")), item=str(x.get("item")), factor=x.get("factor"),
            groups=None if g is None else tuple(str(v) for v in g), source=source,
            level=found_at.get(_key(x)) if source == "search" else None,
            differs_in=None if d is None else tuple(d),
        ))
    return tuple(out)


def _bias_text(released: Sequence[Released], scale_bias: Sequence[Mapping], reference: str | None) -> str:
    """The sum-score bias of each scale with a released item (largest group), in words."""
    items = {r.item for r in released if r.parameter in ("loading", "intercept", "threshold")}
    worst: dict[str, Mapping] = {}
    for b in scale_bias:
        if items & set(b.get("items") or ()) and b.get("bias") is not None:
            s = str(b.get("scale"))
            if s not in worst or abs(b["bias"]) > abs(worst[s]["bias"]):
                worst[s] = b
    if not worst:
        return ""
    ref = f" against {reference}" if reference else ""
    parts = [f"{s} {b['bias']:+.2f} in {b['group']}" for s, b in worst.items()]
    return (f"a sum over every item of a scale is biased by the released parameters (expected raw-point "
            f"difference at equal latent values{ref}, largest group per scale: {', '.join(parts)})")


def _clean_items(released: Sequence[Released], scales: Mapping[str, Sequence[str]]) -> str:
    """The items with no released parameter, per scale, in words."""
    bad = {r.item for r in released}
    parts = []
    for s, its in scales.items():
        keep = [i for i in its if i not in bad]
        if len(keep) < len(its):
            parts.append(f"{s}: {', '.join(keep) if keep else 'none'}")
    return "; ".join(parts)


def _anchor_note(released: Sequence[Released], scales: Mapping[str, Sequence[str]]) -> str:
    """Factors whose mean rests on fewer than :data:`MIN_ANCHORS` invariant items."""
    loose = {r.item for r in released if r.parameter in ("loading", "intercept", "threshold")}
    few = [s for s, its in scales.items() if len([i for i in its if i not in loose]) < MIN_ANCHORS]
    if not few:
        return ""
    return (f" The mean of {', '.join(few)} rests on fewer than {MIN_ANCHORS} items with equal loading and "
            "intercept, so it is not comparable (common practice; Byrne, Shavelson & Muthen 1989).")


def _partial_text(level: str, released: Sequence[Released], scales, scale_bias, reference) -> str:
    names = "; ".join(r.describe() for r in released)
    n = len(released)
    text = (f"The data support partial {_NAMES.get(level, level)} invariance, resting on {n} released constraint"
            f"{'s' if n != 1 else ''}: {names}. This permits: {PARTIAL_PERMITS.get(level, PERMITS.get(level, ''))}")
    if level == "strict":
        clean = _clean_items(released, scales)
        text += f" ({clean})" if clean else ""
    bias = _bias_text(released, scale_bias, reference) if level in ("scalar", "strict") else ""
    text += f"; {bias}." if bias else "."
    if level in ("scalar", "strict"):
        text += _anchor_note(released, scales)
    return text


def _estimation_failed(rows: Sequence[Mapping]) -> Mapping | None:
    """The first level that did not hold because it could not be estimated properly."""
    bad = next((r for r in rows if r.get("decision") not in HOLDS), None)
    if bad is None:
        return None
    improper = bad.get("level") == "configural" and any(
        not str(p).startswith("not converged") for p in bad.get("problems") or ())
    return bad if bad.get("converged") is False or improper else None


def _next_step(rows: Sequence[Mapping], partial_enabled: bool) -> str | None:
    """Name the release search when a measurement level failed and it was not used."""
    if partial_enabled:
        return None
    bad = next((r for r in rows if r.get("decision") == "fails"), None)
    if bad is None or bad.get("level") == "configural" or bad.get("converged") is False:
        return None
    lv = bad.get("level")
    return (f"The {lv} level failed. The release search can locate the constraints that differ across groups "
            f"and test partial {lv} invariance: add 'partial: {{enabled: true}}' to the pipeline file "
            "(options: alpha, correction, max_releases, until).")


def calibration_note(rule: DecisionRule, *, estimator: str, ordinal: bool = False) -> str | None:
    """Say when the cutoffs that decide were calibrated for another estimator or item type.

    The published cutoffs (Cheung & Rensvold 2002; Chen 2007) come from simulations of
    normal-theory ML on continuous, normal items (METHODS section 14). Under DWLS on
    ordered items, or with robust (scaled) indices, they are a rough guide only: Sass,
    Schmitt & Marsh (2014) found dCFI and dRMSEA behave differently under robust
    estimators. ``None`` when the run is ML on continuous items or the user set every
    deciding cutoff.
    """
    crit = [c for c in rule.preset_criteria if c != "chi2"]
    if not crit or (estimator not in ("dwls", "ml_robust") and not ordinal):
        return None
    names = ", ".join(f"d{c.upper()}" for c in crit)
    if estimator == "dwls" or ordinal:
        here = "this run uses DWLS on ordered-categorical items"
    else:
        here = "this run judges the robust (scaled) indices of robust ML"
    return (f"The cutoffs for {names} ({rule.source}) were calibrated for ML on continuous, normally "
            f"distributed items; {here}, for which they are a rough guide only (Sass, Schmitt & Marsh 2014 "
            "found that the changes in CFI and RMSEA behave differently under robust estimators). Set "
            "decision.cutoffs to cutoffs calibrated for your design if you have them.")


def build_verdict(
    rows: Sequence[Mapping],
    *,
    up_front: Sequence[Mapping] = (),
    scales: Mapping[str, Sequence[str]] | None = None,
    scale_bias: Sequence[Mapping] = (),
    reference: str | None = None,
    differs: Mapping[tuple, Sequence[str]] | None = None,
    calibration: str | None = None,
    partial_enabled: bool = False,
) -> Verdict:
    """The verdict of a run from its level rows.

    Parameters
    ----------
    rows
        The level rows, in order (see the module docstring).
    up_front
        The releases named in ``model.released`` (dicts with ``parameter``, ``item``,
        ``factor``, ``groups``).
    scales
        Scale name -> items (each factor's items; all items for a general factor): for
        the items a sum score may use.
    scale_bias
        The effects stage's ``scale_bias`` records (``scale``, ``items``, ``group``, ``bias``).
    reference
        The reference group.
    differs
        ``(parameter, item, factor)`` -> the groups whose estimate differs.
    calibration
        The note on the cutoffs' calibration (:func:`calibration_note`), if any.
    partial_enabled
        Whether the release search was on (else a failed level names it).
    """
    best = supported_level(rows)
    failed = _estimation_failed(rows)
    hint = _next_step(rows, partial_enabled)
    if best is None:
        text = ("The configural model did not converge to a proper solution, so no level could be judged: "
                "check the factor structure, the items and the group sizes before reading any result."
                if failed is not None else
                "The data do not support even configural invariance: " + PERMITS[None] + ".")
        return Verdict(None, False, (), text, PERMITS[None], calibration, hint)
    row = next(r for r in rows if r.get("level") == best)
    released = _released(rows, row, up_front, differs or {})
    partial = bool(released)
    if partial:
        text = _partial_text(best, released, scales or {}, scale_bias, reference)
        permits = PARTIAL_PERMITS.get(best, PERMITS.get(best, ""))
    else:
        permits = PERMITS.get(best, "")
        text = f"The data support {_NAMES.get(best, best)} invariance: {permits}."
    if failed is not None:
        text += (f" (The {failed.get('level')} model did not converge, so that step could not be judged; "
                 "a higher level may still hold.)")
    return Verdict(best, partial, released, text, permits, calibration, hint)


def display_rows(rows: Sequence[Mapping]) -> list[dict]:
    """The level rows as the tables show them: a level with releases made at it shows its
    fully constrained row, then its partial row; each row gets ``row_name`` (``scalar`` or
    ``partial scalar``) and ``partial`` (never true for configural)."""
    out = []
    for r in rows:
        con = r.get("constrained")
        if isinstance(con, Mapping):
            out.append({**r, **con, "released": [], "row_name": str(r.get("level")), "partial": False})
        partial = is_partial(r)
        name = ("partial " if partial else "") + str(r.get("level"))
        out.append({**{k: v for k, v in r.items() if k != "constrained"}, "row_name": name, "partial": partial})
    return out


def constrained_record(row: Mapping) -> dict:
    """The part of a level row kept as ``constrained`` when the search then releases constraints."""
    return {k: v for k, v in row.items() if k not in ("level", "released", "partial", "constrained")}
