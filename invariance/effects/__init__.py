"""Effect sizes and descriptive indices: dMACS, bifactor quality, latent comparisons."""

from .bifactor import (
    GroupQuality,
    bifactor_kernel,
    coefficient_alpha,
    construct_reliability,
    determinacy,
    omega,
    quality_indices,
)
from .dmacs import ItemEffect, ScaleBias, dmacs_value, item_effects, pooled_sd, scale_bias
from .latent import LatentComparison, MeanDifference, VarianceRatio, compare_latent, invariant_items

__all__ = [
    "GroupQuality",
    "ItemEffect",
    "LatentComparison",
    "MeanDifference",
    "ScaleBias",
    "VarianceRatio",
    "bifactor_kernel",
    "coefficient_alpha",
    "compare_latent",
    "construct_reliability",
    "determinacy",
    "dmacs_value",
    "invariant_items",
    "item_effects",
    "omega",
    "pooled_sd",
    "quality_indices",
    "scale_bias",
]
