"""Ordered-categorical items: categories, thresholds, polychoric correlations and their
asymptotic covariance (METHODS section 7)."""

from .bivariate import bvn_cdf, bvn_pdf
from .categories import CategoryMap, category_maps, encode
from .levels import ORDINAL_LEVELS, ORDINAL_RELEASES, build_ordinal_level, ordinal_level_rank
from .polychoric import PolychoricFit, polychoric
from .stats import OrdinalStats, ordinal_stats, ordinal_stats_from_arrays

__all__ = [
    "ORDINAL_LEVELS",
    "ORDINAL_RELEASES",
    "build_ordinal_level",
    "ordinal_level_rank",
    "CategoryMap",
    "OrdinalStats",
    "PolychoricFit",
    "bvn_cdf",
    "bvn_pdf",
    "category_maps",
    "encode",
    "ordinal_stats",
    "ordinal_stats_from_arrays",
    "polychoric",
]
