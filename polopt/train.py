"""The training loop: any loss of the family on any task that hands over pairs.

A task gives the trainer a :class:`PairSet` (prompt, winner, loser, optional
weight, and the reference log-probabilities of winner and loser, computed once
and cached) and, optionally, an ``evaluate(policy) -> dict`` callback for
metrics that need the task (KL to the reference, distance to the optimum).
The policy is any ``nn.Module`` with ``logprobs(prompt, response) -> (B,)``.

One step reads top to bottom:
    1. learning rate (the scheduler), 2. batch, 3. policy log-probs of winners
    and losers, 4. margins and loss, 5. backward, clip, step, 6. log.
"""

from __future__ import annotations

import json
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import torch
from tqdm.auto import tqdm

from polopt.losses import Loss
from polopt.objective import margins, preference_loss

Tensor = torch.Tensor


@dataclass
class PairSet:
    """Labelled pairs as tensors with a leading dimension N.

    ``winner``/``loser`` are whatever the policy's ``logprobs`` takes (response
    indices for finite tasks). ``reference_winner``/``reference_loser`` (N,) are
    the cached reference log-probabilities; ``weight`` (N,) or None; ``tokens`` (N,)
    the real tokens of each pair (prompt with winner plus prompt with loser, no
    padding) for the ``tokens_per_s`` metric, or None.
    """

    prompt: Tensor
    winner: Tensor
    loser: Tensor
    reference_winner: Tensor
    reference_loser: Tensor
    weight: Tensor | None = None
    tokens: Tensor | None = None

    def __len__(self) -> int:
        return len(self.prompt)

    def select(self, index: Tensor) -> PairSet:
        return PairSet(self.prompt[index], self.winner[index], self.loser[index],
                       self.reference_winner[index], self.reference_loser[index],
                       None if self.weight is None else self.weight[index],
                       None if self.tokens is None else self.tokens[index])


@dataclass
class OptimConfig:
    """``optim`` group: optimiser name (any of torch.optim's Adam, AdamW, SGD), learning
    rate, cosine decay to 0 after a linear warm-up, and gradient clipping."""

    name: str = "adam"
    lr: float = 0.05
    weight_decay: float = 0.0
    warmup_steps: int = 0
    schedule: str = "cosine"  # cosine | constant
    grad_clip: float | None = None


@dataclass
class TrainResult:
    steps: int
    seconds: float
    final: dict
    history: list[dict] = field(default_factory=list)


_OPTIMISERS = {"adam": torch.optim.Adam, "adamw": torch.optim.AdamW, "sgd": torch.optim.SGD}


def make_optimiser(params, cfg: OptimConfig, steps: int):
    """torch.optim optimiser and scheduler for ``cfg``."""
    if cfg.name not in _OPTIMISERS:
        raise ValueError(f"optim.name must be one of {', '.join(_OPTIMISERS)}, got {cfg.name!r}")
    if not cfg.lr > 0:
        raise ValueError(f"optim.lr must be > 0, got {cfg.lr!r}")
    optimiser = _OPTIMISERS[cfg.name](params, lr=cfg.lr, weight_decay=cfg.weight_decay)
    if cfg.schedule == "constant":
        main = torch.optim.lr_scheduler.ConstantLR(optimiser, factor=1.0, total_iters=0)
    elif cfg.schedule == "cosine":
        main = torch.optim.lr_scheduler.CosineAnnealingLR(optimiser, T_max=max(steps - cfg.warmup_steps, 1))
    else:
        raise ValueError(f"optim.schedule must be cosine or constant, got {cfg.schedule!r}")
    if cfg.warmup_steps <= 0:
        return optimiser, main
    warmup = torch.optim.lr_scheduler.LinearLR(optimiser, start_factor=1e-3, total_iters=cfg.warmup_steps)
    return optimiser, torch.optim.lr_scheduler.SequentialLR(optimiser, [warmup, main], milestones=[cfg.warmup_steps])


def batch_statistics(rho: Tensor, logratio_w: Tensor, logratio_l: Tensor, weight: Tensor | None) -> dict:
    """Weighted means of the margin, the share of pairs with a positive margin, and
    the two log-ratios (both falling together is likelihood displacement)."""
    w = torch.ones_like(rho) if weight is None else weight.to(rho.dtype)
    w = w / w.sum()
    return {
        "margin_mean": float((w * rho).sum()),
        "pair_accuracy": float((w * (rho > 0).to(rho.dtype)).sum()),
        "logratio_winner": float((w * logratio_w).sum()),
        "logratio_loser": float((w * logratio_l).sum()),
    }


def train(policy: torch.nn.Module, pairs: PairSet, loss: Loss, *, beta: float, steps: int,
          optim: OptimConfig, smoothing: float = 0.0, batch_size: int | None = None, seed: int = 0,
          log_every: int = 10, evaluate: Callable[[torch.nn.Module], dict] | None = None,
          metrics_path: Path | None = None, progress: bool = True,
          precision: str = "fp32") -> TrainResult:
    """Minimise the preference loss of ``pairs`` over the policy's parameters.

    ``batch_size`` None (or >= N) uses every pair each step (full batch);
    otherwise each epoch visits the pairs in a fresh order drawn from ``seed``.
    Metrics of every ``log_every``-th step (and the last) go to ``metrics_path``
    as JSON lines.
    """
    if not isinstance(steps, int) or steps < 1:
        raise ValueError(f"train.steps must be a positive integer, got {steps!r}")
    if batch_size is not None and (not isinstance(batch_size, int) or batch_size < 1):
        raise ValueError(f"train.batch_size must be a positive integer or null (all pairs), got {batch_size!r}")
    if precision not in ("fp32", "bf16"):
        raise ValueError(f"precision must be fp32 or bf16, got {precision!r}")
    torch.manual_seed(seed)
    generator = torch.Generator().manual_seed(seed)
    optimiser, scheduler = make_optimiser(policy.parameters(), optim, steps)
    full_batch = batch_size is None or batch_size >= len(pairs)
    order, cursor = torch.randperm(len(pairs), generator=generator), 0
    history: list[dict] = []
    sink = metrics_path.open("a", encoding="utf-8") if metrics_path is not None else None
    start, tokens_seen = time.perf_counter(), 0
    bar = tqdm(range(1, steps + 1), desc=f"train {loss.name}", disable=not progress, leave=False)
    try:
        for step in bar:
            # 1. learning rate of this step
            lr = optimiser.param_groups[0]["lr"]
            # 2. batch
            if full_batch:
                batch = pairs
            else:
                if cursor + batch_size > len(pairs):
                    order, cursor = torch.randperm(len(pairs), generator=generator), 0
                batch = pairs.select(order[cursor:cursor + batch_size])
                cursor += batch_size
            if batch.tokens is not None:
                tokens_seen += int(batch.tokens.sum())
            # 3. policy log-probs of winners and losers
            with torch.autocast("cpu", dtype=torch.bfloat16, enabled=precision == "bf16"):
                # winners and losers in one forward pass: (2B,) -> two halves of (B,)
                logp = policy.logprobs(torch.cat([batch.prompt, batch.prompt]), torch.cat([batch.winner, batch.loser]))
                logp_w, logp_l = logp.to(batch.reference_winner.dtype).chunk(2)
            # 4. margins and loss
            rho = margins(logp_w, logp_l, batch.reference_winner, batch.reference_loser)  # (B,)
            value = preference_loss(loss, rho, beta=beta, smoothing=smoothing, weights=batch.weight)
            if not torch.isfinite(value):
                raise FloatingPointError(f"the loss became {float(value)} at step {step}; lower optim.lr "
                                         "or beta, or check the loss function")
            # 5. backward, clip, step
            optimiser.zero_grad(set_to_none=True)
            value.backward()
            clip = optim.grad_clip if optim.grad_clip else math.inf
            grad_norm = float(torch.nn.utils.clip_grad_norm_(policy.parameters(), clip))
            optimiser.step()
            scheduler.step()
            # 6. log
            if step % log_every == 0 or step == steps or step == 1:
                with torch.no_grad():
                    record = {"step": step, "loss": float(value), "lr": lr, "grad_norm": grad_norm,
                              **batch_statistics(rho, logp_w - batch.reference_winner,
                                                 logp_l - batch.reference_loser, batch.weight)}
                    if evaluate is not None:
                        record.update(evaluate(policy))
                record["seconds"] = time.perf_counter() - start
                if pairs.tokens is not None:
                    record["tokens_per_s"] = tokens_seen / record["seconds"]
                history.append(record)
                if sink is not None:
                    sink.write(json.dumps(record) + "\n")
                    sink.flush()
                bar.set_postfix(loss=f"{record['loss']:.4g}", margin=f"{record['margin_mean']:.3g}")
    finally:
        bar.close()
        if sink is not None:
            sink.close()
    return TrainResult(steps, time.perf_counter() - start, history[-1], history)
