"""Estimation: objectives, the optimizer and the :func:`fit` front door."""

from .dwls import DWLSObjective, ordinal_start_values
from .dwls_robust import dwls_difference, fit_dwls
from .ml import diagnose, fit
from .objective import MLObjective
from .optimize import STATUS, Outcome, minimize
from .start import start_values

__all__ = ["fit", "fit_dwls", "dwls_difference", "DWLSObjective", "ordinal_start_values", "diagnose", "MLObjective", "STATUS", "Outcome", "minimize", "start_values"]
