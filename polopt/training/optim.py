"""The ``optim`` config group and the torch.optim optimiser and scheduler it builds.

Used by every loop that updates parameters (the training loop, supervised fine-tuning); it
imports nothing of polopt. ``lbfgs`` (torch.optim.LBFGS with a strong-Wolfe line search) needs a
closure that re-evaluates the same objective, so only the training loop's full-batch path takes it
(:func:`polopt.training.loop.optimise`).
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import nn

_OPTIMISERS = {"adam": torch.optim.Adam, "adamw": torch.optim.AdamW, "sgd": torch.optim.SGD,
               "lbfgs": torch.optim.LBFGS}
# L-BFGS ends a step early once the loss or the step stops changing by more than this; float64 losses of
# order 1 resolve about 1e-16, so this is a few units in the last place (our choice). Its gradient test
# is off (0): a flat objective has a small gradient far from its optimum; train.tol decides when to stop.
LBFGS_TOLERANCE_CHANGE = 1e-15


@dataclass
class OptimConfig:
    """``optim`` group: optimiser name (torch.optim's Adam, AdamW, SGD or LBFGS), learning
    rate, Adam's ``betas`` (its moment decays; None: torch's (0.9, 0.999)), cosine decay to 0
    after a linear warm-up, and gradient clipping. L-BFGS: ``iterations`` per training step and
    the ``history`` of curvature pairs it keeps; its line search sets the step length, so it
    takes a constant schedule and neither warm-up, weight decay nor clipping."""

    name: str = "adam"
    lr: float = 0.05
    weight_decay: float = 0.0
    warmup_steps: int = 0
    schedule: str = "cosine"  # cosine | constant
    grad_clip: float | None = None
    betas: tuple[float, float] | list[float] | None = None  # Adam and AdamW only
    iterations: int = 20  # L-BFGS only: iterations per training step
    history: int = 100  # L-BFGS only: curvature pairs kept


def make_optimiser(params, cfg: OptimConfig, steps: int):
    """torch.optim optimiser and scheduler for ``cfg``."""
    if cfg.name not in _OPTIMISERS:
        raise ValueError(f"optim.name must be one of {', '.join(_OPTIMISERS)}, got {cfg.name!r}")
    if not cfg.lr > 0:
        raise ValueError(f"optim.lr must be > 0, got {cfg.lr!r}")
    extra = {}
    if cfg.betas is not None:
        if cfg.name not in ("adam", "adamw"):
            raise ValueError(f"optim.betas applies to adam and adamw, not {cfg.name}; drop it")
        betas = tuple(float(b) for b in cfg.betas)
        if len(betas) != 2 or not all(0.0 <= b < 1.0 for b in betas):
            raise ValueError(f"optim.betas must be two numbers in [0, 1), e.g. optim.betas=[0.9,0.999], "
                             f"got {list(cfg.betas)!r}")
        extra["betas"] = betas
    params = list(params)
    if cfg.name == "lbfgs":
        optimiser = _lbfgs(params, cfg)
    else:
        if cfg.name in ("adam", "adamw") and fused_kernel_applies(params):
            extra["fused"] = True
        optimiser = _OPTIMISERS[cfg.name](params, lr=cfg.lr, weight_decay=cfg.weight_decay, **extra)
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


def fused_kernel_applies(params: list) -> bool:
    """Whether torch's fused Adam/AdamW kernel (``fused=True``: the whole update of a tensor in one pass
    over its elements) can update ``params``: plain floating-point tensors on the CPU or a CUDA GPU.

    torch's default on the CPU is a loop of about ten elementwise operations per tensor, each one a
    pass over the weights; on a small model with short batches that was a fifth of a training step
    (bench/throughput.py). The fused kernel computes the same update (Kingma & Ba, Adam, 2015) in
    another order of floating-point operations, so the two agree to rounding
    (tests/training/test_optim.py). Sharded parameters (``DTensor`` under ``train.strategy=fsdp``)
    keep torch's default.
    """
    return bool(params) and all(type(p) in (nn.Parameter, torch.Tensor) and p.is_floating_point()
                                and p.device.type in ("cpu", "cuda") for p in params)


def _lbfgs(params, cfg: OptimConfig) -> torch.optim.LBFGS:
    """torch.optim.LBFGS with a strong-Wolfe line search (L-BFGS: Nocedal & Wright, Numerical Optimization,
    2nd ed. 2006, ch. 7; the Wolfe conditions: ch. 3; chapters from memory), after refusing the settings a
    line search makes meaningless."""
    fixed = {"weight_decay": 0.0, "warmup_steps": 0, "schedule": "constant", "grad_clip": None}
    refused = [f"optim.{key}={getattr(cfg, key)!r}" for key, value in fixed.items()
               if (getattr(cfg, key) or None) != (value or None)]
    if refused:
        raise ValueError(f"optim=lbfgs sets its step length by line search: drop {', '.join(refused)} "
                         "(it takes weight_decay=0, warmup_steps=0, schedule=constant, grad_clip=null)")
    for key in ("iterations", "history"):
        value = getattr(cfg, key)
        if not isinstance(value, int) or isinstance(value, bool) or value < 1:
            raise ValueError(f"optim.{key} must be a positive integer, got {value!r}")
    return torch.optim.LBFGS(params, lr=cfg.lr, max_iter=cfg.iterations, history_size=cfg.history,
                             line_search_fn="strong_wolfe", tolerance_grad=0.0,
                             tolerance_change=LBFGS_TOLERANCE_CHANGE)
