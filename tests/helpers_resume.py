"""Shared by the checkpoint tests: a small run and a bit-for-bit comparison of states."""

from __future__ import annotations

import torch

from polopt import losses
from polopt.models.tabular import TabularPolicy
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig
from toy_tasks.families import bradley_terry
from toy_tasks.finite.session import prepare

# one configuration per kind of state that must come back: Adam moments with a warm-up into a cosine
# schedule, minibatch order across epochs, SGD, a log-linear model's buffers, bf16 autocast, L-BFGS
SETUPS = {
    "adam-minibatch": dict(mode="sampled", kind="tabular", optim=OptimConfig("adam", 0.05, warmup_steps=4),
                           batch_size=6, precision="fp32"),
    "sgd-fullbatch": dict(mode="exact", kind="loglinear", optim=OptimConfig("sgd", 1.0, schedule="constant",
                                                                            grad_clip=0.5),
                          batch_size=None, precision="fp32"),
    "adamw-bf16": dict(mode="sampled", kind="loglinear", optim=OptimConfig("adamw", 0.05, weight_decay=0.01),
                       batch_size=5, precision="bf16"),
    # L-BFGS's curvature history, step length and counters (a line search re-evaluating the full batch)
    "lbfgs-fp64": dict(mode="exact", kind="loglinear", optim=OptimConfig("lbfgs", 1.0, schedule="constant",
                                                                         iterations=2, history=4),
                       batch_size=None, precision="fp64"),
    # draws from torch's global RNG every step, as dropout in a sequence model does
    "adam-dropout": dict(mode="sampled", kind="dropout", optim=OptimConfig("adam", 0.05), batch_size=6,
                         precision="fp32"),
}


class DropoutPolicy(TabularPolicy):
    """A tabular policy whose scores pass through dropout (p = 0.3) while training."""

    def log_distribution(self):
        scores = torch.nn.functional.dropout(self.scores_table(), p=0.3, training=self.training)  # (X, K)
        return torch.log_softmax(self.reference_logprobs + scores, dim=-1)


def build(setup: str, loss_name: str = "logistic"):
    s = SETUPS[setup]
    loss = losses.resolve_margin(loss_name)
    session = prepare(bradley_terry(n_responses=4, seed=3), loss, beta=0.5, mode=s["mode"], n_pairs=23, seed=1)
    if s["kind"] == "dropout":
        policy = DropoutPolicy(session.build_policy().reference_logprobs, score_scale=2.0)
    else:
        policy = session.build_policy(kind=s["kind"], width=6, seed=2)
    return session, policy, loss


def run_steps(setup: str, steps: int, checkpoint_every: int = 0, **kwargs):
    s = SETUPS[setup]
    session, policy, loss = build(setup)
    result = train(policy, session.pairs, loss,
                   TrainSettings(beta=0.5, steps=steps, optim=s["optim"], batch_size=s["batch_size"], seed=7,
                                 log_every=3, progress=False, precision=s["precision"],
                                 checkpoint_every=checkpoint_every),
                   evaluate=session.evaluate, **kwargs)
    return policy, result


def without_seconds(records: list[dict]) -> list[dict]:
    return [{k: v for k, v in r.items() if k != "seconds"} for r in records]


def assert_same_state(a, b, path: str = "") -> None:
    """Every tensor equal bit for bit (torch.equal), every other value equal; wall-clock fields skipped."""
    if isinstance(a, torch.Tensor):
        assert isinstance(b, torch.Tensor) and a.dtype == b.dtype and torch.equal(a, b), path
    elif isinstance(a, dict):
        keys = {k for k in a if k not in ("seconds",)}
        assert keys == {k for k in b if k not in ("seconds",)}, path
        for k in keys:
            assert_same_state(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, (list, tuple)):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            assert_same_state(x, y, f"{path}[{i}]")
    else:
        assert a == b, f"{path}: {a!r} != {b!r}"
