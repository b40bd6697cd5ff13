"""The training loop: one loop for every path (offline losses on pairs, and the methods).

The loop minimises a loss over a policy's parameters, step by step. A *batch source* hands the
loop, for each step, a :class:`StepLoss` (the scalar to backpropagate, the loss to report,
the batch's metrics); :class:`PairBatches` is the offline one (a loss of the family on
a task's :class:`polopt.pairs.PairSet`), :class:`MethodBatches` wraps a method's
``step(step) -> (scalar, metrics)`` (:mod:`polopt.methods`).

One step reads top to bottom (:func:`optimise`):
    1. learning rate (the scheduler), 2. batch, 3. policy log-probs of winners and
    losers, 4. loss (2-4: the batch source), 5. backward, clip, step (or, on a non-finite
    loss or gradient, stop or skip: ``on_nonfinite``), 6. log, 7. checkpoint (every
    ``checkpoint_every`` steps and at the end; see :mod:`polopt.checkpoints.store`). ``resume``
    continues from a checkpoint's state so that the run ends bit-identical to an
    uninterrupted one.

``optim=lbfgs`` (torch.optim.LBFGS, strong-Wolfe line search) changes step 5 only: the step is up to
``optim.iterations`` L-BFGS iterations, and the line search re-evaluates the loss (2-4) through a
closure, so it takes a fixed loss: the full batch of an offline run on one process. The
evaluation at the step's start is the closure's first.
"""

from __future__ import annotations

import functools
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

from polopt import losses
from polopt.checkpoints.store import restore_training_state, training_state
from polopt.groups import GroupSet, score_groups
from polopt.losses.group_objective import GroupObjective
from polopt.losses.margin import MarginLoss
from polopt.losses.reduce import group_losses, group_statistics
from polopt.pairs import PairSet, score_pairs
from polopt.parallel import distributed
from polopt.training.batching import Batcher
from polopt.training.contracts import TrainResult
from polopt.training.optim import OptimConfig, make_optimiser
from polopt.training.step import batch_loss, batch_statistics
from polopt.training.stopping import Convergence, validate_tol

Tensor = torch.Tensor
ON_NONFINITE = ("stop", "skip")
PRECISIONS = ("fp32", "bf16", "fp64")


@dataclass
class TrainSettings:
    """The settings of one run of the loop (the ``train`` group, ``beta``, ``loss.smoothing``,
    ``precision``, ``optim``).

    ``batch_size`` None (or >= N) uses every pair each step (full batch); otherwise each epoch
    visits the pairs in a fresh order drawn from ``seed``. Metrics of every ``log_every``-th step
    (and the first and last) are logged. ``checkpoint_every``: steps between checkpoints (0: only
    at the end). ``on_nonfinite``: ``stop`` raises FloatingPointError naming the step and the batch;
    ``skip`` leaves the parameters and the optimiser's moments untouched for that step, which still
    consumes its batch and its learning rate. Token pairs come in batches trimmed to their longest
    row, grouped by length when ``bucketing`` (:mod:`polopt.training.batching`). ``device``: where the policy
    already is; each batch goes there, the batch order and the data stay on the CPU.
    ``share_prompt``: a policy whose model allows it (``policy.shares_prompt``) scores each pair's
    winner and loser in one pass over their prompt (:func:`polopt.models.logprobs.shared_pair_logprobs`).
    ``tol``: stop once the loss change and the gradient norm stay below it (:mod:`polopt.training.stopping`);
    ``TrainResult.steps`` is then the last step run and ``stopped`` is ``"tol"``. ``precision``:
    ``fp32``; ``bf16`` autocast; ``fp64`` the policy's parameters, its computation and the pairs'
    floating-point data in float64 (a line search near a flat optimum needs the resolution).
    """

    steps: int
    beta: float
    optim: OptimConfig = field(default_factory=OptimConfig)
    smoothing: float = 0.0
    batch_size: int | None = None
    seed: int = 0
    log_every: int = 10
    precision: str = "fp32"
    checkpoint_every: int = 0
    on_nonfinite: str = "stop"
    bucketing: bool = True
    progress: bool = True
    device: torch.device | str = "cpu"
    share_prompt: bool = True
    tol: float | None = None

    def check(self) -> None:
        """Raise one ValueError naming the first setting out of range."""
        if not isinstance(self.steps, int) or self.steps < 1:
            raise ValueError(f"train.steps must be a positive integer, got {self.steps!r}")
        size = self.batch_size
        if size is not None and (not isinstance(size, int) or size < 1):
            raise ValueError(f"train.batch_size must be a positive integer or null (all pairs), got {size!r}")
        if self.precision not in PRECISIONS:
            raise ValueError(f"precision must be one of {', '.join(PRECISIONS)}, got {self.precision!r}")
        if self.on_nonfinite not in ON_NONFINITE:
            raise ValueError(f"train.on_nonfinite must be stop or skip, got {self.on_nonfinite!r}")
        every = self.checkpoint_every
        if not isinstance(every, int) or isinstance(every, bool) or every < 0:
            raise ValueError(f"train.checkpoint_every must be an integer >= 0 (0: only at the end), got {every!r}")
        validate_tol(self.tol)

    @property
    def dtype(self) -> torch.dtype | None:
        """The dtype the policy and the pairs' floating-point data are cast to (None: left as they are)."""
        return torch.float64 if self.precision == "fp64" else None


@dataclass
class StepLoss:
    """What a batch source hands the loop for one step."""

    share: Tensor  # scalar to backpropagate (a rank's share under torchrun, else the loss itself)
    value: Tensor  # scalar loss to report and to guard against NaN/inf
    statistics: Callable[[], dict]  # the batch's metrics, called on logged steps under no_grad
    report: Callable[[int, str], str]  # (step, problem) -> one line naming the batch, for the guard


# ----------------------------------------------------------------------------
# Objectives: steps 2-4 (batch, score, loss)
# ----------------------------------------------------------------------------


class PairBatches:
    """The offline batch source: a loss of the registry on batches of ``pairs`` (full or drawn)."""

    def __init__(self, policy: torch.nn.Module, pairs: PairSet, loss: MarginLoss | losses.PairLoss,
                 settings: TrainSettings,
                 context: distributed.Context = distributed.SINGLE):
        full = settings.batch_size is None or settings.batch_size >= len(pairs)
        if full and getattr(pairs, "streamed", False):
            raise ValueError(f"these {len(pairs)} pairs stream from disk and are read one batch at a time: set "
                             f"train.batch_size below {len(pairs)} (full-batch training would read the whole "
                             "file every step)")
        self.name, self.counts_tokens = f"train {loss.name}", pairs.tokens is not None
        self.policy, self.pairs, self.loss, self.settings, self.context = policy, pairs, loss, settings, context
        self.full_batch, self.device = full, torch.device(settings.device)
        self.batcher = Batcher(pairs, batch_size=settings.batch_size, pad_id=getattr(policy, "pad_id", None),
                               bucketing=settings.bucketing)
        self.order, self.cursor, self.tokens_seen = None, 0, 0
        self._score, self._whole = None, None

    def start(self, generator: torch.Generator) -> None:
        """Draw the first epoch's order (before any resume restores the generator)."""
        self.generator, self.order, self.cursor = generator, self.batcher.epoch_order(generator), 0

    def position(self) -> tuple[Tensor, int]:
        return self.order, self.cursor

    def restore(self, order: Tensor, cursor: int) -> None:
        self.order, self.cursor = order, cursor

    def batch(self) -> tuple[Tensor, PairSet, object]:
        """(global indices, this process's batch on the device, the global batch's weight sum)."""
        if self.full_batch:
            if self._whole is None:
                self._whole = self.pairs.to(self.device, self.settings.dtype)  # the full batch moves once
            index, batch = torch.arange(len(self.pairs)), self._whole
        else:
            size = self.settings.batch_size
            if self.cursor + size > len(self.pairs):
                self.order, self.cursor = self.batcher.epoch_order(self.generator), 0
            index = self.order[self.cursor:self.cursor + size]
            batch = self.batcher.take(index)  # trimmed to its longest row
            self.cursor += size
        if batch.tokens is not None:
            self.tokens_seen += int(batch.tokens.sum())
        total_weight = None
        if self.context.active:  # this rank's slice of the global batch, and the global batch's weight
            batch, index, total_weight = distributed.shard(batch, index, self.context)
        return index, batch.to(self.device, self.settings.dtype), total_weight

    def score(self, batch: PairSet) -> tuple[Tensor, Tensor]:
        """Policy log-probs of winners and losers in one forward pass: (2B,) -> two halves of (B,)."""
        if self._score is None:  # policy.logprobs, or its DDP view (built after any resume)
            self._score = distributed.scorer(self.policy, self.context, self.device)
        with torch.autocast(self.device.type, dtype=torch.bfloat16, enabled=self.settings.precision == "bf16"):
            shared = self.settings.share_prompt and getattr(self.policy, "shares_prompt", False)
            logp_w, logp_l = score_pairs(self._score, batch.prompt, batch.winner, batch.loser, shared=shared)
            dtype = batch.reference_winner.dtype
            return logp_w.to(dtype), logp_l.to(dtype)

    def __call__(self, step: int) -> StepLoss:
        index, batch, total_weight = self.batch()
        logp_w, logp_l = self.score(batch)
        s = self.settings
        parts = batch_loss(self.loss, logp_w, logp_l, batch, beta=s.beta, smoothing=s.smoothing,
                           total_weight=total_weight, context=self.context)

        def statistics() -> dict:
            return batch_statistics(parts.rho, logp_w - batch.reference_winner, logp_l - batch.reference_loser,
                                    batch.weight, self.context)

        def report(step: int, problem: str) -> str:
            return nonfinite_report(step, problem, index, batch, parts.per_pair.detach())

        return StepLoss(parts.share, parts.value, statistics, report)


class MethodBatches:
    """A method's ``step(step) -> (scalar, metrics)`` as a batch source (the method draws
    its own batches; a method run does not resume)."""

    counts_tokens = False

    def __init__(self, method_step: Callable[[int], tuple[Tensor, dict]], name: str):
        self.method_step, self.name = method_step, name

    def start(self, generator: torch.Generator) -> None:
        pass

    def position(self) -> tuple[Tensor, int]:
        return torch.zeros(0, dtype=torch.long), 0

    def restore(self, order: Tensor, cursor: int) -> None:
        raise ValueError(f"method={self.name} runs start over; they do not resume from a checkpoint")

    def __call__(self, step: int) -> StepLoss:
        value, stats = self.method_step(step)
        return StepLoss(value, value, lambda: stats, lambda s, problem: f"step {s}: {problem} (method {self.name})")


class GroupBatches:
    """A group objective on batches of ``groups`` (full, or drawn in a fresh order each epoch): one
    process, no label smoothing (a group's feedback is no label to flip)."""

    counts_tokens = False

    def __init__(self, policy: torch.nn.Module, groups: GroupSet, loss: GroupObjective, settings: TrainSettings,
                 context: distributed.Context = distributed.SINGLE):
        if context.active:
            raise ValueError("group objectives train on one process; torchrun trains pair objectives only")
        if settings.smoothing:
            raise ValueError(f"loss.smoothing flips a pair's label; group objective {loss.name!r} takes none: "
                             f"set loss.smoothing=0.0, got {settings.smoothing}")
        full = settings.batch_size is None or settings.batch_size >= len(groups)
        if settings.optim.name == "lbfgs" and loss.stop_gradient:
            raise ValueError(f"{loss.name!r} holds a statistic without gradient, so its loss is no function that "
                             "optim=lbfgs's line search can decrease along the gradient: use optim=adam")
        if settings.optim.name == "lbfgs" and not full:
            raise ValueError(f"optim=lbfgs's line search needs one fixed objective: set train.batch_size=null "
                             f"(all {len(groups)} groups each step), or use optim=adam for minibatches")
        self.name, self.policy, self.groups, self.loss = f"train {loss.name}", policy, groups, loss
        self.settings = settings
        self.full_batch, self.device = full, torch.device(settings.device)
        self.order, self.cursor, self._whole = None, 0, None

    def start(self, generator: torch.Generator) -> None:
        self.generator, self.order, self.cursor = generator, torch.randperm(len(self.groups), generator=generator), 0

    def position(self) -> tuple[Tensor, int]:
        return self.order, self.cursor

    def restore(self, order: Tensor, cursor: int) -> None:
        self.order, self.cursor = order, cursor

    def batch(self) -> tuple[Tensor, GroupSet]:
        """(global indices, the batch on the device)."""
        if self.full_batch:
            if self._whole is None:
                self._whole = self.groups.to(self.device, self.settings.dtype)  # the full batch moves once
            return torch.arange(len(self.groups)), self._whole
        size = self.settings.batch_size
        if self.cursor + size > len(self.groups):
            self.order, self.cursor = torch.randperm(len(self.groups), generator=self.generator), 0
        index = self.order[self.cursor:self.cursor + size]
        self.cursor += size
        return index, self.groups.select(index).to(self.device, self.settings.dtype)

    def __call__(self, step: int) -> StepLoss:
        index, batch = self.batch()
        with torch.autocast(self.device.type, dtype=torch.bfloat16, enabled=self.settings.precision == "bf16"):
            logp = score_groups(self.policy.logprobs, batch.prompt, batch.members).to(batch.reference.dtype)  # (B, G)
        logp = torch.where(batch.mask, logp, 0.0)  # absent members carry log-probability 0 (GroupScores)
        per_group = group_losses(self.loss, logp, batch, beta=self.settings.beta)  # (B,)
        value = losses.weighted_mean(per_group, batch.weight)

        def statistics() -> dict:
            return group_statistics(logp - batch.reference, batch.mask, batch.weight)

        def report(step: int, problem: str) -> str:
            bad = torch.nonzero(~torch.isfinite(per_group.detach())).flatten()
            return (f"step {step}: {problem} on a batch of {len(index)} groups (non-finite at groups "
                    f"{index[bad.cpu()].tolist()[:8]})")

        return StepLoss(value, value, statistics, report)


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


# ----------------------------------------------------------------------------
# The loop: steps 1, 5, 6, 7
# ----------------------------------------------------------------------------


@dataclass
class _Loop:
    """The loop's mutable state: what a checkpoint holds besides the objective's position."""

    optimiser: torch.optim.Optimizer
    scheduler: object
    generator: torch.Generator
    done: int = 0
    history: list[dict] = field(default_factory=list)
    skipped: list[int] = field(default_factory=list)
    start: float = 0.0  # perf_counter at step 0 (earlier on resume, by the checkpoint's seconds)
    loop_start: float = 0.0  # perf_counter when this process started (token throughput)
    convergence: Convergence = field(default_factory=lambda: Convergence(None))  # train.tol's window
    stopped: bool = False  # converged on train.tol


def _begin(policy, batches, settings: TrainSettings, resume: dict | None) -> _Loop:
    """Seed, build the optimiser, draw the first order; restore every piece of state on resume."""
    torch.manual_seed(settings.seed)
    generator = torch.Generator().manual_seed(settings.seed)
    optimiser, scheduler = make_optimiser(policy.parameters(), settings.optim, settings.steps)
    batches.start(generator)
    loop, seconds = _Loop(optimiser, scheduler, generator, convergence=Convergence(settings.tol)), 0.0
    if resume is not None:  # every piece of state the next step reads comes back exactly
        restored = restore_training_state(resume, policy=policy, optimiser=optimiser, scheduler=scheduler,
                                          generator=generator)
        batches.restore(restored["order"], restored["cursor"])
        loop.done, loop.history, loop.skipped = restored["step"], restored["history"], restored["skipped"]
        seconds = restored["seconds"]
        loop.convergence.restore(restored["convergence"])
        loop.stopped = restored["convergence"].get("stopped") == "tol"  # it had converged: nothing left to run
        if loop.done > settings.steps:
            raise ValueError(f"the checkpoint is at step {loop.done}, beyond train.steps={settings.steps}")
    loop.start, loop.loop_start = time.perf_counter() - seconds, time.perf_counter()
    return loop


def _learning_rate(loop: _Loop) -> float:
    return loop.optimiser.param_groups[0]["lr"]


def _update(policy, out: StepLoss, loop: _Loop, settings: TrainSettings,
            evaluate_again: Callable[[], StepLoss]) -> tuple[str | None, float]:
    """Backward, clip, step; a non-finite loss or gradient never reaches the parameters.
    ``evaluate_again``: the loss at the current parameters, for L-BFGS's line search.
    Returns (the problem or None, the gradient norm)."""
    loop.optimiser.zero_grad(set_to_none=True)
    problem, grad_norm = None, math.nan
    if not torch.isfinite(out.value):
        problem = f"the loss is {float(out.value.detach())}"
    else:
        out.share.backward()
        clip = settings.optim.grad_clip if settings.optim.grad_clip else math.inf
        grad_norm = distributed.clip_grad_norm(policy, clip)
        if not math.isfinite(grad_norm):
            problem = f"the gradient norm is {grad_norm}"
    if problem is None and isinstance(loop.optimiser, torch.optim.LBFGS):
        problem = _line_search_step(policy, out, loop.optimiser, evaluate_again)
    elif problem is None:
        loop.optimiser.step()
    with warnings.catch_warnings():  # a skipped first step makes torch warn about the order
        warnings.filterwarnings("ignore", message=r"Detected call of `lr_scheduler.step\(\)`")
        loop.scheduler.step()
    return problem, grad_norm


def _line_search_step(policy, out: StepLoss, optimiser: torch.optim.LBFGS,
                      evaluate_again: Callable[[], StepLoss]) -> str | None:
    """One L-BFGS step: up to ``optim.iterations`` iterations, each with a strong-Wolfe line search that
    re-evaluates the loss. Its first evaluation is ``out``, whose gradient is already in place.
    Parameters the step left non-finite are put back and the curvature history dropped; the problem
    is returned (None: the step is good)."""
    params = [p for group in optimiser.param_groups for p in group["params"]]
    before = [p.detach().clone() for p in params]
    first = [out]

    def closure() -> Tensor:
        if first:
            return first.pop().value.detach()
        optimiser.zero_grad(set_to_none=True)
        again = evaluate_again()
        if torch.isfinite(again.value):  # a non-finite trial point: the line search backs off from its value
            again.share.backward()
        return again.value.detach()

    optimiser.step(closure)
    if all(bool(torch.isfinite(p).all()) for p in params):
        return None
    with torch.no_grad():
        for p, saved in zip(params, before, strict=True):
            p.copy_(saved)
    optimiser.state.clear()
    return "L-BFGS's line search left the parameters non-finite (they were put back, its history dropped)"


def line_search_counts(optimiser: torch.optim.Optimizer) -> dict:
    """L-BFGS's cumulative ``iterations`` and loss ``evaluations`` (empty for other optimisers)."""
    if not isinstance(optimiser, torch.optim.LBFGS):
        return {}
    state = optimiser.state.get(optimiser.param_groups[0]["params"][0], {})
    return {"iterations": int(state.get("n_iter", 0)), "evaluations": int(state.get("func_evals", 0))}


def _check_line_search(batches, settings: TrainSettings, context: distributed.Context) -> None:
    """Refuse optim=lbfgs where its line search would not see one fixed loss."""
    if settings.optim.name != "lbfgs":
        return
    if settings.precision == "bf16":
        raise ValueError("optim=lbfgs compares losses along each line search, and bf16 autocast rounds them to "
                         "about 3 significant digits: use precision=fp64 (its default) or fp32")
    if context.active:
        raise ValueError("optim=lbfgs trains on one process: every evaluation of its line search would have "
                         "to run on all of torchrun's processes in step; use optim=adam under torchrun")
    if isinstance(batches, MethodBatches):
        raise ValueError(f"method={batches.name} draws new samples every step and optim=lbfgs's line search "
                         "needs one fixed objective: use optim=adam")
    if not batches.full_batch:
        raise ValueError(f"optim=lbfgs's line search needs one fixed objective: set train.batch_size=null "
                         f"(all {len(batches.pairs)} pairs each step), or use optim=adam for minibatches")


def _guard(step: int, problem: str, out: StepLoss, loop: _Loop, settings: TrainSettings,
           context: distributed.Context) -> None:
    """Stop (FloatingPointError naming the batch) or skip the step, as ``on_nonfinite`` says."""
    with torch.no_grad():
        report = out.report(step, problem)
    if settings.on_nonfinite == "stop":
        raise FloatingPointError(f"{report}; lower optim.lr or beta, check the loss function "
                                 "and the data, or set train.on_nonfinite=skip")
    loop.optimiser.zero_grad(set_to_none=True)
    loop.skipped.append(step)
    if context.is_main:
        tqdm.write(f"polopt: warning: skipped {report}", file=sys.stderr)


def _record(step: int, lr: float, grad_norm: float, out: StepLoss, loop: _Loop, policy, batches,
            evaluate: Callable | None) -> dict:
    """The logged metrics of a step: loss, learning rate, gradient norm, the batch's statistics,
    the task's evaluation, seconds and token throughput."""
    with torch.no_grad():
        record = {"step": step, "loss": float(out.value.detach()), "lr": lr, "grad_norm": grad_norm,
                  **line_search_counts(loop.optimiser), **out.statistics()}
        if evaluate is not None:
            record.update(evaluate(policy))
    record["seconds"] = time.perf_counter() - loop.start
    if batches.counts_tokens:
        record["tokens_per_s"] = batches.tokens_seen / (time.perf_counter() - loop.loop_start)
    return record


def _checkpoint(step: int, policy, batches, loop: _Loop, save: Callable[[dict], object], *,
                sharded: bool = False) -> None:
    order, cursor = batches.position()
    save(training_state(step=step, policy=policy, optimiser=loop.optimiser, scheduler=loop.scheduler,
                        generator=loop.generator, order=order, cursor=cursor, history=loop.history,
                        skipped=loop.skipped, seconds=time.perf_counter() - loop.start, sharded=sharded,
                        convergence={**loop.convergence.state(), **({"stopped": "tol"} if loop.stopped else {})}))


def optimise(policy: torch.nn.Module, batches, settings: TrainSettings, *,
             evaluate: Callable[[torch.nn.Module], dict] | None = None, metrics_path: Path | None = None,
             save_checkpoint: Callable[[dict], object] | None = None, resume: dict | None = None,
             context: distributed.Context = distributed.SINGLE) -> TrainResult:
    """Minimise the loss ``batches`` hands over (a :class:`PairBatches` or :class:`MethodBatches`) over the
    policy's parameters for ``settings.steps`` steps, or until the loss change and the gradient
    norm have stayed below ``settings.tol`` (:mod:`polopt.training.stopping`; the stopping step is logged
    and checkpointed like the last).

    Logged records go to ``metrics_path`` as JSON lines (appended: on resume the caller leaves
    the lines up to the checkpoint there). ``save_checkpoint(state)`` receives
    :func:`polopt.checkpoints.store.training_state` every ``checkpoint_every`` steps and after the
    last; ``resume`` is such a state to continue from. With several processes the caller passes
    ``metrics_path``/``save_checkpoint``/``progress`` to rank 0 only. With ``precision=fp64`` the
    caller's policy is cast to float64 in place and stays so.
    """
    settings.check()
    _check_line_search(batches, settings, context)
    if settings.dtype is not None:
        policy.to(settings.dtype)  # before sharding, resuming and building the optimiser
    caller, policy = policy, distributed.shard_for(policy, context, settings.device)  # fsdp: a sharded copy
    if policy is not caller:
        batches.policy = policy
    loop = _begin(policy, batches, settings, resume)
    steps = settings.steps
    sink = metrics_path.open("a", encoding="utf-8") if metrics_path is not None else None
    last = loop.done if loop.stopped else steps  # a run that had converged before its checkpoint stays there
    bar = tqdm(range(loop.done + 1, last + 1), desc=batches.name, disable=not settings.progress, leave=False,
               initial=loop.done, total=steps)
    try:
        for step in bar:
            lr = _learning_rate(loop)  # 1
            out = batches(step)  # 2-4
            problem, grad_norm = _update(policy, out, loop, settings, functools.partial(batches, step))  # 5
            if problem is not None:
                loop.convergence.skip()
                _guard(step, problem, out, loop, settings, context)
            else:
                loop.stopped = loop.convergence.update(float(out.value.detach()), grad_norm)
            if problem is None and (step % settings.log_every == 0 or step in (1, steps) or loop.stopped):  # 6
                with distributed.gathered(policy, caller):  # evaluate reads the caller's policy
                    record = _record(step, lr, grad_norm, out, loop, caller, batches, evaluate)
                loop.history.append(record)
                if sink is not None:
                    sink.write(json.dumps(record) + "\n")
                    sink.flush()
                postfix = {"loss": f"{record['loss']:.4g}"}
                if "margin_mean" in record:
                    postfix["margin"] = f"{record['margin_mean']:.3g}"
                bar.set_postfix(postfix, refresh=False)
            if save_checkpoint is not None and (step == steps or loop.stopped or settings.checkpoint_every
                                                and step % settings.checkpoint_every == 0):  # 7
                _checkpoint(step, policy, batches, loop, save_checkpoint, sharded=context.sharded)
            loop.done = step
            if loop.stopped:
                break
    finally:
        bar.close()
        if sink is not None:
            sink.close()
    distributed.give_back(policy, caller)
    final = loop.history[-1] if loop.history else {}
    return TrainResult(loop.done, time.perf_counter() - loop.start, final, loop.history, loop.skipped,
                       stopped="tol" if loop.stopped else "steps")


def train(policy: torch.nn.Module, pairs: PairSet, loss: MarginLoss | losses.PairLoss, settings: TrainSettings, *,
          evaluate: Callable[[torch.nn.Module], dict] | None = None, metrics_path: Path | None = None,
          save_checkpoint: Callable[[dict], object] | None = None, resume: dict | None = None,
          context: distributed.Context = distributed.SINGLE) -> TrainResult:
    """Minimise the preference loss of ``pairs`` over the policy's parameters (:func:`optimise` of
    an :class:`PairBatches`). ``context`` (from :func:`polopt.parallel.distributed.setup`) with several
    processes: each rank takes its slice of every global batch and the gradients are averaged."""
    settings.check()
    batches = PairBatches(policy, pairs, loss, settings, context)
    return optimise(policy, batches, settings, evaluate=evaluate, metrics_path=metrics_path,
                    save_checkpoint=save_checkpoint, resume=resume, context=context)
