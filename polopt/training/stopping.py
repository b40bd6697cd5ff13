"""``train.tol``: stop a run once its loss and gradient have settled.

A finite task in exact mode is a deterministic convex (or smooth) problem: after a few
hundred steps the loss stops moving and the gradient vanishes, and the remaining
steps of ``train.steps`` change nothing that can be measured. :class:`Convergence`
watches two numbers per step: the change of the loss from the step before,
``|L_t - L_{t-1}|``, and the gradient norm (before clipping). The run stops when both
stay below ``tol`` for :data:`WINDOW` steps in a row, so that one quiet step (a loss
that crosses its minimum, a gradient that passes near zero between two larger ones)
does not end it. Stopping on the loss change alone leaves errors near 1e-7 on these
tasks, hence the gradient norm too (common practice for stopping first-order methods;
see also scipy.optimize's ``gtol``).

A step skipped for a non-finite loss or gradient restarts the window. The window is
part of the trainer's checkpoint (:meth:`Convergence.state`), so a resumed run stops at
the step the uninterrupted one stops at.
"""

from __future__ import annotations

import math

WINDOW = 10  # consecutive quiet steps before a run stops
FINITE_TASK_TOL = 1e-14  # finite tasks (float64): TV to the optimum stays near 1e-12 (bench/exact_accuracy.py)
STOPPED = ("steps", "tol")  # why a run ended: it ran train.steps, or it converged (summary.json `stopped`)


def validate_tol(tol) -> float | None:
    """``train.tol``: None or 0 (never stop early) or a positive number."""
    if tol is None:
        return None
    if isinstance(tol, bool) or not isinstance(tol, (int, float)) or not tol >= 0 or math.isinf(tol):
        raise ValueError(f"train.tol must be a number >= 0 (0 or null: run every step), got {tol!r}")
    return float(tol) if tol > 0 else None


class Convergence:
    """Counts the consecutive steps whose loss change and gradient norm are both below ``tol``."""

    def __init__(self, tol: float | None, window: int = WINDOW):
        self.tol = validate_tol(tol)
        self.window = window
        self.quiet = 0  # consecutive quiet steps so far
        self.last_loss: float | None = None

    def update(self, loss: float, grad_norm: float) -> bool:
        """Record one step that updated the parameters; True when the run should stop after it."""
        if self.tol is None:
            return False
        change = math.inf if self.last_loss is None else abs(loss - self.last_loss)
        self.last_loss = loss
        self.quiet = self.quiet + 1 if change < self.tol and grad_norm < self.tol else 0
        return self.quiet >= self.window

    def skip(self) -> None:
        """A step without an update (non-finite loss or gradient): the window starts over."""
        self.quiet, self.last_loss = 0, None

    def state(self) -> dict:
        return {"quiet": self.quiet, "last_loss": self.last_loss}

    def restore(self, state: dict | None) -> None:
        if state:
            self.quiet, self.last_loss = int(state["quiet"]), state["last_loss"]
