"""Decision rules for one step between nested levels, as small replaceable functions.

A planning rule takes the changes of one step (restricted minus free: ``dchi2``,
``ddf``, ``p``, ``dcfi``, ``drmsea``, ``dsrmr``) and the step's level (``metric``,
``scalar``, ``strict``) and returns True when it signals noninvariance (METHODS
section 5). The defaults are built by the very function that reads a pipeline's
``decision:`` section (:func:`invariance.decide.compare.rule_from_section`) and judged
by the run's own :func:`~invariance.decide.compare.judge_step`, through
:func:`decision_rule`, so a plan judges exactly as a run does; the Chen (2007) rules
are the run's reading (every listed criterion must pass: a step is flagged when dCFI
or dRMSEA crosses its cutoff). :func:`chi2_rule`, :func:`cfi_rule`, :func:`chen_any_rule`
(the run's reading) and :func:`chen_rule` (Chen's joint reading, ``combine: paired``)
are independent direct readings of the published rules; the tests check that both agree.
"""

from __future__ import annotations

from typing import Callable, Mapping

import numpy as np

from ...decide.compare import DecisionRule, judge_step, rule_from_section

__all__ = ["Rule", "chi2_rule", "cfi_rule", "chen_rule", "chen_any_rule", "RUN_DEFAULT", "decision_rule", "default_rules", "finite"]

Rule = Callable[[Mapping, str], bool]


def chi2_rule(delta: Mapping, level: str, *, alpha: float = 0.05) -> bool:
    """Chi-square difference test: p < alpha."""
    return bool(delta["p"] < alpha)


def cfi_rule(delta: Mapping, level: str, *, cutoff: float = 0.01) -> bool:
    """Cheung & Rensvold (2002): dCFI <= -cutoff (0.01)."""
    return bool(round(delta["dcfi"], 10) <= -cutoff)


#: Chen (2007) cutoffs: (dCFI, dRMSEA, dSRMR loadings, dSRMR intercepts/residuals).
CHEN = {"large": (0.010, 0.015, 0.030, 0.010), "small": (0.005, 0.010, 0.025, 0.005)}


def chen_rule(delta: Mapping, level: str, *, sample: str = "large") -> bool:
    """Chen (2007): dCFI <= -c together with dRMSEA >= r or dSRMR >= s.

    ``sample="large"``: total N > 300 and balanced groups; ``"small"``: N <= 300 or
    unbalanced. The SRMR cutoff is larger at the loading (metric) step.
    """
    c, r, s_load, s_other = CHEN[sample]
    s = s_load if level == "metric" else s_other
    rd = lambda v: round(v, 10)
    return bool(rd(delta["dcfi"]) <= -c and (rd(delta["drmsea"]) >= r or rd(delta["dsrmr"]) >= s))


def chen_any_rule(delta: Mapping, level: str, *, sample: str = "large") -> bool:
    """Chen (2007) cutoffs read as a run reads them by default (criteria dCFI and dRMSEA,
    every one must pass): flagged when dCFI <= -c or dRMSEA >= r."""
    c, r = CHEN[sample][:2]
    return bool(round(delta["dcfi"], 10) <= -c or round(delta["drmsea"], 10) >= r)


class decision_rule:  # noqa: N801 - used like a function
    """A pipeline :class:`~invariance.compare.DecisionRule` as a planning rule.

    The step is flagged when :func:`invariance.compare.judge_step` says it ``fails``.
    """

    def __init__(self, rule: DecisionRule) -> None:
        self.rule = rule

    def __call__(self, delta: Mapping, level: str) -> bool:
        d = {"chi2": float(delta["dchi2"]), "df": int(delta["ddf"]), "pvalue": float(delta["p"]),
             "cfi": float(delta["dcfi"]), "rmsea": float(delta["drmsea"]), "srmr": float(delta["dsrmr"])}
        return judge_step(d, level, self.rule)["decision"] == "fails"

    def __repr__(self) -> str:
        return f"decision_rule({self.rule.describe()!r})"


#: Name of the default planning rule that is a run's default decision rule.
RUN_DEFAULT = "Chen 2007 (N>300, balanced; run default)"


def default_rules(alpha: float = 0.05) -> dict[str, Rule]:
    """The rules the planner reports by default, by name: each is a pipeline ``decision:``
    section read by :func:`~invariance.decide.compare.rule_from_section`; the
    :data:`RUN_DEFAULT` one is what a run with no ``decision:`` section applies."""
    sections = {
        f"chi2 p<{alpha:g}": {"criteria": ["chi2"], "alpha": alpha},
        "dCFI<=-.01 (Cheung & Rensvold 2002)": {"cutoffs": "cheung_rensvold2002"},
        RUN_DEFAULT: {},
        "Chen 2007 (N<=300 or unbalanced)": {"cutoffs": "chen2007_small"},
    }
    return {name: decision_rule(rule_from_section(sec, alpha=alpha)) for name, sec in sections.items()}


def finite(delta: Mapping) -> bool:
    """All changes needed by the rules are finite numbers."""
    return all(np.isfinite(float(delta[k])) for k in ("p", "dcfi", "drmsea", "dsrmr"))
