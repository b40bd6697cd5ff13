"""Whether a run reached its exact target: the ``reached_optimum`` verdict of summary.json.

docs/reference/run-folder.md: every run with an exact target reports ``reached_optimum`` (true | false | null) against
a stated tolerance, and says it on screen. This module owns that one decision, as a pure function of
figures every finite-task summary already holds, so that every command (train, compare, check) and
every screen line gives the same answer; and, when the answer is no, the most likely fix read from
the loss curve (:func:`likely_fix`).
"""

from __future__ import annotations

REACHED_TOLERANCE = 1e-3  # total variation to the optimum; the trained-policy tolerance of the kit's tests
# a sequence model (tiny transformer, bigram) fits the enumerated distribution only approximately: the
# tolerance the kit's defaults are held to on task=sequence (measured well inside it, see README)
SEQUENCE_MODEL_TOLERANCE = 0.05
# a run whose loss is this close to its optimum's (relatively) while its policy is still far away
# sits on a nearly flat objective: each step gains little (our threshold; float32 sums round at ~1e-7)
FLAT_RELATIVE_GAP = 1e-4


def reached_optimum(tv_to_optimum: float | None, *, optimum_finite: bool | None, unique: bool = True,
                    relative_loss_gap: float | None = None, tolerance: float = REACHED_TOLERANCE,
                    certified: bool = True) -> bool | None:
    """True when the trained policy is within ``tolerance`` of its exact optimum, False when it is
    not, None when no optimum is known (none finite, an answer its solver could not certify, or no
    exact target at all).

    Where the minimiser is not unique (hinge, a flat objective) policies are not comparable and the
    relative loss gap ``(L(pi) - L*) / |L*|`` is held to the same tolerance instead.
    """
    if not optimum_finite or not certified or tv_to_optimum is None:
        return None
    if not unique and relative_loss_gap is not None:
        return bool(abs(relative_loss_gap) <= tolerance)
    return bool(tv_to_optimum <= tolerance)


def likely_fix(losses: list[float], *, relative_loss_gap: float | None = None, line_search: bool = False) -> str:
    """The most likely fix for a run that missed its optimum, from its logged loss curve.

    A run whose loss is within :data:`FLAT_RELATIVE_GAP` of the optimum's (``relative_loss_gap``,
    when known) but whose policy is not, and whose last logged quarter moved by no more than that
    gap, is on a nearly flat objective: its wiggles are smaller than what is left to gain, so the
    curve's shape says nothing about the rate, and the screen says so with the figure; unless the run
    already used it (``line_search``), it names ``optim=lbfgs``, whose line search crosses a flat
    stretch in far fewer steps.

    Over the second half of the logged values (all of them when fewer than six): a loss that changes
    direction in at least a third of its moves is oscillating (the step is too large: lower optim.lr);
    one still falling over the last half of that stretch by more than rounding (1e-9 relative) needed
    more steps (raise train.steps); one that levelled off away from the optimum moved too little
    (raise optim.lr). Common practice for
    reading a loss curve; the thresholds are ours.
    """
    values = [float(v) for v in losses if v == v]  # NaN-free
    tail = values[len(values) // 2:] if len(values) >= 6 else values  # the second half, or all of a short curve
    if len(tail) < 3:
        return "raise train.steps (too few logged steps to read the loss curve)"
    moves = [b - a for a, b in zip(tail[:-1], tail[1:], strict=True)]
    scale = 1e-9 * max(1.0, max(abs(v) for v in tail))
    quarter = tail[len(tail) // 2:]
    if relative_loss_gap is not None and 0.0 <= relative_loss_gap <= FLAT_RELATIVE_GAP:
        if max(quarter) - min(quarter) <= relative_loss_gap * abs(tail[-1]) + scale:
            fix = (f"raise train.steps (the objective is nearly flat here: the loss is within "
                   f"{relative_loss_gap:.2g} of the optimum's, relatively, so each step gains little)")
            return fix if line_search else fix + "; or optim=lbfgs, a line search in float64 (full batch)"
    signs = [m > 0 for m in moves if abs(m) > scale]
    turns = sum(a != b for a, b in zip(signs[:-1], signs[1:], strict=True))
    if len(signs) >= 3 and turns >= len(moves) / 3:
        return "lower optim.lr (the loss oscillates)"
    if quarter[0] - quarter[-1] > scale:
        return "raise train.steps (the loss was still falling)"
    return "raise optim.lr, or train.steps (the loss levelled off away from the optimum)"


def reached_line(summary: dict) -> str:
    """The screen line saying the verdict, from a summary holding ``reached_optimum`` and
    ``reached_optimum_tolerance`` (and ``likely_fix`` when the verdict is false)."""
    verdict = summary.get("reached_optimum")
    if verdict is None:
        if summary.get("optimum_certified") is False:
            return ("reached_optimum: null (the solver could not certify the optimum of this run: "
                    f"its gradient there is {summary.get('optimum_residual', float('nan')):.3g}; see the notes)")
        return "reached_optimum: null (no exact optimum is known for this run)"
    tolerance = summary.get("reached_optimum_tolerance", REACHED_TOLERANCE)
    if summary.get("optimum_unique") is False and summary.get("relative_loss_gap") is not None:
        figure = f"relative loss gap {summary['relative_loss_gap']:.3g}"
    else:
        figure = f"tv_to_optimum {summary['tv_to_optimum']:.3g}"
    sign = "<=" if verdict else ">"
    line = f"reached_optimum: {str(verdict).lower()} ({figure} {sign} {tolerance:g})"
    if not verdict and summary.get("likely_fix"):
        line += f"; most likely fix: {summary['likely_fix']}"
    return line


def verdict_fields(summary: dict, history: list[dict], *, tolerance: float = REACHED_TOLERANCE) -> dict:
    """``reached_optimum``, ``reached_optimum_tolerance`` and ``likely_fix`` (null unless the
    verdict is false) for a summary holding ``tv_to_optimum`` and ``optimum_finite``."""
    verdict = reached_optimum(summary.get("tv_to_optimum"), optimum_finite=summary.get("optimum_finite"),
                              unique=summary.get("optimum_unique", True) is not False,
                              relative_loss_gap=summary.get("relative_loss_gap"), tolerance=tolerance,
                              certified=summary.get("optimum_certified", True) is not False)
    fix = None
    if verdict is False:
        losses = [r["loss"] for r in history if "loss" in r]
        fix = likely_fix(losses, relative_loss_gap=summary.get("relative_loss_gap"),
                         line_search=any("iterations" in r for r in history))  # L-BFGS logs its iterations
    return {"reached_optimum": verdict, "reached_optimum_tolerance": tolerance, "likely_fix": fix}
