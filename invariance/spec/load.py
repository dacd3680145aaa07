"""Loading a pipeline: YAML text or a dict -> a validated, immutable :class:`PipelineSpec`.

YAML is read with ``yaml.safe_load`` only, so no tag can ever construct a Python object:
a file using such a tag is refused. The document is validated against the JSON Schema
kept in ``schema.json`` next to this module (unknown keys are errors that name the key
and the allowed ones), then checked for meaning (levels in order, items and factors that
exist, releases that name real parameters).
"""

from __future__ import annotations

import copy
import pathlib
from dataclasses import dataclass
from functools import cached_property
from types import MappingProxyType
from typing import Any, Mapping

import yaml

from ..decide.compare import DecisionRule, rule_from_section
from ..data.read import guess_format
from ..errors import SpecificationError, shorten
from ..estimate.interface import Estimator, estimator_for
from ..model.levels import LEVELS, build_level
from ..model.spec import Release
from ..model.structure import Structure
from ..model.ordinal_levels import ORDINAL_LEVELS, build_ordinal_level
from .document import MAX_DEPTH, MAX_NODES, parse_yaml, plain_document  # re-exported: imports of spec.load keep working
from .options import PartialSettings, check_alignment_section, partial_settings, structural_settings
from .validate import schema, validate_document  # re-exported: imports of spec.load keep working

__all__ = ["PipelineSpec", "freeze", "load_pipeline", "parse_yaml", "plain_document", "schema", "validate_document", "thaw"]


def freeze(obj):
    """Read-only mappings and tuples from a plain document (the inverse of :func:`thaw`)."""
    if isinstance(obj, Mapping):
        return MappingProxyType({k: freeze(v) for k, v in obj.items()})
    if isinstance(obj, (list, tuple)):
        return tuple(freeze(v) for v in obj)
    return obj


def thaw(obj):
    """Plain dicts and lists from a frozen document."""
    if isinstance(obj, Mapping):
        return {k: thaw(v) for k, v in obj.items()}
    if isinstance(obj, tuple):
        return [thaw(v) for v in obj]
    return obj


@dataclass(frozen=True, eq=False)
class PipelineSpec:
    """A validated pipeline.

    Attributes
    ----------
    document
        The validated document, deeply frozen (read-only mappings and tuples).
    text
        The pipeline as run: the file text, or YAML written from a dict (written on
        first use, from the validated document).
    file_text
        The pipeline file's text (``None`` for a dict).
    source
        The pipeline file (``None`` for a dict).
    base_dir
        Folder that relative paths are resolved against.
    data_path, data_format, data_sheet, group, groups, reference, missing
        Data settings (``missing`` a tuple of codes or a column -> codes mapping).
    structure
        The measurement structure.
    released
        Constraints released up front.
    estimator, levels
        Estimator name and the levels to fit, in order.
    rule
        The decision rule.
    stop_at_failure
        Stop at the first level that fails.
    output_folder
        Where outputs go (``None``: not named by the pipeline).
    seed
        Random seed recorded with the run (used by stages that draw random numbers).
    title
        Name of the analysis.
    ordinal
        The ordered-categorical items (model order; the other items are continuous) or
        ``None`` when every item is continuous.
    merge
        Ordinal items: item -> tuples of adjacent category values merged into one.
    fixed_means
        Factors whose means stay 0 in every group.
    incomplete
        ``data.incomplete``: ``full_information`` or ``listwise`` (ordinal items: always
        ``listwise``).
    scaled_difference
        ``decision.scaled_difference`` as the robust difference method: ``auto`` or ``2010``.
    partial
        The ``partial:`` section (:class:`~invariance.spec.options.PartialSettings`).
    structural
        The ``structural.levels`` steps, in order.
    """

    document: Mapping[str, Any]
    file_text: str | None
    source: pathlib.Path | None
    base_dir: pathlib.Path
    data_path: pathlib.Path
    data_format: str | None
    data_sheet: str | int | None
    group: str
    groups: tuple[str, ...] | None
    reference: str | None
    missing: Any
    structure: Structure
    released: tuple[Release, ...]
    estimator: str
    levels: tuple[str, ...]
    rule: DecisionRule
    stop_at_failure: bool
    output_folder: pathlib.Path | None
    seed: int | None
    title: str
    ordinal: tuple[str, ...] | None = None
    merge: Mapping[str, tuple[tuple[float, ...], ...]] | None = None
    fixed_means: tuple[str, ...] = ()
    incomplete: str = "full_information"
    scaled_difference: str = "auto"
    partial: PartialSettings = PartialSettings()
    structural: tuple[str, ...] = ()

    @cached_property
    def text(self) -> str:
        """The pipeline as run (see the class attributes)."""
        if self.file_text is not None:
            return self.file_text
        return yaml.safe_dump(thaw(self.document), sort_keys=False, allow_unicode=True)

    def make_estimator(self) -> Estimator:
        """The run's :class:`~invariance.estimate.interface.Estimator` with its typed options."""
        return estimator_for(self.estimator, incomplete=self.incomplete, scaled_difference=self.scaled_difference,
                             ordinal=self.ordinal, merge=self.merge, options=self.fit_options())

    def section(self, name: str, default=None):
        """A top-level section of the document (for stages added later)."""
        return self.document.get(name, default)

    def fit_options(self) -> dict:
        """Options of every fit of the run that the pipeline sets: ``variances`` and
        ``starts`` (section ``estimation``) and ``seed`` (keywords of
        :func:`invariance.estimate.ml.fit`); empty when it sets none."""
        opts = dict(self.document.get("estimation") or {})
        if self.seed is not None:
            opts["seed"] = int(self.seed)
        return opts

    def to_dict(self) -> dict:
        """The validated document as plain dicts and lists."""
        return thaw(self.document)


def _levels(levels, *, ordinal: bool = False) -> tuple[str, ...]:
    levels = tuple(levels)
    order = ORDINAL_LEVELS if ordinal else LEVELS
    if levels[0] != "configural":
        raise SpecificationError(
            f"levels must start with configural (the baseline every step is compared with); got {levels[0]!r} first."
        )
    if not ordinal and "thresholds" in levels:
        raise SpecificationError(
            "The thresholds level is for ordered-categorical items; set data.ordinal or drop the level."
        )
    ranks = [order.index(lv) for lv in levels]
    if ranks != sorted(ranks):
        raise SpecificationError(
            f"levels must be in order {', '.join(order)}; got {', '.join(levels)}."
        )
    return levels


def _ordinal(data: Mapping, structure: Structure, estimator: str | None):
    """(ordinal items or None, merge mapping or None, estimator) from the data section."""
    spec = data.get("ordinal")
    merge = data.get("merge")
    if spec is None:
        if merge is not None:
            raise SpecificationError("data.merge is for ordinal items; set data.ordinal or drop data.merge.")
        if estimator == "dwls":
            raise SpecificationError("estimator dwls fits ordered-categorical items; set data.ordinal (all or the items).")
        return None, None, estimator or "ml"
    items = structure.items if spec == "all" else tuple(str(i) for i in spec)
    unknown = [i for i in items if i not in structure.items]
    if unknown:
        raise SpecificationError(f"data.ordinal names {unknown[0]!r}, which is not in model.factors; check the spelling.")

    if estimator not in (None, "dwls"):
        raise SpecificationError(f"Ordinal items are fitted by estimator dwls, not {estimator}; set estimator: dwls or drop it.")
    if merge is not None:
        bad = [k for k in merge if k not in items]
        if bad:
            raise SpecificationError(f"data.merge names {bad[0]!r}, which is not an ordinal item; check the spelling.")
        merge = MappingProxyType({str(k): tuple(tuple(float(x) for x in b) for b in v) for k, v in merge.items()})
    # model order; the items not listed are continuous (polyserial / Pearson correlations)
    return tuple(i for i in structure.items if i in items), merge, "dwls"


def _structure(model: Mapping) -> Structure:
    factors = {str(k): tuple(v) for k, v in model["factors"].items()}
    general = model.get("general")
    family = model.get("family")
    if family is None:
        family = "bifactor" if general else ("single" if len(factors) == 1 else "correlated")
    if family == "bifactor" and not general:
        raise SpecificationError("model.family bifactor needs model.general, the name of the general factor; add it.")
    if family == "second_order" and not general:
        raise SpecificationError("model.family second_order needs model.general, the name of the higher-order factor; add it.")
    if family in ("single", "correlated") and general:
        raise SpecificationError(
            f"model.general is set but model.family is {family!r}; drop model.general or use bifactor or second_order."
        )
    try:
        return Structure(
            factors=factors,
            family=family,
            general=general,
            regressions=tuple(tuple(p) for p in model.get("paths", ())),
            residual_covariances=tuple(tuple(p) for p in model.get("residual_covariances", ())),
        )
    except SpecificationError as exc:
        raise SpecificationError(f"model: {exc}") from None


def _releases(model: Mapping, structure: Structure, *, ordinal: bool = False) -> tuple[Release, ...]:
    out = []
    for r in model.get("released", ()):
        groups = r.get("groups")
        rel = Release(
            parameter=r["parameter"],
            item=str(r["item"]),
            factor=r.get("factor"),
            groups=None if groups is None else tuple(str(g) for g in groups),
        )
        if rel.item not in structure.items:
            raise SpecificationError(
                f"model.released names item {rel.item!r}, which is not in model.factors; check the spelling."
            )
        try:
            if ordinal:
                build_ordinal_level(structure, ("_a", "_b"), "strict", [3] * len(structure.items),
                                    released=[Release(rel.parameter, rel.item, rel.factor)])
            elif rel.parameter == "threshold":
                raise SpecificationError("thresholds belong to ordinal items; set data.ordinal or release another parameter")
            else:
                build_level(structure, ("_a", "_b"), "strict", released=[Release(rel.parameter, rel.item, rel.factor)])
        except SpecificationError as exc:
            raise SpecificationError(f"model.released: {exc}") from None
        out.append(rel)
    return tuple(out)


def _fixed_means(model: Mapping, structure: Structure) -> tuple[str, ...]:
    names = tuple(str(f) for f in model.get("fixed_means", ()))
    bad = [f for f in names if f not in structure.factor_names]
    if bad:
        raise SpecificationError(
            f"model.fixed_means names {bad[0]!r}, which is not a factor; use any of {', '.join(structure.factor_names)}."
        )
    return names


def _missing(data: Mapping):
    m = data.get("missing")
    if m is None:
        return ()
    if isinstance(m, Mapping):
        return MappingProxyType({str(k): tuple(v) for k, v in m.items()})
    return tuple(m)


def _incomplete(data: Mapping, ordinal) -> str:
    """``data.incomplete``, read once; ordinal items use complete cases only."""
    value = data.get("incomplete")
    if ordinal is not None:
        if value == "full_information":
            raise SpecificationError(
                "data.incomplete: full_information is not available for ordinal items (dwls uses complete cases); "
                "use listwise or drop the key."
            )
        return "listwise"
    return "full_information" if value is None else str(value)


def _scaled_difference(dec: Mapping, estimator: str) -> str:
    value = dec.get("scaled_difference")
    if value is not None and estimator != "ml_robust":
        raise SpecificationError(
            f"decision.scaled_difference applies to estimator ml_robust, not {estimator}; drop it or set estimator: ml_robust."
        )
    return "2010" if value == "strictly_positive" else "auto"


def _check_ordinal_sections(doc: Mapping, ordinal) -> None:
    """Refuse the sections that need continuous-item statistics when items are ordinal."""
    if ordinal is None:
        return
    asked = []
    if doc.get("scores") is not None:
        asked.append("scores")
    if (doc.get("alignment") or {}).get("enabled", False):
        asked.append("alignment")
    if (doc.get("compare") or {}).get("structures"):
        asked.append("compare.structures")
    if asked:
        raise SpecificationError(
            f"{asked[0]} is not available for ordinal items yet; drop it or fit the items as continuous "
            "(drop data.ordinal)."
        )


def _structural_steps(doc: Mapping, ordinal) -> tuple[str, ...]:
    steps = structural_settings(doc.get("structural"))
    if steps and ordinal is not None:
        raise SpecificationError(
            "structural levels are not available for ordinal items yet; drop the structural section "
            "or fit the items as continuous (drop data.ordinal)."
        )
    return steps

def _sheet(data: Mapping, base_dir: pathlib.Path) -> str | int | None:
    """``data.sheet``, refused at load time unless the data file is an Excel workbook."""
    sheet = data.get("sheet")
    if sheet is None:
        return None
    fmt = data.get("format") or guess_format(base_dir / data["path"])
    if fmt != "excel":
        raise SpecificationError(
            f"data.sheet applies to Excel workbooks (.xlsx) only, and {data['path']!r} is read as {fmt}; remove data.sheet."
        )
    return sheet


def build_spec(doc: Mapping, *, text: str | None, source: pathlib.Path | None, base_dir: pathlib.Path) -> PipelineSpec:
    """Validate a document and build the :class:`PipelineSpec` (``text``: the file's text,
    ``None`` for a dict)."""
    validate_document(doc)
    doc = copy.deepcopy(dict(doc))
    data, model = doc["data"], doc["model"]
    structure = _structure(model)
    if data["group"] in structure.items:
        raise SpecificationError(f"data.group {data['group']!r} is also an item in model.factors; use another column.")
    ordinal, merge, estimator = _ordinal(data, structure, doc.get("estimator"))
    levels = _levels(doc.get("levels", ORDINAL_LEVELS if ordinal else LEVELS), ordinal=ordinal is not None)
    check_alignment_section(doc, structure)
    _check_ordinal_sections(doc, ordinal)
    dec = doc.get("decision", {})
    rule = rule_from_section(dec)
    out = doc.get("output", {}).get("folder")
    groups = data.get("groups")
    ref = data.get("reference")
    return PipelineSpec(
        document=freeze(doc),
        file_text=text,
        source=source,
        base_dir=base_dir,
        data_path=(base_dir / data["path"]).resolve(),
        data_format=data.get("format"),
        data_sheet=_sheet(data, base_dir),
        group=data["group"],
        groups=None if groups is None else tuple(str(g) for g in groups),
        reference=None if ref is None else str(ref),
        missing=_missing(data),
        structure=structure,
        released=_releases(model, structure, ordinal=ordinal is not None),
        estimator=estimator,
        levels=levels,
        rule=rule,
        stop_at_failure=bool(dec.get("stop_at_failure", True)),
        output_folder=None if out is None else (base_dir / out).resolve(),
        seed=doc.get("seed"),
        title=doc.get("title") or (source.stem if source is not None else "invariance analysis"),
        ordinal=ordinal,
        merge=merge,
        fixed_means=_fixed_means(model, structure),
        incomplete=_incomplete(data, ordinal),
        scaled_difference=_scaled_difference(dec, estimator),
        partial=partial_settings(doc.get("partial")),
        structural=_structural_steps(doc, ordinal),
    )


def load_pipeline(pipeline, *, base_dir: str | pathlib.Path | None = None) -> PipelineSpec:
    """Load and validate a pipeline.

    Parameters
    ----------
    pipeline
        A path to a YAML file, a dict, or an already loaded :class:`PipelineSpec`.
    base_dir
        Folder for relative paths of a dict pipeline (default: the working directory);
        a file's paths are relative to the file.

    Returns
    -------
    PipelineSpec
    """
    if isinstance(pipeline, PipelineSpec):
        return pipeline
    if isinstance(pipeline, Mapping):
        doc = plain_document(pipeline)
        base = pathlib.Path(base_dir) if base_dir is not None else pathlib.Path.cwd()
        return build_spec(doc, text=None, source=None, base_dir=base.resolve())
    if isinstance(pipeline, (str, pathlib.Path)):
        path = pathlib.Path(pipeline)
        if path.is_dir():
            raise SpecificationError(
                f"Pipeline {shorten(str(path))} is a folder, not a file; give the pipeline YAML file inside it."
            )
        if not path.is_file():
            raise SpecificationError(f"Pipeline file {str(path)!r} does not exist; check the path.")
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise SpecificationError(f"Cannot read pipeline file {path.name!r}: {exc}; check the file.") from None
        doc = parse_yaml(text, name=f"Pipeline file {path.name!r}")
        base = pathlib.Path(base_dir) if base_dir is not None else path.resolve().parent
        return build_spec(doc, text=text, source=path.resolve(), base_dir=base)
    raise SpecificationError(
        f"A pipeline is a file path or a dict; got {type(pipeline).__name__}."
    )


