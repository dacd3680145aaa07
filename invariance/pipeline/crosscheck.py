"""An independent second opinion: refit each group's configural model in semopy.

The configural model is the groups' separate models side by side, so its chi-square is
the sum of the single-group chi-squares. Each group's model is refitted here by semopy
(an independent SEM library, marker-variable identification, which gives the same
chi-square as fixed factor variances) and compared with this package's fit of the same
group. Agreement within 0.1% (relative) is reported as ``agree``; otherwise the verdict says
which fit reached the lower chi-square (the better minimum).
"""

from __future__ import annotations

import warnings
from typing import Mapping

import pandas as pd

from ..errors import InvarianceWarning
from ..estimate.ml import fit as ml_fit
from ..model.levels import build_level
from ..model.structure import Structure
from ..spec.load import PipelineSpec
from .state import RunState, StageOutput

__all__ = ["safe_names", "semopy_description", "stage_crosscheck", "TOLERANCE"]

#: Relative chi-square difference still counted as agreement.
TOLERANCE = 1e-3


def semopy_description(structure: Structure, *, names: Mapping[str, str] | None = None) -> str:
    """The structure written in semopy's model description language.

    ``names`` renames items and factors (see :func:`safe_names`); by default the
    structure's own names are written.
    """
    n = (lambda x: names.get(x, x)) if names else (lambda x: x)
    lines = []
    latents = list(structure.factor_names)
    for f, items in structure.measured_by.items():
        lines.append(f"{n(f)} =~ " + " + ".join(n(i) for i in items))
    if structure.family == "second_order":
        lines.append(f"{n(structure.general)} =~ " + " + ".join(n(f) for f in structure.factors))
    for out, pred in structure.regressions:
        lines.append(f"{n(out)} ~ {n(pred)}")
    if structure.family == "bifactor":
        for a in range(len(latents)):
            for b in range(a):
                lines.append(f"{n(latents[a])} ~~ 0*{n(latents[b])}")
    for a, b in structure.residual_covariances:
        lines.append(f"{n(a)} ~~ {n(b)}")
    return "\n".join(lines)


def safe_names(structure: Structure) -> dict[str, str]:
    """Item and factor names -> plain identifiers (``v1``, ``v2``, ...; ``f1``, ...), so that
    names with spaces or operator characters reach semopy intact."""
    out = {it: f"v{k + 1}" for k, it in enumerate(structure.items)}
    out.update({f: f"f{k + 1}" for k, f in enumerate(structure.factor_names)})
    return out


def _verdict(rel: float, theirs: float, ours: float, their_df: int, our_df: int) -> str:
    if their_df != our_df:
        return "differ (degrees of freedom)"
    if rel <= TOLERANCE:
        return "agree"
    if theirs > ours:
        return "differ: semopy stopped at a higher chi-square (a worse minimum)"
    return "differ: semopy found a lower chi-square"


def stage_crosscheck(spec: PipelineSpec, state: RunState) -> StageOutput:
    """Per group: this package's single-group configural chi-square against semopy's."""
    import semopy  # 2 s to import: only with --second-opinion

    stats = state.stats
    desc = semopy_description(spec.structure)
    names = safe_names(spec.structure)
    safe_desc = semopy_description(spec.structure, names=names)
    rows = []
    for g in stats.names:
        sub = stats.subset([g])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", InvarianceWarning)
            ours = ml_fit(build_level(spec.structure, (g,), "configural"), sub)
        data = pd.DataFrame(sub.groups[0].raw, columns=[names[i] for i in sub.items])
        row = {
            "group": g,
            "n": int(sub.groups[0].n),
            "chi2": float(ours.fit.chi2),
            "df": int(ours.fit.df),
            "semopy_chi2": None,
            "semopy_df": None,
            "relative_difference": None,
            "agreement": "semopy failed",
        }
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                model = semopy.Model(safe_desc)
                model.fit(data)
                st = semopy.calc_stats(model)
            sc = float(st["chi2"].iloc[0])
            sd = int(round(float(st["DoF"].iloc[0])))
            rel = abs(sc - row["chi2"]) / max(1.0, abs(row["chi2"]))
            row.update(
                semopy_chi2=sc,
                semopy_df=sd,
                relative_difference=float(rel),
                agreement=_verdict(rel, sc, row["chi2"], sd, row["df"]),
            )
        except Exception as exc:  # semopy's own failures are reported, not raised
            row["agreement"] = f"semopy failed: {str(exc).splitlines()[0] if str(exc) else type(exc).__name__}"
        rows.append(row)
    return {"crosscheck": {"engine": f"semopy {semopy.__version__}", "model": desc, "groups": rows}}, state
