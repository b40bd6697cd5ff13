"""The training loop: any loss of the family on any task that hands over pairs.

A task gives the trainer a :class:`PairSet` (prompt, winner, loser, optional
weight, and the reference log-probabilities of winner and loser, computed once
and cached) and, optionally, an ``evaluate(policy) -> dict`` callback for
metrics that need the task (KL to the reference, distance to the optimum).
The policy is any ``nn.Module`` with ``logprobs(prompt, response) -> (B,)``.

One step reads top to bottom:
    1. learning rate (the scheduler), 2. batch, 3. policy log-probs of winners
    and losers, 4. margins and loss, 5. backward, clip, step (or, on a
    non-finite loss or gradient, stop or skip: ``on_nonfinite``), 6. log,
    7. checkpoint (every ``checkpoint_every`` steps and at the end; see
    :mod:`polopt.checkpoint`). ``resume`` continues from a checkpoint's state so
    that the run ends bit-identical to an uninterrupted one.
"""

from __future__ import annotations

import json
import math
import sys
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import torch
from tqdm.auto import tqdm

from polopt import distributed
from polopt.batching import Batcher
from polopt.checkpoint import restore_training_state, training_state
from polopt.losses import Loss
from polopt.objective import margins, pair_losses, preference_loss
from polopt.stopping import Convergence

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

    def to(self, device: torch.device) -> PairSet:
        """The same pairs with every tensor on ``device`` (no copy when they are there already)."""
        def move(t: Tensor | None) -> Tensor | None:
            return None if t is None else t.to(device, non_blocking=True)

        return PairSet(*(move(t) for t in (self.prompt, self.winner, self.loser, self.reference_winner,
                                           self.reference_loser, self.weight, self.tokens)))


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
    skipped: list[int] = field(default_factory=list)  # steps skipped for a non-finite loss or gradient
    stopped: str = "steps"  # why it ended: "steps" (ran train.steps) or "tol" (converged; polopt.stopping)


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


def batch_statistics(rho: Tensor, logratio_w: Tensor, logratio_l: Tensor, weight: Tensor | None,
                     context: distributed.Context | None = None) -> dict:
    """Weighted means of the margin, the share of pairs with a positive margin, and
    the two log-ratios (both falling together is likelihood displacement); over the global
    batch of all ranks when ``context`` is given."""
    if context is not None:
        return distributed.batch_statistics(rho, logratio_w, logratio_l, weight, context)
    w = torch.ones_like(rho) if weight is None else weight.to(rho.dtype)
    w = w / w.sum()
    return {
        "margin_mean": float((w * rho).sum()),
        "pair_accuracy": float((w * (rho > 0).to(rho.dtype)).sum()),
        "logratio_winner": float((w * logratio_w).sum()),
        "logratio_loser": float((w * logratio_l).sum()),
    }


ON_NONFINITE = ("stop", "skip")


def nonfinite_report(step: int, what: str, index: Tensor, batch: PairSet, per_pair: Tensor) -> str:
    """One line naming the step, the batch (pair indices and prompts) and the pairs whose loss is
    not finite, for the NaN/inf guard."""
    def show(t: Tensor) -> str:
        items = t.tolist()
        return str(items[:8])[:-1] + (f", ... {len(items)} in all]" if len(items) > 8 else "]")

    bad = torch.nonzero(~torch.isfinite(per_pair)).flatten().cpu()  # positions within the batch (index: CPU)
    where = f"; non-finite at pairs {show(index[bad])}" if len(bad) else ""
    return (f"step {step}: {what} on a batch of {len(index)} pairs {show(index)} "
            f"(prompts {show(batch.prompt)}){where}")


def train(policy: torch.nn.Module, pairs: PairSet, loss: Loss, *, beta: float, steps: int,
          optim: OptimConfig, smoothing: float = 0.0, batch_size: int | None = None, seed: int = 0,
          log_every: int = 10, evaluate: Callable[[torch.nn.Module], dict] | None = None,
          metrics_path: Path | None = None, progress: bool = True,
          precision: str = "fp32", checkpoint_every: int = 0,
          save_checkpoint: Callable[[dict], object] | None = None, resume: dict | None = None,
          on_nonfinite: str = "stop", bucketing: bool = True,
          context: distributed.Context = distributed.SINGLE, device: torch.device | str = "cpu",
          share_prompt: bool = True, tol: float | None = None) -> TrainResult:
    """Minimise the preference loss of ``pairs`` over the policy's parameters.

    ``batch_size`` None (or >= N) uses every pair each step (full batch);
    otherwise each epoch visits the pairs in a fresh order drawn from ``seed``.
    Metrics of every ``log_every``-th step (and the last) go to ``metrics_path``
    as JSON lines (appended: on resume the caller leaves the lines up to the
    checkpoint there). ``save_checkpoint(state)`` receives
    :func:`polopt.checkpoint.training_state` every ``checkpoint_every`` steps
    (0: only at the end) and after the last; ``resume`` is such a state to
    continue from. A non-finite loss or gradient norm raises FloatingPointError
    naming the step and the batch (``on_nonfinite="stop"``), or leaves the
    parameters and the optimiser's moments untouched for that step, which still
    consumes its batch and its learning rate (``"skip"``; counted in ``skipped``).
    Token pairs (a policy with a ``pad_id``) come in batches trimmed to their longest
    row, grouped by length when ``bucketing`` (see :mod:`polopt.batching`).
    ``context`` (from :func:`polopt.distributed.setup`) with several processes: each rank takes
    its slice of every global batch and the gradients are averaged (:mod:`polopt.distributed`);
    the caller passes ``metrics_path``/``save_checkpoint``/``progress`` to rank 0 only.
    ``device``: where the policy already is (the caller moves it, :mod:`polopt.devices`); each batch
    goes there, the batch order and the data stay on the CPU.
    ``share_prompt``: a policy whose model allows it (``policy.shares_prompt``) scores each pair's
    winner and loser in one pass over their prompt (:func:`polopt.logprobs.shared_pair_logprobs`).
    ``tol``: stop once the loss change and the gradient norm stay below it (:mod:`polopt.stopping`);
    ``TrainResult.steps`` is then the last step run and ``stopped`` is ``"tol"``.
    """
    if not isinstance(steps, int) or steps < 1:
        raise ValueError(f"train.steps must be a positive integer, got {steps!r}")
    if batch_size is not None and (not isinstance(batch_size, int) or batch_size < 1):
        raise ValueError(f"train.batch_size must be a positive integer or null (all pairs), got {batch_size!r}")
    if precision not in ("fp32", "bf16"):
        raise ValueError(f"precision must be fp32 or bf16, got {precision!r}")
    if on_nonfinite not in ON_NONFINITE:
        raise ValueError(f"train.on_nonfinite must be stop or skip, got {on_nonfinite!r}")
    if not isinstance(checkpoint_every, int) or isinstance(checkpoint_every, bool) or checkpoint_every < 0:
        raise ValueError(f"train.checkpoint_every must be an integer >= 0 (0: only at the end), "
                         f"got {checkpoint_every!r}")
    torch.manual_seed(seed)
    generator = torch.Generator().manual_seed(seed)
    optimiser, scheduler = make_optimiser(policy.parameters(), optim, steps)
    full_batch = batch_size is None or batch_size >= len(pairs)
    if full_batch and getattr(pairs, "streamed", False):
        raise ValueError(f"these {len(pairs)} pairs stream from disk and are read one batch at a time: set "
                         f"train.batch_size below {len(pairs)} (full-batch training would read the whole file "
                         "every step)")
    batcher = Batcher(pairs, batch_size=batch_size, pad_id=getattr(policy, "pad_id", None), bucketing=bucketing)
    order, cursor = batcher.epoch_order(generator), 0
    history: list[dict] = []
    skipped: list[int] = []
    done, seconds_before = 0, 0.0
    convergence, stop = Convergence(tol), False
    if resume is not None:  # every piece of state the next step reads comes back exactly
        restored = restore_training_state(resume, policy=policy, optimiser=optimiser, scheduler=scheduler,
                                          generator=generator)
        done, order, cursor = restored["step"], restored["order"], restored["cursor"]
        history, skipped, seconds_before = restored["history"], restored["skipped"], restored["seconds"]
        convergence.restore(restored["convergence"])
        stop = restored["convergence"].get("stopped") == "tol"  # it had converged: nothing left to run
        if done > steps:
            raise ValueError(f"the checkpoint is at step {done}, beyond train.steps={steps}")
    device = torch.device(device)
    score = distributed.scorer(policy, context, device)  # policy.logprobs, or its DDP view
    shared = share_prompt and getattr(policy, "shares_prompt", False)
    whole = pairs.to(device) if full_batch else None  # the full batch moves once
    sink = metrics_path.open("a", encoding="utf-8") if metrics_path is not None else None
    start = time.perf_counter() - seconds_before
    loop_start, tokens_seen = time.perf_counter(), 0  # token throughput of this process, resumed or not
    last = done if stop else steps  # a run that had converged before its checkpoint runs no further step
    bar = tqdm(range(done + 1, last + 1), desc=f"train {loss.name}", disable=not progress, leave=False,
               initial=done, total=steps)
    try:
        for step in bar:
            # 1. learning rate of this step
            lr = optimiser.param_groups[0]["lr"]
            # 2. batch
            if full_batch:
                index, batch = torch.arange(len(pairs)), whole
            else:
                if cursor + batch_size > len(pairs):
                    order, cursor = batcher.epoch_order(generator), 0
                index = order[cursor:cursor + batch_size]
                batch = batcher.take(index)  # trimmed to its longest row
                cursor += batch_size
            if batch.tokens is not None:
                tokens_seen += int(batch.tokens.sum())
            if context.active:  # this rank's slice of the global batch, and the global batch's weight
                batch, index, total_weight = distributed.shard(batch, index, context)
            batch = batch.to(device)
            # 3. policy log-probs of winners and losers
            with torch.autocast(device.type, dtype=torch.bfloat16, enabled=precision == "bf16"):
                # winners and losers in one forward pass: (2B,) -> two halves of (B,)
                logp = score(batch.prompt, batch.winner, batch.loser) if shared else \
                    score(torch.cat([batch.prompt, batch.prompt]), torch.cat([batch.winner, batch.loser]))
                logp_w, logp_l = logp.to(batch.reference_winner.dtype).chunk(2)
            # 4. margins and loss
            rho = margins(logp_w, logp_l, batch.reference_winner, batch.reference_loser)  # (B,)
            if not context.active:
                value = objective = preference_loss(loss, rho, beta=beta, smoothing=smoothing, weights=batch.weight)
            else:  # objective: this rank's share (see sharded_loss); value: the global loss
                objective, value = distributed.sharded_loss(loss, rho, beta=beta, smoothing=smoothing,
                                                            weight=batch.weight, total_weight=total_weight,
                                                            context=context)
            # 5. backward, clip, step; a non-finite loss or gradient never reaches the parameters
            optimiser.zero_grad(set_to_none=True)
            problem, grad_norm = None, math.nan
            if not torch.isfinite(value):
                problem = f"the loss is {float(value.detach())}"
            else:
                objective.backward()
                clip = optim.grad_clip if optim.grad_clip else math.inf
                grad_norm = float(torch.nn.utils.clip_grad_norm_(policy.parameters(), clip))
                if not math.isfinite(grad_norm):
                    problem = f"the gradient norm is {grad_norm}"
            if problem is None:
                optimiser.step()
                stop = convergence.update(float(value.detach()), grad_norm)
            else:
                convergence.skip()
                with torch.no_grad():
                    report = nonfinite_report(step, problem, index, batch,
                                              pair_losses(loss, rho, beta=beta, smoothing=smoothing))
                if on_nonfinite == "stop":
                    raise FloatingPointError(f"{report}; lower optim.lr or beta, check the loss function "
                                             "and the data, or set train.on_nonfinite=skip")
                optimiser.zero_grad(set_to_none=True)
                skipped.append(step)
                if context.is_main:
                    tqdm.write(f"polopt: warning: skipped {report}", file=sys.stderr)
            with warnings.catch_warnings():  # a skipped first step makes torch warn about the order
                warnings.filterwarnings("ignore", message=r"Detected call of `lr_scheduler.step\(\)`")
                scheduler.step()
            # 6. log (a skipped step has no metrics)
            if problem is None and (step % log_every == 0 or step == steps or step == 1 or stop):
                with torch.no_grad():
                    statistics = batch_statistics(rho, logp_w - batch.reference_winner, logp_l - batch.reference_loser,
                                                  batch.weight, context if context.active else None)
                    record = {"step": step, "loss": float(value), "lr": lr, "grad_norm": grad_norm, **statistics}
                    if evaluate is not None:
                        record.update(evaluate(policy))
                record["seconds"] = time.perf_counter() - start
                if pairs.tokens is not None:
                    record["tokens_per_s"] = tokens_seen / (time.perf_counter() - loop_start)
                history.append(record)
                if sink is not None:
                    sink.write(json.dumps(record) + "\n")
                    sink.flush()
                bar.set_postfix(loss=f"{record['loss']:.4g}", margin=f"{record['margin_mean']:.3g}", refresh=False)
            # 7. checkpoint
            end = step == steps or stop
            if save_checkpoint is not None and (end or checkpoint_every and step % checkpoint_every == 0):
                window = {**convergence.state(), **({"stopped": "tol"} if stop else {})}
                save_checkpoint(training_state(step=step, policy=policy, optimiser=optimiser, scheduler=scheduler,
                                               generator=generator, order=order, cursor=cursor, history=history,
                                               skipped=skipped, seconds=time.perf_counter() - start,
                                               convergence=window))
            done = step
            if stop:
                break
    finally:
        bar.close()
        if sink is not None:
            sink.close()
    return TrainResult(done, time.perf_counter() - start, history[-1] if history else {}, history, skipped,
                       stopped="tol" if stop else "steps")
