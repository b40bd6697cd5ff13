"""A sequence task prepared for a group objective (``task=sequence loss=calibrated_logistic``).

The finite task's group session (:mod:`toy_tasks.finite.group_session`) already weighs every pair of
enumerated responses as a group of two (``task.feedback=pairs``), solves the exact target once and
measures a policy against it; what differs here is the policy: the tiny transformer (or any sequence
model of :func:`toy_tasks.sequence.session.sequence_policy`) scoring the enumerated responses, judged
against the tolerance of a sequence model.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch

from polopt.training.verdict import SEQUENCE_MODEL_TOLERANCE
from toy_tasks.finite import group_session
from toy_tasks.finite.group_session import GroupSession
from toy_tasks.sequence.session import sequence_policy


@dataclass
class SequenceGroupSession(GroupSession):
    """The group session of the enumerated task, with sequence models as policies."""

    sequence: object = None  # toy_tasks.sequence.task.SequenceTask: vocabulary, reference model, rows

    def build_policy(self, kind: str = "transformer", width: int = 32, layers: int = 2, heads: int = 2,
                     context: int | None = None, seed: int = 0, init: str = "reference",
                     path: str | None = None, adapter: str | None = None, lora: dict | None = None) -> torch.nn.Module:
        """A sequence model over the enumerated responses; ``model=tabular|loglinear``: the finite one."""
        del lora  # its defaults come with model=local_lm; they are read only with an adapter
        if kind in ("tabular", "loglinear"):
            return super().build_policy(kind, width=width, seed=seed)
        self.tolerance = SEQUENCE_MODEL_TOLERANCE  # a sequence model fits the enumerated distribution approximately
        return sequence_policy(self.sequence, kind, width=width, layers=layers, heads=heads, context=context,
                               seed=seed, init=init, path=path, adapter=adapter)

    def summarise(self, policy, result) -> dict:
        with torch.no_grad():
            summary = super().summarise(policy, result)
        summary.update({"task": "sequence", "n_symbols": self.sequence.vocab.n_symbols,
                        "max_length": self.sequence.max_length, "n_responses": self.sequence.n_responses})
        return summary


def prepare(task, loss, *, beta: float, smoothing: float = 0.0, mode: str = "exact", n_pairs: int = 2000,
            seed: int = 0, run_dir=None) -> SequenceGroupSession:
    """The pairs of ``task``'s enumerated responses as groups of two, and the exact target of ``loss``."""
    base = group_session.prepare(task.finite_task(), loss, feedback="pairs", group_size=2, beta=beta,
                                 smoothing=smoothing, mode=mode, n_pairs=n_pairs, seed=seed, run_dir=run_dir)
    return SequenceGroupSession(**{f: getattr(base, f) for f in base.__dataclass_fields__}, sequence=task)
