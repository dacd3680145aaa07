"""Declarative pipelines: one YAML file in, a stepwise invariance decision out."""

from ..spec.load import PipelineSpec, load_pipeline, schema
from .runner import RunResult, check, run
from .stages import STAGES, with_stage

__all__ = ["PipelineSpec", "RunResult", "STAGES", "check", "load_pipeline", "run", "schema", "with_stage"]
