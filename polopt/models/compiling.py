"""``train.compile``: the policy's forward pass compiled by torch.compile (TorchInductor).

On the CPU, TorchInductor writes C++ and builds it with the system's compiler; without
one, compilation fails deep inside the first step, so :func:`compile_policy` looks for
it first and says so in one line. The model is compiled in place
(``nn.Module.compile``): its state dict keeps its keys, so checkpoints and resumes are
those of the uncompiled model. Batches change length from step to step (trimming,
bucketing, the length split), so the graph is compiled for dynamic shapes rather than
once per length. Whether it pays is measured by bench/share_prompt.py.
"""

from __future__ import annotations

import os
import shutil

from torch import nn

COMPILERS = ("c++", "g++", "clang++")  # what TorchInductor's CPU backend calls, unless CXX names another


def system_compiler() -> str | None:
    """The C++ compiler TorchInductor would use on the CPU, or None when there is none."""
    for candidate in (os.environ.get("CXX"), *COMPILERS):
        if candidate and shutil.which(candidate):
            return shutil.which(candidate)
    return None


def compile_policy(policy: nn.Module) -> nn.Module:
    """Compile the forward pass of ``policy.model`` (a sequence policy) in place; return the policy.

    A policy without a ``model`` (the finite tasks' tables) is returned as it is: its
    forward is a lookup with nothing to fuse.
    """
    model = getattr(policy, "model", None)
    if model is None:
        return policy
    if system_compiler() is None:
        raise ValueError(f"train.compile=true needs a C++ compiler for torch.compile on the CPU (one of "
                         f"{', '.join(COMPILERS)} or $CXX), and none was found: install one or set train.compile=false")
    model.compile(dynamic=True)
    return policy
