"""Many runs: a batch runner on Dask and Monte Carlo planning.

* :func:`run_batch` runs :class:`Task` objects on a local or remote Dask cluster
  (or one by one) with deterministic per-task seeds and one summary table;
* :func:`plan` simulates a population model to give the power, false alarms and
  empirical cutoffs of the decision rules.
"""

from .runner import BatchResult, Task, TaskOutcome, highest_level, run_batch, task_seed
from .executor import DaskExecutor
from .population import Population, Shift, simulate_groups
from .simulate import PlanResult, plan, replicate
from .tasks import pipeline_task

__all__ = [
    "BatchResult",
    "DaskExecutor",
    "PlanResult",
    "Population",
    "Shift",
    "Task",
    "TaskOutcome",
    "highest_level",
    "pipeline_task",
    "plan",
    "replicate",
    "run_batch",
    "simulate_groups",
    "task_seed",
]
