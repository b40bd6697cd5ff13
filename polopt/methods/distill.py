"""Distillation of a target distribution into a policy (here: best-of-n of the reference).

Minimises ``KL(target || pi) = sum_y target(y) (log target(y) - log pi(y))``,
prompt-weighted, which is maximum likelihood on draws from the target.

Estimators (``method.estimator``):
- ``exact``: the cross-entropy against the given target distribution (X, K).
- ``sampled``: maximum likelihood on ``method.n_samples`` draws per prompt of
  best-of-n, drawn once by :func:`sample_best_of_n` from the reference and the
  rewards (an implementation independent of the task's exact formula).
"""

from __future__ import annotations

from collections.abc import Callable

import torch

from polopt.methods.environment import FiniteEnvironment
from polopt.methods.rl import check_estimator

Tensor = torch.Tensor


def sample_best_of_n(env: FiniteEnvironment, n: int, per_prompt: int, generator: torch.Generator) -> Tensor:
    """Best-of-n draws: n responses from pi_ref, keep the first drawn of those with the largest
    reward. Returns (X, per_prompt) response indices."""
    if env.rewards is None:
        env.reward(torch.zeros(1, dtype=torch.long), torch.zeros(1, dtype=torch.long))  # raises the named error
    out = []
    for x in range(env.n_prompts):
        draws = torch.multinomial(env.reference[x].exp(), per_prompt * n, replacement=True,
                                  generator=generator).reshape(per_prompt, n)  # (S, n)
        rewards = env.rewards[x][draws]  # (S, n)
        first_best = (rewards == rewards.max(-1, keepdim=True).values).to(torch.int8).argmax(-1)  # first maximum
        out.append(draws.gather(1, first_best[:, None])[:, 0])
    return torch.stack(out)  # (X, S)


def empirical_distribution(samples: Tensor, n_responses: int) -> Tensor:
    """Share of each response among the draws, (X, S) -> (X, K) float64."""
    counts = torch.stack([torch.bincount(row, minlength=n_responses) for row in samples])
    return counts.double() / samples.shape[1]


def distill_objective(policy: torch.nn.Module, env: FiniteEnvironment, *, target: Tensor | None = None,
                      estimator: str = "exact", n: int = 4, n_samples: int = 4096,
                      generator: torch.Generator | None = None) -> Callable[[int], tuple[Tensor, dict]]:
    """The per-step objective of :func:`polopt.training.loop.optimise`: KL(target || pi).

    ``target`` (X, K) is needed for ``exact``; ``sampled`` draws its own data.
    """
    check_estimator(estimator)
    if estimator == "exact":
        if target is None:
            raise ValueError("method.estimator=exact needs the exact target distribution; the task gives none")
        data = target
    else:
        if not isinstance(n_samples, int) or n_samples < 1:
            raise ValueError(f"method.n_samples must be a positive integer, got {n_samples!r}")
        generator = generator or torch.Generator().manual_seed(0)
        draws = sample_best_of_n(env, n, n_samples, generator)  # (X, S)
        data = empirical_distribution(draws, env.reference.shape[1]).to(env.reference.dtype)  # same loss as MLE
    entropy = -(env.prompt_weights * torch.special.xlogy(data, data).sum(-1)).sum()

    def objective(step: int) -> tuple[Tensor, dict]:
        logp = policy.log_distribution()  # (X, K)
        cross = -(env.prompt_weights * (data * logp).sum(-1)).sum()
        return cross, {"kl_to_data": float(cross.detach() - entropy)}

    return objective
