"""Preference tasks whose optimum is known exactly.

- :mod:`toy_tasks.finite.task`: the finite-task type, its win weights and its JSON file format.
- :mod:`toy_tasks.exact.margin`: the exact optimum of the population loss for any loss of the family.
- :mod:`toy_tasks.families`: the task families selectable as ``task=<name>``.
- :mod:`toy_tasks.finite.session`: a task prepared for one training run (pairs, optimum, metrics).
- :mod:`toy_tasks.sequence.task`: the enumerable sequence task (``task=sequence``).
- :mod:`toy_tasks.sequence.session`: a sequence task prepared for one training run.
"""

from toy_tasks.exact.margin import Optimum, population_loss, solve
from toy_tasks.finite.task import FiniteTask, load_task, make_task

__all__ = ["FiniteTask", "Optimum", "load_task", "make_task", "population_loss", "solve"]
