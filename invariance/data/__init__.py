"""Data: reading files, missing codes, checks and per-group statistics."""

from .checks import CheckedData, check_data
from .em import EMResult, em_saturated
from .patterns import Patterns, missing_patterns
from .mcar import LittleTest, little_mcar, missing_report
from .moments import GroupStats, MissingInfo, SampleStats, sample_stats, stats_from_arrays
from .read import apply_missing, file_sha256, read_table

__all__ = [
    "CheckedData",
    "EMResult",
    "GroupStats",
    "LittleTest",
    "MissingInfo",
    "Patterns",
    "SampleStats",
    "apply_missing",
    "check_data",
    "em_saturated",
    "file_sha256",
    "little_mcar",
    "missing_patterns",
    "missing_report",
    "read_table",
    "sample_stats",
    "stats_from_arrays",
]
