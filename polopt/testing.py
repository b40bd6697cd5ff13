"""Assertions for users' own test suites: put ``polopt check`` into pytest.

    import torch
    from polopt.testing import assert_reaches_optimum, assert_sound_loss
    from toy_tasks.families import noisy_labels

    def test_my_loss():
        my_loss = lambda x: torch.nn.functional.softplus(1 - x) ** 2
        assert_sound_loss(my_loss)
        assert_reaches_optimum(my_loss, noisy_labels(n_responses=4), beta=0.5, tol=1e-4)

Both take margin losses f(x) and pair objectives f(pair, beta) alike (a callable, a
registered name or a dotted path; see :mod:`polopt.losses.registry`). Both raise a plain
``AssertionError`` whose message says what was expected and what was reached, so pytest
shows it as a test failure.
"""

from __future__ import annotations

from collections.abc import Callable

import torch

from polopt import losses
from polopt.checks.margin import check_population, run_checks
from polopt.losses.margin import MarginLoss
from polopt.training.optim import OptimConfig


def assert_reaches_optimum(loss: MarginLoss | str | Callable[[torch.Tensor], torch.Tensor], task, beta: float = 0.5,
                           tol: float = 1e-3, *, steps: int = 2000, lr: float = 0.05) -> dict:
    """Train ``loss`` on the finite ``task`` in exact mode (Adam, cosine decay) and assert
    the trained policy is the task's exact optimum: TV <= ``tol`` (a relative loss gap
    <= ``tol`` where the optimum is not unique). Where no finite optimum exists, assert
    that the mass moved to the responses that take it all in the limit. Also asserts
    that the trained margins favour the winners (weighted mean margin > 0).

    ``task``: any object with ``prepare(loss, beta=, mode="exact")`` (a
    :class:`toy_tasks.finite.task.FiniteTask`, e.g. from :mod:`toy_tasks.families`).
    Returns the measured facts (policies, TV, loss gap) for further assertions.
    """
    loss = losses.resolve(loss)
    result = check_population(loss, task, beta=beta, steps=steps, optim=OptimConfig(lr=lr), tol=tol)
    facts = result.facts
    assert result.status != "fail", (
        f"{loss.name} at beta={beta:g} on {result.name.removeprefix('population:')}: expected the trained "
        f"policy within tol={tol:g} of the exact optimum {_rounded(facts.get('optimum'))} and margins favouring "
        f"the winners; reached {_rounded(facts.get('policy'))}: {result.reason}")
    return facts


def assert_sound_loss(loss: MarginLoss | str | Callable[[torch.Tensor], torch.Tensor], beta: float = 0.5,
                      **params) -> None:
    """Assert that every check of ``polopt check`` but the population one passes (no
    training; milliseconds): elementwise, finite, f'(0) < 0, per-pair optimum, ...
    Warnings (not convex, a rescaled built-in) do not fail."""
    report = run_checks(losses.resolve(loss, **params), beta=beta)
    failures = "; ".join(f"{r.name}: {r.reason}" for r in report.failures)
    assert not report.failures, f"{report.loss}: expected every check of polopt check to pass; failed: {failures}"


def _rounded(policy) -> str:
    if policy is None:
        return "(none finite)"
    return "[" + "; ".join(", ".join(f"{v:.4f}" for v in row) for row in policy) + "]"
