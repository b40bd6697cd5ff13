"""Choosing a method by name: the ``method`` config group to a per-step objective, and training it.

The methods themselves are described in :mod:`polopt.methods`."""


from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import torch

from polopt.losses.margin import MarginLoss
from polopt.methods.distill import distill_objective
from polopt.methods.environment import FiniteEnvironment
from polopt.methods.group import group_objective
from polopt.methods.rl import rl_objective
from polopt.methods.selfplay import selfplay_objective
from polopt.training.contracts import TrainResult
from polopt.training.loop import MethodBatches, TrainSettings, optimise
from polopt.training.optim import OptimConfig

METHODS = ("offline", "rl", "selfplay", "best_of_n", "group")


def check_method(name: str) -> None:
    if name not in METHODS:
        raise ValueError(f"method must be one of {', '.join(METHODS)}, got {name!r}")


def method_objective(method: dict, policy: torch.nn.Module, env: FiniteEnvironment, *, loss: MarginLoss, beta: float,
                     target: torch.Tensor | None, seed: int) -> Callable:
    """The per-step objective of the method named by ``method['name']`` with its keys."""
    name = method["name"]
    check_method(name)
    generator = torch.Generator().manual_seed(seed)
    estimator = method.get("estimator", "exact")
    if name == "rl":
        return rl_objective(policy, env, beta=beta, estimator=estimator, batch_size=method.get("batch_size", 64),
                            generator=generator)
    if name == "selfplay":
        return selfplay_objective(policy, env, loss, beta=beta, estimator=estimator,
                                  batch_size=method.get("batch_size", 64), update=method.get("update"),
                                  generator=generator)
    if name == "best_of_n":
        return distill_objective(policy, env, target=target, estimator=estimator, n=method.get("n", 4),
                                 n_samples=method.get("n_samples", 4096), generator=generator)
    if name == "group":
        return group_objective(policy, env, beta=beta, group_size=method.get("group_size", 4),
                               advantage=method.get("advantage", "standardised"), kl=method.get("kl", "estimator"),
                               estimator=estimator, batch_size=method.get("batch_size", 16), generator=generator)
    raise ValueError("method=offline trains with polopt.training.loop.PairBatches, not through polopt.methods")


def train_method(method: dict, policy: torch.nn.Module, env: FiniteEnvironment, *, loss: MarginLoss, beta: float,
                 steps: int, optim: OptimConfig, target: torch.Tensor | None = None, seed: int = 0,
                 log_every: int = 10, evaluate: Callable | None = None, metrics_path: Path | None = None,
                 progress: bool = True) -> TrainResult:
    """Train ``policy`` with the method ``method['name']`` (not offline)."""
    objective = method_objective(method, policy, env, loss=loss, beta=beta, target=target, seed=seed)
    settings = TrainSettings(steps=steps, optim=optim, beta=beta, seed=seed, log_every=log_every, progress=progress)
    return optimise(policy, MethodBatches(objective, method["name"]), settings, evaluate=evaluate,
                    metrics_path=metrics_path)
