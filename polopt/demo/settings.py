"""The settings of ``polopt demo`` (every knob of the walk-through, and its quick variant), apart from the
pipeline (:mod:`polopt.demo.pipeline`) so that ``polopt demo --help`` shows them without loading torch."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass
class DemoConfig:
    """Every knob of the walk-through; the defaults are the measured default run."""

    loss: str = "logistic"
    beta: float = 0.1  # the run summary.json reports; always one of the frontier's betas
    betas: tuple[float, ...] = (0.1, 0.3, 1.0)
    bias: float = 0.3  # the judge's position bias
    sft_examples: int = 3000
    sft_steps: int = 250
    sft_lr: float = 3e-3
    sft_batch_size: int = 64
    width: int = 64
    layers: int = 2
    heads: int = 4
    n_pairs: int = 1000
    steps: int = 100
    batch_size: int = 32
    # Adam moves every weight by about lr a step: at 1e-3 the policy leaves the text it was taught within
    # 150 steps (both log-ratios fall by tens of nats, KL ~ 90, garbled replies), measured
    lr: float = 2e-4
    warmup_steps: int = 10
    eval_samples: int = 400
    max_new_tokens: int = 40
    seed: int = 0


# a reduced configuration that checks the mechanics in seconds (the tests use it)
QUICK = {"sft_examples": 200, "sft_steps": 20, "width": 16, "layers": 1, "heads": 2, "n_pairs": 40, "steps": 4,
         "batch_size": 16, "sft_batch_size": 16, "eval_samples": 24, "max_new_tokens": 30, "betas": (0.1, 1.0)}
