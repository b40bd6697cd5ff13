"""Fully sharded training (``train.strategy=fsdp``): the policy's shards, and its whole weights back.

Under torchrun with ``train.strategy=fsdp`` each rank holds 1/N of every parameter, of
its gradient and of the optimiser's moments: torch's FSDP2
(``torch.distributed.fsdp.fully_shard``; Zhao et al., PyTorch FSDP: Experiences on
Scaling Fully Sharded Data Parallel, 2023) gathers a unit's parameters for its
forward and backward pass and reduce-scatters (averages) its gradients. Each
element of a ``ModuleList`` (the transformer's blocks) is a unit of its own, the
rest of the policy the root unit, so at most one block's full weights live at once
beside the root's. The loss scale of :func:`polopt.parallel.distributed.sharded_loss` makes
the averaged gradient the one-process gradient of the global batch, as with DDP.

The trainer keeps the caller's policy: :func:`shard_policy` shards a copy that
shares nothing large with it, and empties the caller's parameters (their storage
freed) while the copy trains. :func:`fill` puts the copy's whole weights back
(an all_gather on every rank); the trainer does it where the caller's policy is
read (the ``evaluate`` callback at logged steps, and after the last step).
"""

from __future__ import annotations

import contextlib
import copy

import torch
from torch import nn

Tensor = torch.Tensor


def shard_policy(policy: nn.Module, world_size: int, device: torch.device) -> nn.Module:
    """A copy of ``policy`` sharded over ``world_size`` ranks (its ``logprobs`` is an FSDP forward
    method); the caller's parameters are emptied (see :func:`fill`)."""
    from torch.distributed.device_mesh import init_device_mesh
    from torch.distributed.fsdp import fully_shard, register_fsdp_forward_method

    memo = {id(p): p for p in policy.parameters()}  # the copy takes the same Parameter objects, no second copy
    sharded = copy.deepcopy(policy, memo)
    # every forward pass is a collective (each unit all-gathers its weights), so every rank must run the same
    # number of passes: no splitting of a batch by its own rows' lengths, which differ between ranks
    for module in sharded.modules():
        if hasattr(module, "split_lengths"):
            module.split_lengths = False
    mesh = init_device_mesh(device.type, (world_size,))
    for module in list(sharded.modules()):
        if isinstance(module, nn.ModuleList):
            for unit in module:
                fully_shard(unit, mesh=mesh)
    fully_shard(sharded, mesh=mesh)  # fully_shard copies each rank's shard into storage of its own
    register_fsdp_forward_method(sharded, "logprobs")
    empty(policy)
    return sharded


def empty(policy: nn.Module) -> None:
    """Free the storage of ``policy``'s parameters (each becomes a tensor of no elements)."""
    for p in policy.parameters():
        p.data = torch.empty(0, dtype=p.dtype, device=p.device)


def full_state(sharded: nn.Module) -> dict[str, Tensor]:
    """The whole, unsharded parameters and buffers of ``sharded`` on every rank (a collective)."""
    from torch.distributed.checkpoint.state_dict import StateDictOptions, get_model_state_dict

    return get_model_state_dict(sharded, options=StateDictOptions(full_state_dict=True))


def fill(sharded: nn.Module, policy: nn.Module) -> None:
    """Give ``policy`` the whole current weights of its sharded copy (every rank calls it)."""
    state = full_state(sharded)
    for name, p in policy.named_parameters():
        p.data = state[name].detach().to(p.device).clone()


@contextlib.contextmanager
def filled(sharded: nn.Module, policy: nn.Module):
    """``policy`` holds the whole weights inside the block and is emptied again after it."""
    fill(sharded, policy)
    try:
        yield policy
    finally:
        empty(policy)


def total_norm(norm) -> float:
    """``clip_grad_norm_``'s total norm as a float (over DTensor gradients it is a replicated DTensor)."""
    if hasattr(norm, "full_tensor"):
        norm = norm.full_tensor()
    return float(norm)
