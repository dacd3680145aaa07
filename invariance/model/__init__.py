"""Model specification: structures, invariance levels and the entry table."""

from .levels import LEVELS, LevelBuilder, build_level, level_rank
from .spec import MATRICES, PARAMETER_KINDS, ModelSpec, Release
from .structure import FAMILIES, Structure

__all__ = [
    "FAMILIES",
    "LEVELS",
    "MATRICES",
    "PARAMETER_KINDS",
    "LevelBuilder",
    "ModelSpec",
    "Release",
    "Structure",
    "build_level",
    "level_rank",
]
