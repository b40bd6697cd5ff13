"""The ``optim`` config group and the torch.optim optimiser and scheduler it builds.

Used by every loop that updates parameters (the training loop, supervised fine-tuning); it
imports nothing of polopt.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch

_OPTIMISERS = {"adam": torch.optim.Adam, "adamw": torch.optim.AdamW, "sgd": torch.optim.SGD}


@dataclass
class OptimConfig:
    """``optim`` group: optimiser name (any of torch.optim's Adam, AdamW, SGD), learning
    rate, Adam's ``betas`` (its moment decays; None: torch's (0.9, 0.999)), cosine decay to 0
    after a linear warm-up, and gradient clipping."""

    name: str = "adam"
    lr: float = 0.05
    weight_decay: float = 0.0
    warmup_steps: int = 0
    schedule: str = "cosine"  # cosine | constant
    grad_clip: float | None = None
    betas: tuple[float, float] | list[float] | None = None  # Adam and AdamW only


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
