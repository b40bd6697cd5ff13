"""Shared by tests/test_distributed.py: finite-task runs on one process or on a gloo group.

The worker is a module-level function so that torch.multiprocessing's spawn can
pickle it by name.
"""

from __future__ import annotations

import dataclasses
import os
import socket

import numpy as np
import torch

from polopt import losses
from polopt.parallel import distributed
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig
from toy_tasks.families import bradley_terry
from toy_tasks.finite.session import prepare

# exact: weighted pairs, full batch (the ranks' weight sums differ, so the loss scale matters);
# sampled: unweighted minibatches of 7 (shards of 4 and 3), across epochs, with clipping and a warm-up
SETUPS = {
    "exact-weighted-fullbatch": dict(mode="exact", kind="tabular", batch_size=None,
                                     optim=OptimConfig("adam", 0.05)),
    "sampled-minibatch": dict(mode="sampled", kind="loglinear", batch_size=7,
                              optim=OptimConfig("adam", 0.05, warmup_steps=3, grad_clip=0.5)),
    # one pair's reference log-prob is NaN: the batches holding it are skipped on every rank alike
    "sampled-skip-nan": dict(mode="sampled", kind="tabular", batch_size=7, optim=OptimConfig("adam", 0.05),
                             nan_pair=5, on_nonfinite="skip"),
    # a pair objective that reads the lengths (R-DPO), smoothed: each rank's shard carries its pairs' lengths
    "pair-objective-lengths": dict(mode="sampled", kind="tabular", batch_size=7, optim=OptimConfig("adam", 0.05),
                                   loss=("length_regularised", {"alpha": 0.3}), smoothing=0.1,
                                   lengths=[1.0, 2.0, 3.0, 5.0, 8.0]),
}
STEPS = 40


def free_port() -> int:
    """A TCP port nobody listens on now (bound to port 0, the system picks one)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def session_and_policy(setup: str):
    s = SETUPS[setup]
    name, params = s.get("loss", ("logistic", {}))
    loss = losses.resolve(name, **params)
    task = bradley_terry(n_responses=5, seed=3)
    if "lengths" in s:
        task = dataclasses.replace(task, lengths=np.array([s["lengths"]]))
    session = prepare(task, loss, beta=0.5, mode=s["mode"], n_pairs=29, seed=1)
    return session, session.build_policy(kind=s["kind"], width=6, seed=2), loss


def run(setup: str, context: distributed.Context = distributed.SINGLE, *, steps: int = STEPS, **kwargs):
    """(policy, TrainResult) of one setup; the same call on every rank."""
    s = SETUPS[setup]
    session, policy, loss = session_and_policy(setup)
    if "nan_pair" in s:
        session.pairs.reference_winner[s["nan_pair"]] = float("nan")
    result = train(policy, session.pairs, loss,
                   TrainSettings(beta=0.5, steps=steps, optim=s["optim"], batch_size=s["batch_size"], seed=7,
                                 log_every=5, progress=False, on_nonfinite=s.get("on_nonfinite", "stop"),
                                 smoothing=s.get("smoothing", 0.0)),
                   evaluate=session.evaluate, context=context, **kwargs)
    return policy, result


def worker(rank: int, world: int, port: int, out: str) -> None:
    """One rank of a gloo group: every setup, rank 0 saves the policies and the histories to ``out``."""
    torch.set_num_threads(1)
    env = {"RANK": str(rank), "WORLD_SIZE": str(world), "LOCAL_RANK": str(rank), "MASTER_ADDR": "127.0.0.1",
           "MASTER_PORT": str(port)}
    os.environ.update(env)
    context = distributed.setup(env)
    results = {}
    for setup in SETUPS:
        policy, result = run(setup, context)
        results[setup] = {"policy": policy.state_dict(), "history": result.history, "skipped": result.skipped}
    if context.is_main:
        torch.save(results, out)
    distributed.teardown(context)
