"""Every exception and warning the package raises.

Exception tree::

    InvarianceError                 base of everything raised on purpose
    ├── SpecificationError          a pipeline file or model specification is wrong
    ├── DataError                   the data cannot support the requested analysis
    └── EstimationError             a model could not be estimated at all

    InvarianceWarning (UserWarning) base warning
    ├── ConvergenceWarning          the optimizer stopped before convergence
    └── ImproperSolutionWarning     negative variances, non-positive-definite matrices,
                                    a singular information matrix

The command line maps every ``InvarianceError`` to one line on stderr and exit code 2.
Warnings are also recorded on the result objects (``FitResult.problems``) so that they
reach results.json and the report.
"""

from __future__ import annotations

__all__ = [
    "InvarianceError",
    "SpecificationError",
    "DataError",
    "EstimationError",
    "InvarianceWarning",
    "ConvergenceWarning",
    "ImproperSolutionWarning",
    "shorten",
]

#: The longest user value quoted whole in a message.
QUOTE_LIMIT = 60


def shorten(value: object, limit: int = QUOTE_LIMIT) -> str:
    """``repr`` of a user value for a message, cut to about ``limit`` characters.

    Control characters are shown escaped (``repr`` does that), so a quoted value can
    neither flood the terminal nor drive it.
    """
    long_text = isinstance(value, str) and len(value) > 10 * limit
    text = repr(value[: 2 * limit] if long_text else value)
    if len(text) <= limit:
        return text
    size = len(value) if long_text else len(text)
    return f"{text[: limit - 20]}...{text[-12:]} ({size} characters)"



class InvarianceError(Exception):
    """Base class of the errors this package raises on purpose.

    The message is one line: what is wrong and how to fix it.
    """


class SpecificationError(InvarianceError, ValueError):
    """A pipeline file, structure or model specification is invalid."""


class DataError(InvarianceError, ValueError):
    """The data cannot support the requested analysis (missing column, tiny group, ...)."""


class EstimationError(InvarianceError, RuntimeError):
    """A model could not be estimated (for example, no admissible starting point)."""


class InvarianceWarning(UserWarning):
    """Base class of the warnings this package emits."""


class ConvergenceWarning(InvarianceWarning):
    """The optimizer stopped before reaching its convergence criterion."""


class ImproperSolutionWarning(InvarianceWarning):
    """The solution is improper: negative variances, non-PD matrices, singular information."""
