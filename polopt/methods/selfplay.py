"""Self-play with a loss of the family: pairs from the current policy, the opponent a stop-gradient copy.

Each step draws pairs (y, y') i.i.d. from stopgrad(pi), labels them by the
preference P and minimises the offline objective ``f(beta rho)`` of
:mod:`polopt.objective` on them: online IPO when f is the squared loss
(Calandriello et al., Human Alignment of Large Language Models through Online
Preference Optimisation, 2024). IPO's minimiser against a fixed sampling
distribution mu is ``pi ∝ pi_ref exp(P(y > mu) / tau)``, tau = beta / 2 (Azar et
al. 2023); with mu = stopgrad(pi) a stationary point satisfies
``pi ∝ pi_ref exp(P(y > pi) / tau)``: the Nash equilibrium of the regularised
preference game (Munos et al., Nash Learning from Human Feedback, 2023).

Estimators (``method.estimator``):
- ``exact``: every ordered pair (i, j), i != j, weighted by ``mu_i mu_j P[i, j]``
  (the expectation over pairs and labels; pairs with i = j have margin 0 and
  carry no gradient).
- ``sampled``: ``method.batch_size`` pairs per prompt from mu, labels drawn from P.
"""

from __future__ import annotations

from collections.abc import Callable

import torch

from polopt.losses import Loss
from polopt.methods.environment import FiniteEnvironment
from polopt.methods.rl import check_estimator
from polopt.objective import margins, preference_loss
from polopt.pair_set import score_pairs

Tensor = torch.Tensor


def selfplay_objective(policy: torch.nn.Module, env: FiniteEnvironment, loss: Loss, *, beta: float,
                       estimator: str = "exact", batch_size: int = 64,
                       generator: torch.Generator | None = None) -> Callable[[int], tuple[Tensor, dict]]:
    """The per-step objective of :func:`polopt.train.optimise` for self-play."""
    check_estimator(estimator)
    if env.preference is None:
        env.prefer(*(torch.zeros(1, dtype=torch.long),) * 3)  # raises the named error
    if estimator == "sampled" and (not isinstance(batch_size, int) or batch_size < 1):
        raise ValueError(f"method.batch_size must be a positive integer, got {batch_size!r}")
    generator = generator or torch.Generator().manual_seed(0)
    n_prompts, k = env.reference.shape
    x, i, j = torch.nonzero(~torch.eye(k, dtype=torch.bool).expand(n_prompts, k, k), as_tuple=True)  # (E,) each

    def exact(step: int) -> tuple[Tensor, dict]:
        logp = policy.log_distribution()  # (X, K)
        with torch.no_grad():
            mu = logp.exp()  # the opponent: a stop-gradient copy of the policy
            weight = env.prompt_weights[x] * mu[x, i] * mu[x, j] * env.preference[x, i, j]  # (E,)
        rho = margins(logp[x, i], logp[x, j], env.reference[x, i], env.reference[x, j])  # (E,)
        margin_mean = float((weight * rho.detach()).sum() / weight.sum())
        return preference_loss(loss, rho, beta=beta, weights=weight), {"margin_mean": margin_mean}

    def sampled(step: int) -> tuple[Tensor, dict]:
        prompt, first = env.sample(policy, batch_size, generator)  # (X * B,)
        _, second = env.sample(policy, batch_size, generator)
        with torch.no_grad():
            first_wins = torch.rand(len(prompt), generator=generator, dtype=env.reference.dtype) < env.prefer(
                prompt, first, second)
        winner, loser = torch.where(first_wins, first, second), torch.where(first_wins, second, first)
        logp_w, logp_l = score_pairs(policy.logprobs, prompt, winner, loser)  # (X B,) each
        rho = margins(logp_w, logp_l, env.reference_logprobs(prompt, winner), env.reference_logprobs(prompt, loser))
        weight = env.prompt_weights[prompt]
        return preference_loss(loss, rho, beta=beta, weights=weight), {"margin_mean": float(rho.detach().mean())}

    return exact if estimator == "exact" else sampled
