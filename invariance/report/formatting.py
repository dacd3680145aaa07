"""Number and label formatting shared by the report, the tables and the plots.

Conventions follow the usual journal style for fit statistics: indices bounded by 1
(p, CFI, TLI, RMSEA, SRMR and their changes) lose the leading zero; a true minus sign
is used for negative numbers in text output (``minus`` option).
"""

from __future__ import annotations

import math
from typing import Any, Iterable, Mapping

from ..decide.verdict import is_partial

__all__ = [
    "DECISION_LABELS",
    "LEVEL_LABELS",
    "decision_label",
    "estimator_label",
    "fnum",
    "fmt_bounded",
    "fmt_delta",
    "fmt_int",
    "fmt_p",
    "fmt_stat",
    "level_label",
    "release_text",
    "is_number",
]

#: How the decision codes of results.json read in the report.
DECISION_LABELS = {
    "holds": "holds",
    "holds_partially": "holds partially",
    "fails": "fails",
    "not_tested": "not tested",
}

#: Display names of the measurement levels.
LEVEL_LABELS = {
    "configural": "Configural",
    "metric": "Metric",
    "scalar": "Scalar",
    "strict": "Strict",
    "threshold": "Threshold",
    "thresholds": "Threshold",
}

MINUS = "\u2212"


def is_number(x: Any) -> bool:
    """True for a finite int or float (not bool)."""
    if isinstance(x, bool) or x is None:
        return False
    try:
        return math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def fnum(x: Any) -> float | None:
    """``float(x)`` when ``x`` is a finite number, else ``None``."""
    return float(x) if is_number(x) else None


def _sign(text: str, minus: str) -> str:
    return minus + text[1:] if text.startswith("-") else text


def fmt_stat(x: Any, *, digits: int = 2, minus: str = MINUS) -> str:
    """A statistic such as chi-square: fixed decimals, empty when missing."""
    v = fnum(x)
    return "" if v is None else _sign(f"{v:.{digits}f}", minus)


def fmt_int(x: Any) -> str:
    v = fnum(x)
    return "" if v is None else f"{int(round(v))}"


def fmt_bounded(x: Any, *, digits: int = 3, minus: str = MINUS) -> str:
    """An index bounded by 1 in absolute value, without the leading zero (.923)."""
    v = fnum(x)
    if v is None:
        return ""
    s = f"{v:.{digits}f}"
    if abs(round(v, digits)) < 1:
        s = s.replace("0.", ".", 1)
    return _sign(s, minus)


def fmt_delta(x: Any, *, digits: int = 3, minus: str = MINUS) -> str:
    """A change in an index, always signed (+.004, -.012)."""
    v = fnum(x)
    if v is None:
        return ""
    s = fmt_bounded(abs(v), digits=digits)
    if round(v, digits) == 0:
        return s
    return ("+" if v > 0 else minus) + s


def fmt_p(x: Any, *, minus: str = MINUS) -> str:
    """A p-value: three decimals, ``< .001`` below that."""
    v = fnum(x)
    if v is None:
        return ""
    if v < 0.001:
        return "< .001"
    return fmt_bounded(v, minus=minus)


#: The pipeline's estimator codes (spec/schema.json) and their names in the report.
ESTIMATOR_LABELS = {
    "ml": "ML",
    "ml_robust": "robust ML (scaled statistics, sandwich SEs)",
    "fiml": "FIML (ML with missing data)",
    "dwls": "DWLS (mean-and-variance adjusted statistic)",
}


def estimator_label(code: Any) -> str:
    """Readable name of an estimator code (``ml`` -> ``ML``); unknown codes as given."""
    return ESTIMATOR_LABELS.get(str(code).lower(), str(code))


def decision_label(code: Any) -> str:
    """Readable text of a decision code (unknown codes: underscores become spaces)."""
    if code is None:
        return ""
    return DECISION_LABELS.get(str(code), str(code).replace("_", " "))


def level_label(entry: Mapping[str, Any]) -> str:
    """Row name of one level: ``Scalar``, or ``Partial scalar`` when its model releases a
    constraint at or below it (the row's ``partial`` flag when present, else read from
    ``released``); the configural level is never partial."""
    name = str(entry.get("label") or entry.get("level") or "")
    base = LEVEL_LABELS.get(name, name.replace("_", " "))
    partial = entry.get("partial")
    if not isinstance(partial, bool):
        partial = is_partial(entry)
    if partial and entry.get("level") != "configural" and not base.lower().startswith("partial"):
        return "Partial " + base[:1].lower() + base[1:]
    return base


def release_text(rel: Mapping[str, Any]) -> str:
    """``intercept of x3 (differs in Grant-White)``: one released constraint in words,
    naming the groups whose estimate differs when they were located (``differs_in``)."""
    par = str(rel.get("parameter", "parameter"))
    item = str(rel.get("item", "?"))
    fac = rel.get("factor")
    groups = rel.get("groups")
    differs = rel.get("differs_in")
    s = f"{par} of {item}"
    if fac:
        s += f" on {fac}"
    if differs:
        s += " (differs in " + ", ".join(str(g) for g in _as_list(differs)) + ")"
    elif groups:
        s += " (" + ", ".join(str(g) for g in _as_list(groups)) + ")"
    else:
        s += " (all groups)"
    return s


def _as_list(x: Any) -> list:
    if x is None:
        return []
    if isinstance(x, (str, bytes)):
        return [x]
    if isinstance(x, Iterable):
        return list(x)
    return [x]
