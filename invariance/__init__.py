"""invariance: measurement invariance testing for multi-group factor models."""

from .estimate.api import compare_levels, fit_level, fit_levels
from .data import SampleStats, sample_stats
from .errors import (
    ConvergenceWarning,
    DataError,
    EstimationError,
    ImproperSolutionWarning,
    InvarianceError,
    InvarianceWarning,
    SpecificationError,
)
from .estimate import fit
from .model import LEVELS, ModelSpec, Release, Structure, build_level
from .model.ordinal_levels import ORDINAL_LEVELS, build_ordinal_level
from .data.ordinal_stats import OrdinalStats, ordinal_stats
from .pipeline import PipelineSpec, RunResult, check, load_pipeline, run
from .estimate.result import FitResult

from .version import __version__

__all__ = [
    "LEVELS",
    "ORDINAL_LEVELS",
    "OrdinalStats",
    "ConvergenceWarning",
    "DataError",
    "EstimationError",
    "FitResult",
    "ImproperSolutionWarning",
    "InvarianceError",
    "InvarianceWarning",
    "ModelSpec",
    "PipelineSpec",
    "Release",
    "RunResult",
    "SampleStats",
    "SpecificationError",
    "Structure",
    "build_level",
    "build_ordinal_level",
    "check",
    "compare_levels",
    "fit",
    "fit_level",
    "fit_levels",
    "load_pipeline",
    "ordinal_stats",
    "run",
    "sample_stats",
]
