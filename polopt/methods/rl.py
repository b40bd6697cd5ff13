"""KL-regularised policy gradient: REINFORCE with a baseline and a KL penalty against the reference.

Objective, per prompt, weighted by the prompt weights::

    J(pi) = E_{y ~ pi}[r(y)] - beta KL(pi || pi_ref),   maximised by pi* ∝ pi_ref e^{r / beta}

(the KL-regularised optimum; e.g. Rafailov et al., Direct Preference
Optimization, 2023, eq. 4). Its gradient, with h = log pi - log pi_ref::

    grad J = E_pi[grad log pi(y) (r(y) - beta h(y) - b)]

because ``grad KL = E_pi[grad log pi (h + 1)]`` and ``E_pi[grad log pi] = 0``, which
also lets any baseline b that does not depend on y be subtracted (Williams,
Simple statistical gradient-following algorithms..., 1992). The surrogate
minimised is ``-E[log pi(y) * stopgrad(r - beta h - b)]``.

Estimators (``method.estimator``):
- ``exact``: the expectation over the finite response set, weights stopgrad(pi),
  baseline ``b = E_pi[r - beta h]``; the surrogate's gradient is exactly -grad J.
- ``sampled``: ``method.batch_size`` draws per prompt from the current policy,
  leave-one-out baseline (the mean of the other draws' advantages; Kool et al.,
  Buy 4 REINFORCE samples, get a baseline for free!, 2019), an unbiased estimate.
"""

from __future__ import annotations

from collections.abc import Callable

import torch

from polopt.methods.environment import FiniteEnvironment

Tensor = torch.Tensor
ESTIMATORS = ("exact", "sampled")


def check_estimator(estimator: str) -> None:
    if estimator not in ESTIMATORS:
        raise ValueError(f"method.estimator must be one of {', '.join(ESTIMATORS)}, got {estimator!r}")


def regularised_objective(logp: Tensor, env: FiniteEnvironment, *, beta: float) -> Tensor:
    """J = sum_x w_x [E_pi r - beta KL(pi || pi_ref)] from log pi (X, K); a scalar."""
    pi = logp.exp()  # (X, K)
    per_prompt = (pi * (env.rewards - beta * (logp - env.reference))).sum(-1)  # (X,)
    return (env.prompt_weights * per_prompt).sum()


def rl_objective(policy: torch.nn.Module, env: FiniteEnvironment, *, beta: float, estimator: str = "exact",
                 batch_size: int = 64, generator: torch.Generator | None = None
                 ) -> Callable[[int], tuple[Tensor, dict]]:
    """The per-step surrogate of :func:`polopt.training.loop.optimise` for KL-regularised REINFORCE."""
    check_estimator(estimator)
    if env.rewards is None:
        env.reward(torch.zeros(1, dtype=torch.long), torch.zeros(1, dtype=torch.long))  # raises the named error
    if estimator == "sampled" and (not isinstance(batch_size, int) or batch_size < 2):
        raise ValueError(f"method.batch_size must be an integer >= 2 (the leave-one-out baseline needs "
                         f"two draws), got {batch_size!r}")
    generator = generator or torch.Generator().manual_seed(0)

    def exact(step: int) -> tuple[Tensor, dict]:
        logp = policy.log_distribution()  # (X, K)
        with torch.no_grad():
            pi = logp.exp()
            advantage = env.rewards - beta * (logp - env.reference)  # (X, K): r - beta h
            advantage = advantage - (pi * advantage).sum(-1, keepdim=True)  # baseline E_pi[r - beta h]
        surrogate = -(env.prompt_weights * (pi * logp * advantage).sum(-1)).sum()
        return surrogate, {"objective": float(regularised_objective(logp.detach(), env, beta=beta))}

    def sampled(step: int) -> tuple[Tensor, dict]:
        prompt, response = env.sample(policy, batch_size, generator)  # (X * B,)
        logp = policy.logprobs(prompt, response)  # (X * B,)
        with torch.no_grad():
            h = logp - env.reference_logprobs(prompt, response)
            advantage = (env.reward(prompt, response) - beta * h).reshape(env.n_prompts, batch_size)  # (X, B)
            loo = (advantage.sum(-1, keepdim=True) - advantage) / (batch_size - 1)  # leave-one-out baseline
            centred = (advantage - loo).reshape(-1)
            weight = env.prompt_weights[prompt] / batch_size  # (X * B,)
        surrogate = -(weight * logp * centred).sum()
        with torch.no_grad():
            objective = float(regularised_objective(policy.log_distribution(), env, beta=beta))
        return surrogate, {"objective": objective}

    return exact if estimator == "exact" else sampled
