"""Estimation: objectives, the optimizer and the :func:`fit` front door."""

from .dwls import DWLSObjective, ordinal_start_values
from .dwls_robust import dwls_difference, fit_dwls
from .fiml import FIMLObjective
from .ml import ESTIMATORS, diagnose, fit
from .objective import MLObjective
from .optimize import STATUS, Outcome, minimize
from .robust import DifferenceTest, robust_difference, scaled_difference, strictly_positive_difference
from .start import start_values

__all__ = [
    "DWLSObjective",
    "dwls_difference",
    "fit_dwls",
    "ordinal_start_values",
    "ESTIMATORS",
    "DifferenceTest",
    "DWLSObjective",
    "FIMLObjective",
    "MLObjective",
    "STATUS",
    "Outcome",
    "diagnose",
    "dwls_difference",
    "fit_dwls",
    "fit",
    "minimize",
    "ordinal_start_values",
    "robust_difference",
    "scaled_difference",
    "start_values",
    "strictly_positive_difference",
]
