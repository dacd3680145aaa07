"""Data: reading files, missing codes, checks and per-group statistics."""

from .checks import CheckedData, check_data
from .moments import GroupStats, SampleStats, sample_stats, stats_from_arrays
from .read import apply_missing, file_sha256, read_table

__all__ = [
    "CheckedData",
    "GroupStats",
    "SampleStats",
    "apply_missing",
    "check_data",
    "file_sha256",
    "read_table",
    "sample_stats",
    "stats_from_arrays",
]
