"""The outcome of ``polopt check``: one :class:`CheckResult` per check, a :class:`Report` per loss.

Shared by the checks of margin losses (:mod:`polopt.checks.margin`) and of pair objectives
(:mod:`polopt.checks.pair`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, dataclass, field

STATUSES = ("pass", "warn", "fail", "skip")

# what each check tests, in the words of its report row (the population rows: see :func:`what_it_tests`)
CHECK_TESTS = {
    "elementwise": "f acts on each margin alone",
    "finite": "f and f' finite at extreme margins in float64, float32, bfloat16",
    "signal": "a larger margin lowers the loss (f'(0) < 0)",
    "convexity": "f is convex on a grid of margins",
    "taylor": "f'(0), f''(0) and the beta that regularises like each built-in",
    "pair_optimum": "the per-pair optimum x*(p) learns the preference",
    "certainty": "x*(1): a finite margin for a certain preference",
    "scale": "whether f is a built-in rescaled (a wrong scale)",
}

# the per-feedback-kind rows of a group objective's report (polopt.checks.group), CHECK:KIND
GROUP_TESTS = {
    "reference_pull": "with no signal in the {} feedback, the reference is a minimum",
    "signal": "it rewards the better responses of {} feedback",
    "noisy_optimum": "a finite optimum (or stationary point) on noisy {} feedback",
    "descent": "gradient descent from the reference reaches the global target ({})",
}


def what_it_tests(name: str) -> str:
    """The phrase a report row opens with: what check ``name`` tests."""
    check, _, kind = name.partition(":")
    if check == "population":
        return f"training reaches the exact optimum of task {kind}"
    if kind and check in GROUP_TESTS:
        return GROUP_TESTS[check].format(kind)
    if name == "per_group":
        return "one loss per group, shape (B,)"
    return CHECK_TESTS.get(name, name)

@dataclass
class CheckResult:
    """The outcome of one check: ``status`` is one of pass, warn, fail, skip."""

    name: str
    status: str
    reason: str
    facts: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {**asdict(self), "tests": what_it_tests(self.name)}

@dataclass
class Report:
    """Every check of one loss at one beta, plus the curves the plot draws."""

    loss: str
    beta: float
    results: list[CheckResult]
    curve: dict = field(default_factory=dict)

    @property
    def status(self) -> str:
        statuses = {r.status for r in self.results}
        return "fail" if "fail" in statuses else "warn" if "warn" in statuses else "pass"

    @property
    def failures(self) -> list[CheckResult]:
        return [r for r in self.results if r.status == "fail"]

    def result(self, name: str) -> CheckResult:
        for r in self.results:
            if r.name == name:
                return r
        raise KeyError(f"no check named {name!r}; checks: {', '.join(r.name for r in self.results)}")

    def to_dict(self) -> dict:
        return {"loss": self.loss, "beta": self.beta, "status": self.status,
                "n_failures": len(self.failures),
                "n_warnings": sum(r.status == "warn" for r in self.results),
                "checks": [r.to_dict() for r in self.results], "curve": self.curve}

def guarded(name: str, fn: Callable[[], CheckResult]) -> CheckResult:
    """Run one check; an unexpected error becomes a failure with its message, not a crash."""
    try:
        return fn()
    except Exception as err:  # a user's f can break a check in ways no check foresees
        return CheckResult(name, "fail", f"could not run: {type(err).__name__}: {err}", {"error": str(err)})
