"""Comparing nested invariance levels and deciding whether each level holds.

Changes are restricted minus free (METHODS section 5): the chi-square difference
dT = T_restricted - T_free on ddf degrees of freedom, and the changes in CFI, RMSEA
and SRMR. A criterion passes when

* ``chi2``: the p value of dT is at least ``alpha``;
* ``cfi``: dCFI > -cutoff (Cheung & Rensvold 2002: dCFI <= -0.01 signals noninvariance);
* ``rmsea``: dRMSEA < cutoff;
* ``srmr``: dSRMR < cutoff (Chen 2007 uses a larger cutoff at the loading step).

With ``combine="all"`` (default) a level holds when every listed criterion passes.
With ``combine="paired"`` (Chen 2007's joint reading) it fails only when the CFI change
fails together with at least one of the other listed approximate criteria; a listed
``chi2`` criterion must pass in either case.

Preset cutoffs (:data:`PRESETS`):

``chen2007``
    Chen (2007), total N > 300 with balanced groups: dCFI 0.010, dRMSEA 0.015,
    dSRMR 0.030 (loadings) and 0.010 (intercepts, residuals). The default.
``chen2007_small``
    Chen (2007), N <= 300 or unbalanced groups: dCFI 0.005, dRMSEA 0.010,
    dSRMR 0.025 (loadings) and 0.005 (intercepts, residuals).
``cheung_rensvold2002``
    Cheung & Rensvold (2002): dCFI 0.010 only.

How a decision is shown (:func:`shown_comparison`): decisions are taken at full
precision (differences rounded to 10 decimals only to absorb floating-point noise, so
0.940 - 0.950 counts as -0.010). The change and its cutoff are then printed with the
same number of decimals, at least three and as many more as the shown numbers need to
satisfy the inequality that decided, which is printed with them: a dCFI of -0.00996
reads "-0.00996 > -0.010", never "-0.010 > -0.010". A printed comparison is therefore
always true of the printed numbers.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

from scipy import special as _sp

from ..errors import SpecificationError

__all__ = [
    "CRITERIA",
    "PRESETS",
    "DecisionRule",
    "make_rule",
    "rule_from_section",
    "shown_comparison",
    "level_delta",
    "judge_step",
    "judge_configural",
    "describe_check",
]

CRITERIA = ("chi2", "cfi", "rmsea", "srmr")
STEP_LEVELS = ("metric", "scalar", "strict")


def _per_level(value) -> dict[str, float]:
    if isinstance(value, Mapping):
        return {k: float(v) for k, v in value.items()}
    return {lv: float(value) for lv in STEP_LEVELS}


#: Preset name -> (source, default criteria, cutoffs by criterion and level).
PRESETS: dict[str, tuple[str, tuple[str, ...], dict[str, dict[str, float]]]] = {
    "chen2007": (
        "Chen (2007) cutoffs for total N > 300 with balanced groups",
        ("cfi", "rmsea"),
        {
            "cfi": _per_level(0.010),
            "rmsea": _per_level(0.015),
            "srmr": {"metric": 0.030, "scalar": 0.010, "strict": 0.010},
        },
    ),
    "chen2007_small": (
        "Chen (2007) cutoffs for N <= 300 or unbalanced groups",
        ("cfi", "rmsea"),
        {
            "cfi": _per_level(0.005),
            "rmsea": _per_level(0.010),
            "srmr": {"metric": 0.025, "scalar": 0.005, "strict": 0.005},
        },
    ),
    "cheung_rensvold2002": (
        "Cheung & Rensvold (2002) cutoff",
        ("cfi",),
        {"cfi": _per_level(0.010)},
    ),
}

#: Default absolute fit the configural model needs (common practice).
CONFIGURAL_FIT = {"cfi": 0.90, "rmsea": 0.10}
#: Inequalities of the configural model's absolute fit (passes, fails).
_ABSOLUTE = {"cfi": (">=", "<"), "rmsea": ("<=", ">")}


@dataclass(frozen=True)
class DecisionRule:
    """How a level is judged against the previous accepted one.

    Attributes
    ----------
    criteria
        Criteria that decide, from :data:`CRITERIA`.
    combine
        ``all`` or ``paired`` (see the module docstring).
    alpha
        Significance level of the chi-square difference test.
    cutoffs
        Criterion -> level -> allowed change.
    source
        Where the cutoffs come from (named in the output).
    configural_fit
        Absolute fit the configural model needs: ``cfi`` (minimum) and ``rmsea`` (maximum).
    preset_criteria
        Deciding approximate-fit criteria whose cutoffs come from a published preset
        (calibrated for ML on continuous items), not from the user.
    """

    criteria: tuple[str, ...]
    combine: str
    alpha: float
    cutoffs: Mapping[str, Mapping[str, float]]
    source: str
    configural_fit: Mapping[str, float]
    preset_criteria: tuple[str, ...] = ()

    def cutoff(self, criterion: str, level: str) -> float:
        return self.cutoffs[criterion][level]

    def describe(self) -> str:
        """One sentence naming the rule, for the output."""
        parts = []
        for c in self.criteria:
            if c == "chi2":
                parts.append(f"chi-square difference p >= {self.alpha:g}")
                continue
            vals = self.cutoffs[c]
            sign = "change >" if c == "cfi" else "change <"
            lo = f"-{vals['metric']:.3f}" if c == "cfi" else f"{vals['metric']:.3f}"
            if len({round(v, 10) for v in vals.values()}) == 1:
                parts.append(f"{c.upper()} {sign} {lo}")
            else:
                txt = ", ".join(f"{('-' if c == 'cfi' else '')}{v:.3f} ({lv})" for lv, v in vals.items())
                parts.append(f"{c.upper()} {sign} {txt}")
        how = "every criterion passes" if self.combine == "all" else (
            "the CFI change or every other criterion passes (Chen 2007 pairing)"
        )
        return f"{self.source}; a level holds when {how}: " + "; ".join(parts)

    def to_dict(self) -> dict:
        return {
            "criteria": list(self.criteria),
            "combine": self.combine,
            "alpha": self.alpha,
            "cutoffs": {c: dict(v) for c, v in self.cutoffs.items()},
            "source": self.source,
            "configural_fit": dict(self.configural_fit),
            "preset_criteria": list(self.preset_criteria),
            "rule": self.describe(),
        }


def make_rule(
    *,
    criteria: Sequence[str] | None = None,
    combine: str = "all",
    alpha: float = 0.05,
    cutoffs: str | Mapping | None = None,
    configural_fit: Mapping[str, float] | None = None,
) -> DecisionRule:
    """Build a :class:`DecisionRule` from pipeline values (defaults: Chen 2007).

    ``cutoffs`` is a preset name from :data:`PRESETS` or a mapping criterion -> number
    (every step) or criterion -> {level: number}; criteria without a cutoff in the
    mapping take the Chen (2007) value.
    """
    if cutoffs is None or isinstance(cutoffs, str):
        name = cutoffs or "chen2007"
        if name not in PRESETS:
            raise SpecificationError(f"Unknown cutoff preset {name!r}; use one of {', '.join(PRESETS)}.")
        source, default_criteria, table = PRESETS[name]
        table = {c: dict(v) for c, v in table.items()}
        given = ()
    else:
        base = PRESETS["chen2007"][2]
        table = {c: dict(v) for c, v in base.items()}
        for c, v in cutoffs.items():
            table[c] = {**table.get(c, {}), **_per_level(v)}
        given = tuple(sorted(cutoffs))
        source = f"user cutoffs for {', '.join(given)} (others from Chen 2007)"
        default_criteria = PRESETS["chen2007"][1]
    crit = tuple(criteria) if criteria else default_criteria
    for c in crit:
        if c not in CRITERIA:
            raise SpecificationError(f"Unknown criterion {c!r}; use any of {', '.join(CRITERIA)}.")
        if c != "chi2" and c not in table:
            raise SpecificationError(
                f"The cutoffs ({source}) give no value for criterion {c!r}; add decision.cutoffs.{c} "
                "or drop it from decision.criteria."
            )
    for c in table:
        missing = [lv for lv in STEP_LEVELS if lv not in table[c]]
        for lv in missing:
            table[c][lv] = PRESETS["chen2007"][2][c][lv]
    if combine not in ("all", "paired"):
        raise SpecificationError(f"decision.combine must be 'all' or 'paired'; got {combine!r}.")
    cf = dict(CONFIGURAL_FIT)
    cf.update(configural_fit or {})
    return DecisionRule(
        criteria=crit,
        combine=combine,
        alpha=float(alpha),
        cutoffs={c: dict(v) for c, v in table.items()},
        source=source,
        configural_fit=cf,
        preset_criteria=tuple(c for c in crit if c != "chi2" and c not in given),
    )


def rule_from_section(section: Mapping | None, *, alpha: float = 0.05) -> DecisionRule:
    """The decision rule of a ``decision:`` section (pipeline file or planning file).

    The one reading of those keys: ``run`` and ``plan`` both call it, so a plan judges
    each step with exactly the rule a run would (defaults: Chen 2007 cutoffs, criteria
    ``cfi`` and ``rmsea``, every criterion must pass). ``alpha`` is the default of the
    section's ``alpha``.
    """
    dec = dict(section or {})
    return make_rule(
        criteria=dec.get("criteria"),
        combine=dec.get("combine", "all"),
        alpha=dec.get("alpha", alpha),
        cutoffs=dec.get("cutoffs"),
        configural_fit=dec.get("configural_fit"),
    )


def level_delta(restricted: Mapping, free: Mapping) -> dict:
    """Changes from the free to the restricted level (restricted minus free).

    Parameters
    ----------
    restricted, free
        Fit statistics with at least ``chi2``, ``df``, ``cfi``, ``rmsea``, ``srmr``.

    Returns
    -------
    dict
        ``chi2``, ``df``, ``pvalue`` of the chi-square difference and the changes in
        ``cfi``, ``rmsea``, ``srmr``.
    """
    dchi = float(restricted["chi2"]) - float(free["chi2"])
    ddf = int(restricted["df"]) - int(free["df"])
    p = float(_sp.chdtrc(ddf, max(dchi, 0.0))) if ddf > 0 else None

    def diff(k):
        a, b = restricted.get(k), free.get(k)
        return None if a is None or b is None else float(a) - float(b)

    return {"chi2": dchi, "df": ddf, "pvalue": p, "cfi": diff("cfi"), "rmsea": diff("rmsea"), "srmr": diff("srmr")}


#: Inequality that holds when a criterion passes, and the one shown when it fails.
_RELATIONS = {"cfi": (">", "<="), "rmsea": ("<", ">="), "srmr": ("<", ">="), "chi2": (">=", "<")}
_HOLDS = {
    ">": lambda a, b: a > b, ">=": lambda a, b: a >= b, "<": lambda a, b: a < b, "<=": lambda a, b: a <= b,
}


def shown_comparison(value: float, cutoff: float, relation: str, *, min_digits: int = 3) -> tuple[str, str]:
    """``value`` and ``cutoff`` as text for a decision taken by ``relation`` (``>``,
    ``>=``, ``<``, ``<=``), which holds between them; see the module docstring.

    The cutoff gets the fewest decimals (at least ``min_digits``) that show it exactly;
    the value the fewest (at least ``min_digits``) for which the shown value and the shown
    cutoff still satisfy ``relation``. Decisions compare numbers rounded to 10 decimals,
    so 10 decimals always suffice.
    """
    a, b = round(float(value), 10), round(float(cutoff), 10)
    vb = next(f"{b:.{d}f}" for d in range(min_digits, 11) if float(f"{b:.{d}f}") == b or d == 10)
    for d in range(min_digits, 11):
        va = f"{a:.{d}f}"
        if _HOLDS[relation](float(va), float(vb)):
            return (va.lstrip("-") if float(va) == 0 else va), vb
    return repr(a), vb


def _comparison(criterion: str, value: float, cutoff: float, passed: bool, relations=None) -> dict:
    rel = (relations or _RELATIONS)[criterion][0 if passed else 1]
    if criterion == "chi2" and value < 0.001 and cutoff >= 0.001:
        return {"value_text": "< 0.001", "relation": rel, "cutoff_text": f"{cutoff:g}"}
    va, vb = shown_comparison(value, cutoff, rel)
    if relations is None and criterion != "chi2" and float(va) > 0:
        va = "+" + va  # a change: signed
    return {"value_text": va, "relation": rel, "cutoff_text": vb}


def _check(criterion: str, delta: Mapping, level: str, rule: DecisionRule) -> dict:
    if criterion == "chi2":
        p = delta["pvalue"]
        passed = p is None or p >= rule.alpha
        out = {"criterion": "chi2", "value": p, "cutoff": rule.alpha, "passed": bool(passed)}
        return {**out, **(_comparison("chi2", p, rule.alpha, passed) if p is not None else {})}
    cut = rule.cutoff(criterion, level)
    signed = -cut if criterion == "cfi" else cut
    value = delta[criterion]
    if value is None:
        return {"criterion": criterion, "value": None, "cutoff": cut, "passed": True}
    v = round(value, 10)
    passed = v > -cut if criterion == "cfi" else v < cut
    out = {"criterion": criterion, "value": value, "cutoff": cut, "passed": bool(passed)}
    return {**out, **_comparison(criterion, value, signed, passed)}


def describe_check(c: Mapping, *, change: bool = True) -> str:
    """One check in words, with the shown comparison that decided it."""
    name = {"cfi": "CFI", "rmsea": "RMSEA", "srmr": "SRMR"}.get(c["criterion"], c["criterion"])
    if c["criterion"] == "chi2":
        if c["value"] is None:
            return "chi-square difference not testable (no df)"
        return f"chi-square difference p {'' if c['value_text'].startswith('<') else '= '}{c['value_text']} " \
               f"{c['relation']} {c['cutoff_text']}"
    if c.get("value_text") is None:
        return f"{'d' if change else ''}{name} not available"
    return f"{'d' if change else ''}{name} = {c['value_text']} {c['relation']} {c['cutoff_text']}"


def judge_step(delta: Mapping, level: str, rule: DecisionRule, *, converged: bool = True) -> dict:
    """Decide whether ``level`` holds given its changes from the previous accepted level.

    Returns
    -------
    dict
        ``decision`` (``holds`` or ``fails``), ``checks`` (one per criterion: criterion,
        value, cutoff, passed) and ``reason`` (one sentence).
    """
    if not converged:
        return {"decision": "fails", "checks": [], "reason": f"the {level} model did not converge"}
    checks = [_check(c, delta, level, rule) for c in rule.criteria]
    by = {c["criterion"]: c["passed"] for c in checks}
    if rule.combine == "all":
        holds = all(by.values())
    else:
        others = [by[c] for c in ("rmsea", "srmr") if c in by]
        approx_fail = ("cfi" in by and not by["cfi"]) and (not others or not all(others))
        if "cfi" not in by:
            approx_fail = bool(others) and not all(others)
        holds = not approx_fail and by.get("chi2", True)
    text = "; ".join(describe_check(c) for c in checks)
    return {"decision": "holds" if holds else "fails", "checks": checks, "reason": text}


def judge_configural(fit: Mapping, rule: DecisionRule, *, converged: bool = True, problems: Sequence[str] = ()) -> dict:
    """Decide whether the configural model is acceptable (absolute fit, proper solution)."""
    if not converged:
        return {"decision": "fails", "checks": [], "reason": "the configural model did not converge"}
    checks = []
    for crit, bound, rel in (("cfi", rule.configural_fit.get("cfi"), _ABSOLUTE["cfi"]),
                             ("rmsea", rule.configural_fit.get("rmsea"), _ABSOLUTE["rmsea"])):
        if bound is None or fit.get(crit) is None:
            continue
        passed = _HOLDS[rel[0]](round(float(fit[crit]), 10), float(bound))
        checks.append({"criterion": crit, "value": fit[crit], "cutoff": bound, "passed": bool(passed),
                       **_comparison(crit, fit[crit], bound, passed, _ABSOLUTE)})
    improper = [p for p in problems if not p.startswith("not converged")]
    holds = all(c["passed"] for c in checks) and not improper
    parts = [describe_check(c, change=False) for c in checks]
    if improper:
        parts.append("improper solution: " + "; ".join(improper))
    return {
        "decision": "holds" if holds else "fails",
        "checks": checks,
        "reason": "; ".join(parts) + " (absolute fit, common practice)",
    }
