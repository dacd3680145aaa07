"""Estimation: objectives, the optimizer and the :func:`fit` front door."""

from .ml import diagnose, fit
from .objective import MLObjective
from .optimize import STATUS, Outcome, minimize
from .start import start_values

__all__ = ["fit", "diagnose", "MLObjective", "STATUS", "Outcome", "minimize", "start_values"]
