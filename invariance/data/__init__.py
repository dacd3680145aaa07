"""Data: reading files, missing codes, checks and per-group statistics."""

from .moments import GroupStats, SampleStats, sample_stats, stats_from_arrays

__all__ = ["GroupStats", "SampleStats", "sample_stats", "stats_from_arrays"]
