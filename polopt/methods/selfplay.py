"""Self-play with a loss of the family: pairs from the current policy, the opponent a stop-gradient copy.

With the squared loss at beta, self-play's fixed point is the Nash equilibrium of
the KL-regularised preference game at tau = beta / 2 (Munos et al., Nash Learning
from Human Feedback, 2023; Calandriello et al., Human Alignment of Large Language
Models through Online Preference Optimisation, 2024): IPO's minimiser against a
sampling distribution mu is ``pi ∝ pi_ref exp(P(y > mu) / tau)`` (Azar et al. 2023),
and with mu = pi a fixed point is the regularised best response to itself::

    pi = BR(pi),   BR(pi)(y) ∝ pi_ref(y) exp(P(y > pi) / tau),   P(y > pi) = sum_j P[y, j] pi(j).

Two updates (``method.update``):

- ``fixed_point`` (the default with the exact estimator): minimise the distance
  between the policy and its own regularised best response, gradients through both,
  the symmetrised KL (Jeffreys divergence) scaled by tau::

      D(pi) = tau * sum_y (pi(y) - BR(pi)(y)) (log pi(y) - log BR(pi)(y))  >= 0,

  zero exactly where pi = BR(pi), at the equilibrium (unique: the game is
  tau-strongly monotone). Minimising a gap function of the game is the classical
  route for monotone problems (Fukushima, Equivalent differentiable optimization
  problems and descent methods for asymmetric variational inequality problems,
  1992); D is ours, derived here. Gradient self-play (below) follows the game's
  vector field instead, whose linearisation near the equilibrium has eigenvalues
  of modulus about |P - 1/2| / tau: at small beta its steps circle the equilibrium or
  collapse onto one response. D is an ordinary function to minimise, so the
  optimiser's usual step works at every beta (measured: TV <= 1e-4 for beta from
  0.01 to 1 on the built-in tasks with the default Adam, 2000 steps). The reverse KL
  term keeps the gradient alive on responses the policy has nearly dropped.
- ``gradient``: the offline objective ``f(beta rho)`` of :mod:`polopt.losses.reduce` on
  pairs from stopgrad(pi), labelled by P: online IPO when f is the squared loss. Any
  loss of the family; the update for sampled pairs.

Estimators (``method.estimator``):
- ``exact``: every ordered pair (i, j), i != j, weighted by ``mu_i mu_j P[i, j]``
  (the expectation over pairs and labels; pairs with i = j have margin 0 and
  carry no gradient); ``fixed_point`` uses the whole distribution.
- ``sampled``: ``method.batch_size`` pairs per prompt from mu, labels drawn from P
  (``gradient`` only).
"""

from __future__ import annotations

from collections.abc import Callable

import torch

from polopt.losses.margin import MarginLoss
from polopt.losses.pair import PairScores
from polopt.losses.reduce import margins, per_pair_losses, weighted_mean
from polopt.methods.environment import FiniteEnvironment
from polopt.methods.rl import check_estimator
from polopt.pairs import score_pairs

Tensor = torch.Tensor

UPDATES = ("fixed_point", "gradient")


def regularised_best_response(log_p: Tensor, log_reference: Tensor, preference: Tensor, *, tau: float) -> Tensor:
    """log BR(pi) = log_softmax(log pi_ref + P pi / tau) per prompt (Munos et al. 2023).
    (X, K), (X, K), (X, K, K) -> (X, K)."""
    win = torch.einsum("xij,xj->xi", preference, log_p.exp())  # (X, K): P(y > pi)
    return torch.log_softmax(log_reference + win / tau, dim=-1)


def best_response_divergence(log_p: Tensor, log_reference: Tensor, preference: Tensor, *, tau: float) -> Tensor:
    """D(pi) = tau * sum_y (pi - BR(pi)) (log pi - log BR(pi)), per prompt (X,): tau times the
    Jeffreys divergence between pi and its regularised best response; 0 exactly at the equilibrium."""
    best = regularised_best_response(log_p, log_reference, preference, tau=tau)  # (X, K)
    return tau * ((log_p.exp() - best.exp()) * (log_p - best)).sum(-1)


def resolve_update(update: str | None, estimator: str, loss: MarginLoss) -> str:
    """``method.update``: null picks fixed_point for the exact estimator, gradient for sampled pairs."""
    if update is None:
        return "fixed_point" if estimator == "exact" and loss.name == "squared" else "gradient"
    if update not in UPDATES:
        raise ValueError(f"method.update must be one of {', '.join(UPDATES)} or null, got {update!r}")
    if update == "fixed_point" and estimator != "exact":
        raise ValueError("method.update=fixed_point needs method.estimator=exact (it uses P(y > pi) for every "
                         "response); for sampled pairs use method.update=gradient")
    if update == "fixed_point" and loss.name != "squared":
        raise ValueError(f"method.update=fixed_point solves the squared loss's game (tau = beta / 2), got "
                         f"method.loss={loss.name}; use method.loss=squared, or method.update=gradient")
    return update


def selfplay_objective(policy: torch.nn.Module, env: FiniteEnvironment, loss: MarginLoss, *, beta: float,
                       estimator: str = "exact", batch_size: int = 64, update: str | None = None,
                       generator: torch.Generator | None = None) -> Callable[[int], tuple[Tensor, dict]]:
    """The per-step objective of :func:`polopt.training.loop.optimise` for self-play."""
    check_estimator(estimator)
    update = resolve_update(update, estimator, loss)
    if env.preference is None:
        env.prefer(*(torch.zeros(1, dtype=torch.long),) * 3)  # raises the named error
    if estimator == "sampled" and (not isinstance(batch_size, int) or batch_size < 1):
        raise ValueError(f"method.batch_size must be a positive integer, got {batch_size!r}")
    generator = generator or torch.Generator().manual_seed(0)
    n_prompts, k = env.reference.shape
    x, i, j = torch.nonzero(~torch.eye(k, dtype=torch.bool).expand(n_prompts, k, k), as_tuple=True)  # (E,) each

    def fixed_point(step: int) -> tuple[Tensor, dict]:
        logp = policy.log_distribution().to(env.reference.dtype)  # (X, K); a transformer's float32 to float64
        divergence = best_response_divergence(logp, env.reference, env.preference, tau=beta / 2.0)  # (X,)
        with torch.no_grad():
            mu = logp.exp()
            weight = env.prompt_weights[x] * mu[x, i] * mu[x, j] * env.preference[x, i, j]  # (E,)
            rho = margins(logp[x, i], logp[x, j], env.reference[x, i], env.reference[x, j])  # (E,)
        return (env.prompt_weights * divergence).sum(), {"margin_mean": float((weight * rho).sum() / weight.sum())}

    def exact(step: int) -> tuple[Tensor, dict]:
        logp = policy.log_distribution()  # (X, K)
        with torch.no_grad():
            mu = logp.exp()  # the opponent: a stop-gradient copy of the policy
            weight = env.prompt_weights[x] * mu[x, i] * mu[x, j] * env.preference[x, i, j]  # (E,)
        pair = _finite_pairs(logp[x, i], logp[x, j], env.reference[x, i], env.reference[x, j])  # (E,) each
        rho = margins(pair.winner, pair.loser, pair.ref_winner, pair.ref_loser)  # (E,)
        margin_mean = float((weight * rho.detach()).sum() / weight.sum())
        return weighted_mean(per_pair_losses(loss, pair, beta=beta), weight), {"margin_mean": margin_mean}

    def sampled(step: int) -> tuple[Tensor, dict]:
        prompt, first = env.sample(policy, batch_size, generator)  # (X * B,)
        _, second = env.sample(policy, batch_size, generator)
        with torch.no_grad():
            first_wins = torch.rand(len(prompt), generator=generator, dtype=env.reference.dtype) < env.prefer(
                prompt, first, second)
        winner, loser = torch.where(first_wins, first, second), torch.where(first_wins, second, first)
        logp_w, logp_l = score_pairs(policy.logprobs, prompt, winner, loser)  # (X B,) each
        pair = _finite_pairs(logp_w, logp_l, env.reference_logprobs(prompt, winner),
                             env.reference_logprobs(prompt, loser))  # (X B,) each
        rho = margins(pair.winner, pair.loser, pair.ref_winner, pair.ref_loser)  # (X B,)
        weight = env.prompt_weights[prompt]
        value = weighted_mean(per_pair_losses(loss, pair, beta=beta), weight)
        return value, {"margin_mean": float(rho.detach().mean())}

    if update == "fixed_point":
        return fixed_point
    return exact if estimator == "exact" else sampled


def _finite_pairs(winner: Tensor, loser: Tensor, ref_winner: Tensor, ref_loser: Tensor) -> PairScores:
    """The :class:`PairScores` of finite-task pairs: every response one token long. (B,) each."""
    ones = torch.ones_like(winner)
    return PairScores(winner, loser, ref_winner, ref_loser, ones, ones)
