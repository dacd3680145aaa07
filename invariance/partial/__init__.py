"""Partial invariance: score tests for equality constraints and the sequential release search."""

from .flags import ITEM_PARAMETERS, flagged_items
from .score import Constraint, CopyTest, ScoreTests, SetTest, constraints, map_theta, release_constraint, score_tests
from .search import (
    CORRECTIONS,
    RELEASE_MODES,
    STOP_REASONS,
    ReleaseStep,
    SearchResult,
    adjust_pvalues,
    level_parameters,
    release_search,
)

__all__ = [
    "CORRECTIONS",
    "ITEM_PARAMETERS",
    "RELEASE_MODES",
    "STOP_REASONS",
    "Constraint",
    "CopyTest",
    "ReleaseStep",
    "ScoreTests",
    "SearchResult",
    "SetTest",
    "adjust_pvalues",
    "constraints",
    "flagged_items",
    "level_parameters",
    "map_theta",
    "release_constraint",
    "release_search",
    "score_tests",
]
