"""Training on several processes with torch.distributed: setup, sharding, the loss scale, reductions.

``torchrun --nproc_per_node=N -m polopt train ...`` starts N copies of the same
command; each finds its place in the environment variables torchrun sets
(``RANK``, ``WORLD_SIZE``, ``LOCAL_RANK``, ``MASTER_ADDR``, ``MASTER_PORT``).
Every rank builds the same seeded task, pairs and policy, draws the same seeded
batch order, and takes its own contiguous slice of each global batch (with full
batches, a slice of all pairs). The policy's gradients are averaged by
torch.nn.parallel.DistributedDataParallel (DDP), and each rank scales its local
loss so that the averaged gradient is the one-process gradient of the global
batch (:func:`sharded_mean`). So the N-process run follows the one-process run
of the same global batch up to floating-point summation order.

Only rank 0 (:attr:`Context.is_main`) writes: config.yaml, metrics.jsonl,
summary.json, checkpoints, the tqdm bar. Checkpoints hold the unwrapped
module's state dict (the trainer never saves the DDP wrapper), and the rest of
a checkpoint (step, batch order, cursor, RNG states) describes the global
batch, not a rank; so a checkpoint written by N processes resumes on M.

The backend is gloo on the CPU and NCCL where ``train.device=cuda`` puts each rank
on its GPU (:mod:`polopt.parallel.devices`). One process
(no ``WORLD_SIZE``, or ``WORLD_SIZE=1``) takes none of these paths, and the
trainer runs exactly as before.
"""

from __future__ import annotations

import contextlib
import dataclasses
import math
import os
from dataclasses import dataclass
from datetime import timedelta
from pathlib import Path

import torch
import torch.distributed as dist
from torch import nn

Tensor = torch.Tensor

_ENV = ("RANK", "WORLD_SIZE", "LOCAL_RANK")


@dataclass(frozen=True)
class Context:
    """Where this process stands: ``rank`` of ``world_size`` (``local_rank`` on its machine)."""

    rank: int = 0
    world_size: int = 1
    local_rank: int = 0
    strategy: str = "ddp"  # train.strategy: ddp (whole replicas) | fsdp (sharded, polopt.parallel.fsdp)

    @property
    def is_main(self) -> bool:
        return self.rank == 0

    @property
    def active(self) -> bool:
        """True when there is more than one process (collectives are needed)."""
        return self.world_size > 1

    @property
    def sharded(self) -> bool:
        """True when parameters, gradients and optimiser state are sharded over the ranks (fsdp)."""
        return self.active and self.strategy == "fsdp"


SINGLE = Context()
STRATEGIES = ("ddp", "fsdp")


def with_strategy(context: Context, strategy: str | None, environ=os.environ) -> Context:
    """``context`` with ``train.strategy``; fsdp needs the processes torchrun starts."""
    strategy = strategy or "ddp"
    if strategy not in STRATEGIES:
        raise ValueError(f"train.strategy must be one of {', '.join(STRATEGIES)}, got {strategy!r}")
    if strategy == "fsdp" and "WORLD_SIZE" not in environ:
        raise ValueError("train.strategy=fsdp shards the policy over processes started by torchrun: run "
                         "torchrun --nproc_per_node=N -m polopt train ... train.strategy=fsdp, or use "
                         "train.strategy=ddp on one process")
    return dataclasses.replace(context, strategy=strategy)


def from_environment(environ=os.environ) -> Context:
    """The :class:`Context` torchrun's variables describe; one process when they are absent."""
    if "WORLD_SIZE" not in environ:
        return SINGLE
    try:
        rank, world, local = (int(environ.get(k, "0")) for k in _ENV)
    except ValueError as err:
        raise ValueError(f"RANK, WORLD_SIZE and LOCAL_RANK must be integers (torchrun sets them), got "
                         f"{', '.join(f'{k}={environ.get(k)!r}' for k in _ENV)}") from err
    if world < 1 or not 0 <= rank < world:
        raise ValueError(f"RANK must lie in 0..WORLD_SIZE-1 and WORLD_SIZE >= 1, got RANK={rank}, "
                         f"WORLD_SIZE={world}")
    return Context(rank, world, local)


def setup(environ=os.environ, *, backend: str = "gloo", timeout_s: float = 600.0) -> Context:
    """Join the process group torchrun describes (``backend``: gloo on the CPU, nccl on GPUs) and
    return this rank's Context; with one process, return :data:`SINGLE` without touching
    torch.distributed."""
    context = from_environment(environ)
    if context.active and not dist.is_initialized():
        dist.init_process_group(backend, rank=context.rank, world_size=context.world_size,
                                timeout=timedelta(seconds=timeout_s))
    return context


def teardown(context: Context) -> None:
    """Leave the process group (after a barrier, so rank 0's last writes end before anyone exits)."""
    if context.active and dist.is_initialized():
        dist.barrier()
        dist.destroy_process_group()


def barrier(context: Context) -> None:
    if context.active:
        dist.barrier()


def broadcast_path(path: Path, context: Context) -> Path:
    """Rank 0's ``path`` on every rank."""
    if not context.active:
        return path
    box = [str(path)]
    dist.broadcast_object_list(box, src=0)
    return Path(box[0])


@contextlib.contextmanager
def main_first(context: Context):
    """Rank 0 runs the block first, then the others: files it writes there (a reference cache)
    are complete before anyone else reads them."""
    if context.active and not context.is_main:
        dist.barrier()
    yield
    if context.active and context.is_main:
        dist.barrier()


# ----------------------------------------------------------------------------
# The batch of this rank
# ----------------------------------------------------------------------------


def local_slice(n: int, context: Context) -> slice:
    """This rank's contiguous part of ``n`` batch positions (sizes differ by at most one)."""
    base, extra = divmod(n, context.world_size)
    start = context.rank * base + min(context.rank, extra)
    return slice(start, start + base + (1 if context.rank < extra else 0))


def shard(batch, index: Tensor, context: Context):
    """(this rank's pairs, their global indices, the total weight W of the global batch).

    ``batch`` is the global batch (a :class:`polopt.pairs.PairSet`); W is the sum of its
    weights (the number of pairs when unweighted), the denominator of the global loss.
    """
    n = len(batch)
    if n < context.world_size:
        raise ValueError(f"train.batch_size ({n} pairs a step) must be at least the number of processes "
                         f"({context.world_size}), so that every process gets a pair")
    total = float(n) if batch.weight is None else batch.weight.sum()
    part = torch.arange(n)[local_slice(n, context)]  # (B_r,)
    return batch.select(part), index[part], total


def sharded_mean(values: Tensor, *, weight: Tensor | None, total_weight, context: Context) -> tuple[Tensor, Tensor]:
    """(the loss this rank backpropagates, the global loss of the batch) from this rank's per-pair losses.

    The global loss is the weighted mean over the global batch, ``L = sum_i w_i l_i / W``
    with ``W = sum_i w_i``. Split the batch over ranks r = 1..N, with ``S_r = sum_{i in r} w_i l_i``:
    ``L = sum_r S_r / W``. DDP averages the gradients, ``g = (1/N) sum_r grad L_r``, so
    ``g = grad L`` exactly when ``sum_r L_r = N L``; the choice ``L_r = N S_r / W`` does it,
    rank by rank, with no communication before the backward pass (every rank knows W, since
    every rank holds the whole global batch's weights). A plain local weighted mean
    ``S_r / W_r`` would weigh each rank's pairs by ``W / (N W_r)``: wrong whenever the ranks'
    weight sums differ. The global loss for metrics and the non-finite check is
    ``L = (1/N) sum_r L_r`` (one all_reduce), so every rank takes the same decision.

    Shape: values (B_r,), weight (B_r,) or None; both outputs are scalars.
    """
    local_sum = values.sum() if weight is None else (weight.to(values.dtype) * values).sum()
    objective = local_sum * (context.world_size / torch.as_tensor(total_weight, dtype=values.dtype))
    global_loss = objective.detach().clone()
    dist.all_reduce(global_loss)
    return objective, global_loss / context.world_size


def batch_statistics(rho: Tensor, logratio_w: Tensor, logratio_l: Tensor, weight: Tensor | None,
                     context: Context) -> dict:
    """:func:`polopt.losses.reduce.batch_statistics` over the global batch: the weighted sums of every rank
    added by one all_reduce, then divided by the global weight."""
    w = torch.ones_like(rho) if weight is None else weight.to(rho.dtype)  # (B_r,)
    sums = torch.stack([(w * rho).sum(), (w * (torch.sign(rho) + 1) / 2).sum(), (w * logratio_w).sum(),
                        (w * logratio_l).sum(), w.sum()])  # (5,)
    dist.all_reduce(sums)
    names = ("margin_mean", "pair_accuracy", "logratio_winner", "logratio_loser")
    return {name: float(sums[k] / sums[4]) for k, name in enumerate(names)}


# ----------------------------------------------------------------------------
# The policy
# ----------------------------------------------------------------------------


class _Scorer(nn.Module):
    """``forward = policy.logprobs``: DDP hooks the forward pass, the trainer calls logprobs."""

    def __init__(self, policy: nn.Module):
        super().__init__()
        self.policy = policy

    def forward(self, prompt: Tensor, response: Tensor, loser: Tensor | None = None) -> Tensor:
        if loser is None:
            return self.policy.logprobs(prompt, response)
        return self.policy.logprobs(prompt, response, loser)  # a shared-prompt pass: (2B,)


def scorer(policy: nn.Module, context: Context, device: torch.device | None = None):
    """The callable the trainer scores pairs with: ``policy.logprobs`` itself with one process,
    a DDP-wrapped view of it with several (gradients averaged over ranks in the backward pass;
    on a GPU, DDP is told which one). The policy stays the unwrapped module, so its state dict
    has no ``module.`` prefix."""
    if not context.active or context.sharded:  # fsdp: ``policy`` is the sharded copy (:func:`shard_for`)
        return policy.logprobs
    device_ids = [device.index] if device is not None and device.type == "cuda" else None
    # buffers (reference tables, enumerations) are the same on every rank by construction
    return nn.parallel.DistributedDataParallel(_Scorer(policy), device_ids=device_ids, forward_sync_buffers=False)


def shard_for(policy: nn.Module, context: Context, device: torch.device | str | None = None) -> nn.Module:
    """The module the optimiser trains: ``policy`` itself, or with ``train.strategy=fsdp`` a sharded
    copy (:mod:`polopt.parallel.fsdp`; ``policy`` is then emptied until :func:`gathered` or :func:`give_back`
    fills it)."""
    if not context.sharded:
        return policy
    from polopt.parallel import fsdp

    return fsdp.shard_policy(policy, context.world_size, torch.device(device or "cpu"))


def gathered(trained: nn.Module, policy: nn.Module):
    """A context in which ``policy`` holds the trained weights (a no-op unless ``trained`` is its sharded copy)."""
    if trained is policy:
        return contextlib.nullcontext(policy)
    from polopt.parallel import fsdp

    return fsdp.filled(trained, policy)


def give_back(trained: nn.Module, policy: nn.Module) -> None:
    """After the last step: ``policy`` holds the trained weights for good."""
    if trained is not policy:
        from polopt.parallel import fsdp

        fsdp.fill(trained, policy)


def clip_grad_norm(module: nn.Module, max_norm: float) -> float:
    """torch's ``clip_grad_norm_`` over ``module``'s gradients (sharded ones too); the total norm as a float.
    No limit (``max_norm`` inf): the norm alone (torch's ``get_total_norm``, which ``clip_grad_norm_`` calls),
    since the clip would multiply every gradient by min(1, inf / norm) = 1, a pass over the weights for nothing."""
    from polopt.parallel.fsdp import total_norm

    if max_norm == math.inf:
        return total_norm(nn.utils.get_total_norm([p.grad for p in module.parameters() if p.grad is not None]))
    return total_norm(nn.utils.clip_grad_norm_(module.parameters(), max_norm))
