"""The report's input bundle: the results dict, the estimates and the run context.

Every section builder reads one :class:`ReportInput`; this module depends on no
section, so any section module can import it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Mapping

import pandas as pd

from . import inputs as I

__all__ = ["ReportInput"]


@dataclass
class ReportInput:
    """Everything a section may read: the results dict, the estimates and the run context.

    Attributes
    ----------
    results
        The results.json dict (see :mod:`invariance.report.inputs` for the keys read).
    estimates
        All estimates: columns level, group, parameter, variable, other, label, free,
        estimate, se, z, pvalue, std.
    context
        ``pipeline_text``, ``data_file``, ``data_sha256``, ``seed``, ``structure``
        (``factors``, ``general``, ``family``, ``regressions``,
        ``residual_covariances``), ``created``, ``quiet``.
    """

    results: Mapping[str, Any]
    estimates: pd.DataFrame
    context: Mapping[str, Any]
    _cache: dict = field(default_factory=dict, repr=False)

    @property
    def groups(self) -> dict[str, Any]:
        g = self.results.get("groups")
        if isinstance(g, Mapping):
            return dict(g)
        if isinstance(g, (list, tuple)):
            return {str(x): None for x in g}
        return {}

    @property
    def reference(self) -> str | None:
        ref = self.results.get("reference_group")
        if ref is None and self.groups:
            ref = next(iter(self.groups))
        return None if ref is None else str(ref)

    @property
    def structure(self) -> dict:
        s = self.context.get("structure")
        return dict(s) if isinstance(s, Mapping) else {}

    @property
    def items(self) -> list[str]:
        out: list[str] = []
        for its in dict(self.structure.get("factors") or {}).values():
            for it in its:
                if str(it) not in out:
                    out.append(str(it))
        if not out and not self.estimates.empty and "parameter" in self.estimates:
            out = [str(x) for x in dict.fromkeys(self.estimates.loc[self.estimates["parameter"] == "intercept", "variable"])]
        return out

    @property
    def accepted(self) -> dict | None:
        return I.accepted_entry(self.results)

    def estimates_at(self, level: str | None) -> pd.DataFrame:
        """Estimates of one level (empty frame if the level or the columns are missing)."""
        est = self.estimates
        if est is None or est.empty or level is None or "level" not in est:
            return pd.DataFrame(columns=["group", "parameter", "variable", "other", "estimate", "se", "std", "label"])
        sub = est[est["level"].astype(str) == str(level)]
        keys = [c for c in ("group", "parameter", "variable", "other") if c in sub]
        return sub.drop_duplicates(subset=keys, keep="last") if keys else sub
