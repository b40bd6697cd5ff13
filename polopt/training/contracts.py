"""What the run of ``polopt train`` relies on: the train result and the task/session interfaces.

These are declarations, not machinery. A task (built from the ``task`` group by its
``_target_``) satisfies :class:`Task`; its :meth:`Task.prepare` returns a :class:`Session`;
a session that trains the methods beyond the offline losses also offers
``for_method(name, **keys)`` returning a :class:`MethodView`. The training loop returns a
:class:`TrainResult`. Modules below the commands import these types from here, never from
the training loop.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol, runtime_checkable

import torch

from polopt.losses.margin import MarginLoss
from polopt.losses.pair import PairLoss
from polopt.pairs import PairSet


@dataclass
class TrainResult:
    """What a training run returns: steps done, wall seconds, the last logged record, every
    logged record, and the steps skipped for a non-finite loss or gradient."""

    steps: int
    seconds: float
    final: dict
    history: list[dict] = field(default_factory=list)
    skipped: list[int] = field(default_factory=list)
    stopped: str = "steps"  # why it ended: "steps" (ran train.steps) or "tol" (converged; polopt.training.stopping)


@runtime_checkable
class Session(Protocol):
    """A task prepared for one run (one loss, one beta, one seed).

    Optional attributes read with defaults: ``threads`` (torch threads for the loop; None:
    torch's default), ``trains_on_gpu`` (False: ``train.device=cuda`` is refused),
    ``for_method(name, **keys) -> MethodView`` (absent: ``method=offline`` only).
    """

    pairs: PairSet

    def build_policy(self, **model: Any) -> torch.nn.Module: ...

    def evaluate(self, policy: torch.nn.Module) -> dict: ...

    def summarise(self, policy: torch.nn.Module, result: TrainResult) -> dict: ...

    def table(self, summary: dict) -> str: ...


@runtime_checkable
class Task(Protocol):
    """The object a task's ``_target_`` builds."""

    def prepare(self, loss: MarginLoss | PairLoss, *, beta: float, smoothing: float = 0.0, mode: str = ...,
                n_pairs: int | None = None, seed: int = 0, run_dir: str | Path | None = None) -> Session: ...


@runtime_checkable
class MethodView(Protocol):
    """A finite session as a method sees it: the environment, the exact target, the measurements."""

    def environment(self) -> Any: ...

    def target_tensor(self) -> torch.Tensor | None: ...

    def evaluate(self, policy: torch.nn.Module) -> dict: ...

    def summarise(self, policy: torch.nn.Module, result: TrainResult) -> dict: ...

    def extend_offline(self, summary: dict, policy: torch.nn.Module) -> dict: ...

    def table(self, summary: dict) -> str: ...


def session_threads(session: Session) -> int | None:
    """The torch thread count a session asks for (None: torch's default)."""
    return getattr(session, "threads", None)


def session_tol(session: Session) -> float | None:
    """The early-stopping tolerance a session asks for when ``train.tol`` is null (None: run every step)."""
    return getattr(session, "tol", None)


def trains_on_gpu(session: Session) -> bool:
    """Whether a session's pairs may train on a GPU (``train.device=cuda``)."""
    return bool(getattr(session, "trains_on_gpu", False))


def method_view(session: Session, method: dict) -> MethodView | None:
    """``session.for_method(**method)`` where the session offers it, else None."""
    for_method = getattr(session, "for_method", None)
    return None if for_method is None else for_method(**method)


def task_for_model(task: Task, model: dict) -> Task:
    """``task.for_model(model)`` where the task reads its data with the model's own tokenizer (task=pairs with
    model=local_lm), else the task as it is."""
    for_model = getattr(task, "for_model", None)
    return task if for_model is None else for_model(model)


def pretrained_saver(session: Session):
    """``session.save_pretrained(policy, directory)`` where the session's policy is saved for the ecosystem
    (model=local_lm: transformers' / peft's ``save_pretrained``), else None."""
    return getattr(session, "save_pretrained", None)
