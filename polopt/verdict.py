"""Whether a run reached its exact target: the ``reached_optimum`` verdict of summary.json.

DESIGN.md: every run with an exact target reports ``reached_optimum`` (true | false | null) against
a stated tolerance, and says it on screen. This module owns that one decision, as a pure function of
figures every finite-task summary already holds, so that every command (train, compare, check) and
every screen line gives the same answer.
"""

from __future__ import annotations

REACHED_TOLERANCE = 1e-3  # total variation to the optimum; the trained-policy tolerance of the kit's tests


def reached_optimum(tv_to_optimum: float | None, *, optimum_finite: bool | None, unique: bool = True,
                    relative_loss_gap: float | None = None, tolerance: float = REACHED_TOLERANCE) -> bool | None:
    """True when the trained policy is within ``tolerance`` of its exact optimum, False when it is
    not, None when no optimum is known (none finite, or no exact target at all).

    Where the minimiser is not unique (hinge, a flat objective) policies are not comparable and the
    relative loss gap ``(L(pi) - L*) / |L*|`` is held to the same tolerance instead.
    """
    if not optimum_finite or tv_to_optimum is None:
        return None
    if not unique and relative_loss_gap is not None:
        return bool(abs(relative_loss_gap) <= tolerance)
    return bool(tv_to_optimum <= tolerance)


def reached_line(summary: dict, tolerance: float = REACHED_TOLERANCE) -> str:
    """The screen line saying the verdict, from a summary holding ``reached_optimum``."""
    verdict = summary.get("reached_optimum")
    if verdict is None:
        return "reached_optimum: null (no finite exact optimum to reach)"
    if summary.get("optimum_unique") is False and summary.get("relative_loss_gap") is not None:
        figure = f"relative loss gap {summary['relative_loss_gap']:.3g}"
    else:
        figure = f"tv_to_optimum {summary['tv_to_optimum']:.3g}"
    sign = "<=" if verdict else ">"
    return f"reached_optimum: {str(verdict).lower()} ({figure} {sign} {tolerance:g})"
