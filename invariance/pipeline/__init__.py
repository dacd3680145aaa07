"""Declarative pipelines: one YAML file in, a stepwise invariance decision out."""

from .load import PipelineSpec, load_pipeline, schema
from .runner import RunResult, check, run
from .stages import STAGES

__all__ = ["PipelineSpec", "RunResult", "STAGES", "check", "load_pipeline", "run", "schema"]
