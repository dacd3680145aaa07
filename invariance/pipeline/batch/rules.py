"""Decision rules for one step between nested levels, as small replaceable functions.

A planning rule takes the changes of one step (restricted minus free: ``dchi2``,
``ddf``, ``p``, ``dcfi``, ``drmsea``, ``dsrmr``) and the step's level (``metric``,
``scalar``, ``strict``) and returns True when it signals noninvariance (METHODS
section 5). The defaults wrap the pipeline's own decision rules
(:mod:`invariance.compare`) through :func:`decision_rule`, so a plan judges exactly
as a run does. :func:`chi2_rule`, :func:`cfi_rule` and :func:`chen_rule` are
independent direct readings of the published rules; the tests check that both agree.
"""

from __future__ import annotations

from typing import Callable, Mapping

import numpy as np

from ...decide.compare import DecisionRule, judge_step, make_rule

__all__ = ["Rule", "chi2_rule", "cfi_rule", "chen_rule", "decision_rule", "default_rules", "finite"]

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


def default_rules(alpha: float = 0.05) -> dict[str, Rule]:
    """The rules the planner reports by default, by name."""
    paired = ("cfi", "rmsea", "srmr")
    return {
        f"chi2 p<{alpha:g}": decision_rule(make_rule(criteria=("chi2",), alpha=alpha)),
        "dCFI<=-.01 (Cheung & Rensvold 2002)": decision_rule(make_rule(cutoffs="cheung_rensvold2002")),
        "Chen 2007 (N>300, balanced)": decision_rule(make_rule(criteria=paired, combine="paired", cutoffs="chen2007")),
        "Chen 2007 (N<=300 or unbalanced)": decision_rule(
            make_rule(criteria=paired, combine="paired", cutoffs="chen2007_small")
        ),
    }


def finite(delta: Mapping) -> bool:
    """All changes needed by the rules are finite numbers."""
    return all(np.isfinite(float(delta[k])) for k in ("p", "dcfi", "drmsea", "dsrmr"))
