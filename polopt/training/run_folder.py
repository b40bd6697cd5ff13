"""The run folder: the one writer of what a training run leaves, and summary.json's one assembly.

A run folder holds ``config.yaml`` (the resolved config), ``metrics.jsonl`` (one JSON line per
logged step), ``summary.json`` (what the run found), and either ``checkpoints/`` (offline
runs: resumable, see :mod:`polopt.checkpoints.store`) or ``policy.pt`` (method runs, which start
over); a local causal LM's run also ``policy/``, written by ``save_pretrained``. Every command
that writes a run folder goes through :class:`RunFolder`; with several processes only rank 0 writes
(``main``), the other ranks' calls do nothing.
"""

from __future__ import annotations

import io
import json
import os
import shutil
from collections.abc import Callable
from pathlib import Path

import torch

from polopt.checkpoints import store as checkpoint
from polopt.parallel import distributed
from polopt.training.contracts import TrainResult

POLICY_DIR = "policy"  # a run's policy saved for the ecosystem (save_pretrained), beside the checkpoints


def json_ready(value):
    """Numbers that JSON cannot hold (NaN, inf) become null; numpy scalars become floats."""
    if isinstance(value, dict):
        return {k: json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_ready(v) for v in value]
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        value = value.item()
    if isinstance(value, float) and value != value or value in (float("inf"), float("-inf")):
        return None
    return value


def write_json(path: Path, data: dict) -> None:
    """Write JSON atomically: a temporary file, fsync, then rename over the target."""
    tmp = path.with_suffix(path.suffix + ".tmp")
    with tmp.open("w", encoding="utf-8") as f:
        json.dump(json_ready(data), f, indent=1)
        f.write("\n")
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


class RunFolder:
    """The files of one run under ``path``; only ``main`` (rank 0) writes."""

    def __init__(self, path: Path, *, main: bool = True):
        self.path, self.main = Path(path), main
        self.path.mkdir(parents=True, exist_ok=True)
        self.config_path = self.path / "config.yaml"
        self.metrics_path = self.path / "metrics.jsonl"
        self.summary_path = self.path / "summary.json"
        self.checkpoints = self.path / "checkpoints"
        self.policy_path = self.path / "policy.pt"

    def write_config(self, text: str) -> None:
        if self.main:
            checkpoint.atomic_write(self.config_path, text.encode())

    def start_metrics(self, history: list[dict] | None = None) -> Path | None:
        """Empty ``metrics.jsonl`` (a fresh run), or exactly the lines of ``history`` (a resumed
        run: the lines up to the checkpoint, as the uninterrupted run wrote them); the path to
        append to, None on the other ranks."""
        if not self.main:
            return None
        if history is None:
            self.metrics_path.unlink(missing_ok=True)
        else:
            checkpoint.atomic_write(self.metrics_path, "".join(json.dumps(r) + "\n" for r in history).encode())
        return self.metrics_path

    def checkpoint_saver(self, *, run_id: str, fingerprint: str, config: dict,
                         keep: int | None) -> Callable[[dict], object] | None:
        """``save(training_state)`` into ``checkpoints/`` (rank 0), else None."""
        if not self.main:
            return None

        def save(state: dict) -> None:
            checkpoint.save(self.checkpoints, state, run_id=run_id, fingerprint=fingerprint, config=config, keep=keep)

        return save

    def write_policy(self, policy: torch.nn.Module, step: int, config: dict) -> None:
        """``policy.pt``: the final weights of a run that does not checkpoint (a method run)."""
        if self.main:
            buffer = io.BytesIO()
            torch.save({"policy": policy.state_dict(), "step": step, "config": config}, buffer)
            checkpoint.atomic_write(self.policy_path, buffer.getvalue())

    def write_pretrained(self, save: Callable[[torch.nn.Module, Path], None] | None, policy: torch.nn.Module) -> None:
        """``policy/``: ``save(policy, directory)`` (a session's ``save_pretrained``; None: nothing to write) into
        a temporary folder, then renamed over any earlier one, so a reader never sees half a policy."""
        if not self.main or save is None:
            return
        target, tmp = self.path / POLICY_DIR, self.path / f".{POLICY_DIR}.tmp"
        shutil.rmtree(tmp, ignore_errors=True)
        save(policy, tmp)
        shutil.rmtree(target, ignore_errors=True)
        os.replace(tmp, target)

    def write_summary(self, summary: dict) -> None:
        if self.main:
            write_json(self.summary_path, summary)


def run_summary(session, view, policy: torch.nn.Module, result: TrainResult, *, method: str,
                context: distributed.Context = distributed.SINGLE) -> dict:
    """summary.json's content, assembled here only: the task's fields (``session.summarise``, or the
    method view's for a method run), the run's own (``skipped_steps``, ``processes``) and, for an
    offline run on a task with method views, the comparison with the methods' targets."""
    if method != "offline":
        return {**view.summarise(policy, result), "stopped": result.stopped}
    summary = session.summarise(policy, result)
    summary["stopped"] = result.stopped  # "tol" (converged) or "steps"; summary["steps"]: the steps that ran
    summary["skipped_steps"] = result.skipped
    if view is not None:
        summary = view.extend_offline(summary, policy)
    if context.active:
        summary["processes"] = context.world_size
    return summary
