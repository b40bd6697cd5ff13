"""Shared test set-up: one torch thread for the whole suite, and helpers for the methods' tests."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest
import torch

from polopt import losses
from polopt.methods.dispatch import train_method
from polopt.training.optim import OptimConfig

sys.path.insert(0, str(Path(__file__).resolve().parent))  # helpers_*.py and user_*.py, from every tests/ folder
torch.set_num_threads(1)  # the finite tasks' tensors are tiny: a thread pool only adds overhead on a shared CPU


@pytest.fixture
def run_method():
    """``run_method(task, name, beta=..., steps=..., **method_keys) -> (view, policy, result)``:
    one method trained on a finite task through the same calls as ``polopt train``."""

    def run(task, name, *, beta=0.5, steps=1000, lr=0.05, offline_loss="squared", **params):
        session = task.prepare(losses.resolve_margin(offline_loss), beta=beta)
        view = session.for_method(name, **params)
        policy = session.build_policy("tabular")
        result = train_method({"name": name, **params}, policy, view.environment(),
                              loss=losses.resolve_margin(params.get("loss", "squared")), beta=beta, steps=steps,
                              optim=OptimConfig(lr=lr), target=view.target_tensor(), progress=False)
        return view, policy, result

    return run
