"""Data: reading files, missing codes, checks and per-group statistics."""

from .em import EMResult, Patterns, em_saturated, missing_patterns
from .mcar import LittleTest, little_mcar, missing_report
from .moments import GroupStats, MissingInfo, SampleStats, sample_stats, stats_from_arrays

__all__ = [
    "EMResult",
    "GroupStats",
    "LittleTest",
    "MissingInfo",
    "Patterns",
    "SampleStats",
    "em_saturated",
    "little_mcar",
    "missing_patterns",
    "missing_report",
    "sample_stats",
    "stats_from_arrays",
]
