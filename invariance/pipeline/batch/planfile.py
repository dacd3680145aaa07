"""The planning file: a YAML (or dict) description of one Monte Carlo plan.

Layout (every key checked; unknown keys are rejected with the allowed ones)::

    model:                      # the measurement structure
      family: single            # single | correlated | second_order | bifactor
      factors: {F: [a, b, c, d]}
      general: null             # general / higher-order factor name
    groups: [north, south]
    population:                 # exact invariance, then group factor means/variances
                                # (or: {estimates: results/study/estimates.csv, level: scalar},
                                #  a fitted run's estimates, path relative to the plan file)
      loadings: {F: {a: 0.7, b: 0.6, c: 0.8, d: 0.65}}
      intercepts: {a: 2.0, b: 2.5, c: 3.0, d: 1.5}
      residuals: {a: 0.51, b: 0.64, c: 0.36, d: 0.58}
      means: {south: {F: 0.3}}
      variances: {south: {F: 1.2}}
      covariances: {}           # "A~B": value
      paths: {}                 # "outcome<-predictor": value
    sizes: 300                  # one number, a list in group order, or group: size
    shift: {parameter: intercept, item: b, size: 0.3, groups: [south]}   # optional
    replications: 200
    alpha: 0.05
    seed: 1
    decision: {criteria: [cfi, rmsea], combine: paired, cutoffs: chen2007_small}   # optional:
                                # your own rule (a pipeline's decision keys, read by the
                                # same code as a run's), reported beside the default rules
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping

from ...errors import SpecificationError
from ...model.structure import Structure
from ...decide.compare import rule_from_section
from .population import Population, Shift
from .rules import decision_rule, default_rules

__all__ = ["load_plan", "PLAN_KEYS"]

PLAN_KEYS = ("model", "groups", "population", "sizes", "shift", "replications", "alpha", "seed", "decision")
_DECISION_KEYS = ("criteria", "combine", "alpha", "cutoffs")
_MODEL_KEYS = ("family", "factors", "general", "regressions", "residual_covariances")
_POP_KEYS = ("loadings", "intercepts", "residuals", "means", "variances", "covariances", "paths")
_EST_KEYS = ("estimates", "level")
_SHIFT_KEYS = ("parameter", "item", "size", "factor", "groups")


def _check_keys(d: Any, allowed, where: str, required=()) -> Mapping:
    if not isinstance(d, Mapping):
        raise SpecificationError(f"The '{where}' section of the plan must be a mapping; got {type(d).__name__}.")
    for k in d:
        if k not in allowed:
            raise SpecificationError(
                f"Unknown key {k!r} in the '{where}' section of the plan; allowed: {', '.join(allowed)}."
            )
    for k in required:
        if k not in d:
            raise SpecificationError(f"The '{where}' section of the plan needs the key {k!r}.")
    return d


def load_plan(source: str | Path | Mapping) -> dict:
    """Read and check a planning file; returns keyword arguments of :func:`invariance.batch.plan`
    plus ``population``.
    """
    base = Path.cwd()
    if isinstance(source, Mapping):
        d = source
    else:
        import yaml

        path = Path(source)
        base = path.parent
        if not path.is_file():
            raise SpecificationError(f"The plan file {str(path)!r} does not exist; check the path.")
        try:
            d = yaml.safe_load(path.read_text()) or {}
        except yaml.YAMLError as exc:
            line = getattr(getattr(exc, "problem_mark", None), "line", None)
            at = f" near line {line + 1}" if line is not None else ""
            raise SpecificationError(f"The plan file {path.name} is not valid YAML{at}; fix its syntax.") from None
    d = _check_keys(d, PLAN_KEYS, "plan", required=("model", "groups", "population", "sizes"))
    m = _check_keys(d["model"], _MODEL_KEYS, "model", required=("factors",))
    structure = Structure(
        factors={k: tuple(v) for k, v in dict(m["factors"]).items()},
        family=m.get("family", "correlated"),
        general=m.get("general"),
        regressions=tuple(tuple(x) for x in m.get("regressions", ()) or ()),
        residual_covariances=tuple(tuple(x) for x in m.get("residual_covariances", ()) or ()),
    )
    groups = d["groups"]
    if not isinstance(groups, (list, tuple)) or len(groups) < 2:
        raise SpecificationError("The plan needs a list of at least two group names under 'groups'.")
    if isinstance(d["population"], Mapping) and "estimates" in d["population"]:
        pop = _check_keys(d["population"], _EST_KEYS, "population")
        est = base / str(pop["estimates"])
        if not est.is_file():
            raise SpecificationError(f"The estimates file {str(est)!r} does not exist; check population.estimates.")
        population = Population.from_estimates(est, structure, level=pop.get("level"))
        if list(population.groups) != [str(g) for g in groups]:
            raise SpecificationError(
                f"The estimates file has the groups {', '.join(population.groups)}; list the same under 'groups'."
            )
    else:
        pop = _check_keys(d["population"], _POP_KEYS, "population", required=("loadings", "intercepts", "residuals"))
        population = Population.from_values(structure, [str(g) for g in groups], **pop)
    shift = None
    if d.get("shift") is not None:
        s = _check_keys(d["shift"], _SHIFT_KEYS, "shift", required=("parameter", "item", "size"))
        shift = Shift(
            parameter=str(s["parameter"]), item=str(s["item"]), size=float(s["size"]),
            factor=s.get("factor"), groups=None if s.get("groups") is None else tuple(str(g) for g in s["groups"]),
        )
    out = {"population": population, "sizes": d["sizes"], "shift": shift}
    for key, kind in (("replications", int), ("alpha", float), ("seed", int)):
        if key in d:
            try:
                out[key] = kind(d[key])
            except (TypeError, ValueError):
                raise SpecificationError(f"The plan key {key!r} must be a number; got {d[key]!r}.") from None
    if d.get("decision") is not None:
        dec = _check_keys(d["decision"], _DECISION_KEYS, "decision")
        rule = rule_from_section(dec, alpha=float(out.get("alpha", 0.05)))
        out["rules"] = {**default_rules(out.get("alpha", 0.05)), f"your rule: {rule.describe()}": decision_rule(rule)}
    return out
