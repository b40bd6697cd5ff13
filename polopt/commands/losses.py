"""``polopt losses``: list the registered losses with f'(0), f''(0), convexity and their papers."""

from __future__ import annotations


def main(argv: list[str]) -> int:
    """The ``polopt losses`` subcommand."""
    from polopt import losses  # imported here: torch loads in seconds, and `polopt data` needs none of it

    for name in losses.names():
        loss = losses.get(name)
        f0, d1, d2 = loss.derivatives_at(0.0)
        convex = {True: "convex", False: "not convex", None: "convexity unknown"}[loss.convex]
        print(f"{name:<20} f'(0)={d1:+.3f} f''(0)={d2:.3f}  {convex:<12} {loss.source}")
    from polopt import objectives

    print("\npair objectives (functions of both log-ratios and the lengths, not of the margin alone):")
    for name in objectives.names():
        objective = objectives.resolve(name)
        takes = ", ".join(f"{k}={v}" for k, v in _keyword_defaults(objective.fn).items()) or "-"
        print(f"{name:<26} {takes:<54} {objective.source}")
    return 0


def _keyword_defaults(fn) -> dict:
    import inspect

    return {k: p.default for k, p in inspect.signature(fn).parameters.items() if p.kind is p.KEYWORD_ONLY}
