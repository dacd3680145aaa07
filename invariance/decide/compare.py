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
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

from scipy import stats as _st

from ..errors import SpecificationError

__all__ = [
    "CRITERIA",
    "PRESETS",
    "PERMITS",
    "DecisionRule",
    "make_rule",
    "level_delta",
    "judge_step",
    "judge_configural",
    "supported_level",
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

#: Default absolute fit the configural model needs (common practice).
CONFIGURAL_FIT = {"cfi": 0.90, "rmsea": 0.10}


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
    """

    criteria: tuple[str, ...]
    combine: str
    alpha: float
    cutoffs: Mapping[str, Mapping[str, float]]
    source: str
    configural_fit: Mapping[str, float]

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
    else:
        base = PRESETS["chen2007"][2]
        table = {c: dict(v) for c, v in base.items()}
        for c, v in cutoffs.items():
            table[c] = {**table.get(c, {}), **_per_level(v)}
        given = ", ".join(sorted(cutoffs))
        source = f"user cutoffs for {given} (others from Chen 2007)"
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
    p = float(_st.chi2.sf(max(dchi, 0.0), ddf)) if ddf > 0 else None

    def diff(k):
        a, b = restricted.get(k), free.get(k)
        return None if a is None or b is None else float(a) - float(b)

    return {"chi2": dchi, "df": ddf, "pvalue": p, "cfi": diff("cfi"), "rmsea": diff("rmsea"), "srmr": diff("srmr")}


def _check(criterion: str, delta: Mapping, level: str, rule: DecisionRule) -> dict:
    if criterion == "chi2":
        p = delta["pvalue"]
        passed = p is None or p >= rule.alpha
        return {"criterion": "chi2", "value": p, "cutoff": rule.alpha, "passed": bool(passed)}
    cut = rule.cutoff(criterion, level)
    value = delta[criterion]
    if value is None:
        passed = True
    else:
        v = round(value, 10)
        passed = v > -cut if criterion == "cfi" else v < cut
    return {"criterion": criterion, "value": value, "cutoff": cut, "passed": bool(passed)}


def _describe_check(c: dict) -> str:
    if c["criterion"] == "chi2":
        if c["value"] is None:
            return "chi-square difference not testable (no df)"
        rel = ">=" if c["passed"] else "<"
        return f"chi-square difference p = {c['value']:.3g} {rel} {c['cutoff']:g}"
    name = "dCFI" if c["criterion"] == "cfi" else f"d{c['criterion'].upper()}"
    if c["criterion"] == "cfi":
        rel = ">" if c["passed"] else "<="
        return f"{name} = {c['value']:+.4f} {rel} -{c['cutoff']:.3f}"
    rel = "<" if c["passed"] else ">="
    return f"{name} = {c['value']:+.4f} {rel} {c['cutoff']:.3f}"


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
    text = "; ".join(_describe_check(c) for c in checks)
    return {"decision": "holds" if holds else "fails", "checks": checks, "reason": text}


def judge_configural(fit: Mapping, rule: DecisionRule, *, converged: bool = True, problems: Sequence[str] = ()) -> dict:
    """Decide whether the configural model is acceptable (absolute fit, proper solution)."""
    if not converged:
        return {"decision": "fails", "checks": [], "reason": "the configural model did not converge"}
    checks = []
    cfi_min = rule.configural_fit.get("cfi")
    rmsea_max = rule.configural_fit.get("rmsea")
    if cfi_min is not None and fit.get("cfi") is not None:
        checks.append({"criterion": "cfi", "value": fit["cfi"], "cutoff": cfi_min, "passed": bool(fit["cfi"] >= cfi_min)})
    if rmsea_max is not None and fit.get("rmsea") is not None:
        checks.append(
            {"criterion": "rmsea", "value": fit["rmsea"], "cutoff": rmsea_max, "passed": bool(fit["rmsea"] <= rmsea_max)}
        )
    improper = [p for p in problems if not p.startswith("not converged")]
    holds = all(c["passed"] for c in checks) and not improper
    parts = []
    for c in checks:
        if c["criterion"] == "cfi":
            parts.append(f"CFI = {c['value']:.3f} {'>=' if c['passed'] else '<'} {c['cutoff']:.2f}")
        else:
            parts.append(f"RMSEA = {c['value']:.3f} {'<=' if c['passed'] else '>'} {c['cutoff']:.2f}")
    if improper:
        parts.append("improper solution: " + "; ".join(improper))
    return {
        "decision": "holds" if holds else "fails",
        "checks": checks,
        "reason": "; ".join(parts) + " (absolute fit, common practice)",
    }


def supported_level(levels: Sequence[Mapping]) -> str | None:
    """The highest level of an unbroken run of ``holds`` from the first level."""
    best = None
    for lv in levels:
        if lv["decision"] in ("holds", "holds_partially"):
            best = lv["level"]
        else:
            break
    return best
