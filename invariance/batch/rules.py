"""Decision rules for one step between nested levels, as small replaceable functions.

Each rule takes the changes of one step (restricted minus free: ``dchi2``, ``ddf``,
``p``, ``dcfi``, ``drmsea``, ``dsrmr``) and the step's level (``metric``, ``scalar``,
``strict``) and returns True when it signals noninvariance (METHODS section 5).
These are the planning module's own copies; they can be swapped for the pipeline's
decision rules (``invariance.compare``) without touching the simulation.
"""

from __future__ import annotations

from functools import partial
from typing import Callable, Mapping

import numpy as np

__all__ = ["chi2_rule", "cfi_rule", "chen_rule", "default_rules", "Rule"]

Rule = Callable[[Mapping, str], bool]


def chi2_rule(delta: Mapping, level: str, *, alpha: float = 0.05) -> bool:
    """Chi-square difference test: p < alpha."""
    return bool(delta["p"] < alpha)


def cfi_rule(delta: Mapping, level: str, *, cutoff: float = 0.01) -> bool:
    """Cheung & Rensvold (2002): dCFI <= -cutoff (0.01)."""
    return bool(delta["dcfi"] <= -cutoff + 1e-12)


#: Chen (2007) cutoffs: (dCFI, dRMSEA, dSRMR loadings, dSRMR intercepts/residuals).
CHEN = {"large": (0.010, 0.015, 0.030, 0.010), "small": (0.005, 0.010, 0.025, 0.005)}


def chen_rule(delta: Mapping, level: str, *, sample: str = "large") -> bool:
    """Chen (2007): dCFI <= -c together with dRMSEA >= r or dSRMR >= s.

    ``sample="large"``: total N > 300 and balanced groups; ``"small"``: N <= 300 or
    unbalanced. The SRMR cutoff is larger at the loading (metric) step.
    """
    c, r, s_load, s_other = CHEN[sample]
    s = s_load if level == "metric" else s_other
    tol = 1e-12
    return bool(delta["dcfi"] <= -c + tol and (delta["drmsea"] >= r - tol or delta["dsrmr"] >= s - tol))


def default_rules(alpha: float = 0.05) -> dict[str, Rule]:
    """The rules the planner reports by default, by name."""
    return {
        f"chi2 p<{alpha:g}": partial(chi2_rule, alpha=alpha),
        "dCFI<=-.01 (Cheung & Rensvold 2002)": cfi_rule,
        "Chen 2007 (N>300, balanced)": partial(chen_rule, sample="large"),
        "Chen 2007 (N<=300 or unbalanced)": partial(chen_rule, sample="small"),
    }


def finite(delta: Mapping) -> bool:
    """All changes needed by the rules are finite numbers."""
    return all(np.isfinite(float(delta[k])) for k in ("p", "dcfi", "drmsea", "dsrmr"))
