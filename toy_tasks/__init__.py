"""Preference tasks whose optimum is known exactly.

- :mod:`toy_tasks.finite`: the finite-task type, its win weights and its JSON file format.
- :mod:`toy_tasks.solve`: the exact optimum of the population loss for any loss of the family.
- :mod:`toy_tasks.families`: the task families selectable as ``task=<name>``.
- :mod:`toy_tasks.session`: a task prepared for one training run (pairs, optimum, metrics).
- :mod:`toy_tasks.sequences`: the enumerable sequence task (``task=sequence``).
- :mod:`toy_tasks.sequence_session`: a sequence task prepared for one training run.
"""

from toy_tasks.finite import FiniteTask, load_task, make_task
from toy_tasks.solve import Optimum, population_loss, solve

__all__ = ["FiniteTask", "Optimum", "load_task", "make_task", "population_loss", "solve"]
