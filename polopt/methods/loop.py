"""The optimisation loop shared by the methods: a per-step objective in, a trained policy out.

A method supplies ``step_objective(step) -> (scalar to minimise, metrics dict)``;
this loop owns the optimiser (:func:`polopt.train.make_optimiser`), clipping,
logging to metrics.jsonl and the progress bar, in the order of
:func:`polopt.train.train`: 1. learning rate, 2. objective (batch, forward), 3.
backward, clip, step, 4. log.
"""

from __future__ import annotations

import json
import math
import time
from collections.abc import Callable
from pathlib import Path

import torch
from tqdm.auto import tqdm

from polopt.stopping import Convergence
from polopt.train import OptimConfig, TrainResult, make_optimiser

Tensor = torch.Tensor


def optimise(policy: torch.nn.Module, step_objective: Callable[[int], tuple[Tensor, dict]], *, steps: int,
             optim: OptimConfig, seed: int = 0, log_every: int = 10,
             evaluate: Callable[[torch.nn.Module], dict] | None = None, metrics_path: Path | None = None,
             progress: bool = True, desc: str = "method", tol: float | None = None) -> TrainResult:
    """Minimise ``step_objective`` over the policy's parameters for ``steps`` steps, or until the loss
    change and the gradient norm stay below ``tol`` (:mod:`polopt.stopping`)."""
    if not isinstance(steps, int) or steps < 1:
        raise ValueError(f"train.steps must be a positive integer, got {steps!r}")
    torch.manual_seed(seed)
    optimiser, scheduler = make_optimiser(policy.parameters(), optim, steps)
    history: list[dict] = []
    convergence, stop, done = Convergence(tol), False, 0
    sink = metrics_path.open("a", encoding="utf-8") if metrics_path is not None else None
    start = time.perf_counter()
    bar = tqdm(range(1, steps + 1), desc=desc, disable=not progress, leave=False)
    try:
        for step in bar:
            # 1. learning rate of this step
            lr = optimiser.param_groups[0]["lr"]
            # 2. the method's objective (it draws its own batch)
            value, stats = step_objective(step)
            if not torch.isfinite(value):
                raise FloatingPointError(f"the objective became {float(value.detach())} at step {step}; lower optim.lr")
            # 3. backward, clip, step
            optimiser.zero_grad(set_to_none=True)
            value.backward()
            clip = optim.grad_clip if optim.grad_clip else math.inf
            grad_norm = float(torch.nn.utils.clip_grad_norm_(policy.parameters(), clip))
            optimiser.step()
            scheduler.step()
            stop = convergence.update(float(value.detach()), grad_norm)
            # 4. log
            if step % log_every == 0 or step == steps or step == 1 or stop:
                record = {"step": step, "loss": float(value.detach()), "lr": lr, "grad_norm": grad_norm, **stats}
                if evaluate is not None:
                    with torch.no_grad():
                        record.update(evaluate(policy))
                record["seconds"] = time.perf_counter() - start
                history.append(record)
                if sink is not None:
                    sink.write(json.dumps(record) + "\n")
                    sink.flush()
                bar.set_postfix(loss=f"{record['loss']:.4g}", refresh=False)
            done = step
            if stop:
                break
    finally:
        bar.close()
        if sink is not None:
            sink.close()
    return TrainResult(done, time.perf_counter() - start, history[-1], history, stopped="tol" if stop else "steps")
