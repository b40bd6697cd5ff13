"""Group-relative online updates: G samples per prompt from the current policy, rewards turned into
advantages relative to the group, a policy-gradient step with a KL term.

Per prompt x, a group y_1..y_G is drawn i.i.d. from the current policy pi; with rewards r_i and
advantages A_i (``method.advantage``):

    standardised    (r_i - mean) / std, std the sample standard deviation (ddof 1); 0 for a group of
                    equal rewards (the group-normalised advantage; Shao et al., DeepSeekMath, 2024)
    centred         r_i - mean
    leave_one_out   r_i - mean of the other G - 1 (Kool et al., Buy 4 REINFORCE samples, get a
                    baseline for free!, 2019; Ahmadian et al., Back to basics, 2024)

the update ascends ``E_group[(1/G) sum_i A_i grad log pi(y_i)]`` minus the KL term (``method.kl``):

    estimator   beta E_{y ~ pi}[grad (rho - log rho - 1)], rho = pi_ref(y) / pi(y), the sample held fixed
                (the per-sample penalty of DeepSeekMath; its expected gradient is beta sum_y (pi - pi_ref)
                grad log pi, the gradient of KL(pi_ref || pi), not of KL(pi || pi_ref))
    exact       beta grad KL(pi || pi_ref)
    in_reward   none apart: r_i - beta log(pi(y_i) / pi_ref(y_i)) replaces r_i (held fixed)

Estimators (``method.estimator``): ``exact`` takes the expectation over every ordered G-tuple of the
finite response set (K^G tuples, probabilities prod pi, held fixed), so each step is the expected
update itself; ``sampled`` draws ``method.batch_size`` groups per prompt. :func:`surrogate` is the one
expression of the update: the training step differentiates it with the held parts detached, and the
exact target (toy_tasks/methods/group_target.py) solves for the policy where that update vanishes.
With ``leave_one_out`` and ``in_reward`` the expected update is the gradient of E_pi[r] - beta KL(pi ||
pi_ref), so its stationary point is pi_ref e^{r / beta}; standardising moves it away.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable

import torch

from polopt.methods.environment import FiniteEnvironment

Tensor = torch.Tensor
ADVANTAGES = ("standardised", "centred", "leave_one_out")
KL_TERMS = ("estimator", "exact", "in_reward")
ESTIMATORS = ("exact", "sampled")
MAX_TUPLES = 100_000  # ordered G-tuples of the exact expectation
TIE_TOLERANCE = 1e-12  # a group whose rewards' std is below this (relative to their size) has equal rewards


def check_group_method(group_size, advantage: str, kl: str, estimator: str, n_responses: int) -> None:
    """One-line ValueErrors naming the ``method.*`` key out of range."""
    if not isinstance(group_size, int) or isinstance(group_size, bool) or group_size < 2:
        raise ValueError(f"method.group_size must be an integer >= 2 (advantages are relative to the group), "
                         f"got {group_size!r}")
    if advantage not in ADVANTAGES:
        raise ValueError(f"method.advantage must be one of {', '.join(ADVANTAGES)}, got {advantage!r}")
    if kl not in KL_TERMS:
        raise ValueError(f"method.kl must be one of {', '.join(KL_TERMS)}, got {kl!r}")
    if estimator not in ESTIMATORS:
        raise ValueError(f"method.estimator must be one of {', '.join(ESTIMATORS)}, got {estimator!r}")
    if estimator == "exact" and n_responses**group_size > MAX_TUPLES:
        raise ValueError(f"method.estimator=exact sums over {n_responses}^{group_size} = "
                         f"{n_responses**group_size} groups, more than {MAX_TUPLES}; lower method.group_size or "
                         "use method.estimator=sampled")


def advantages(rewards: Tensor, kind: str) -> Tensor:
    """Group-relative advantages of rewards (..., G) -> (..., G) (see the module docstring)."""
    g = rewards.shape[-1]
    mean = rewards.mean(-1, keepdim=True)
    if kind == "centred":
        return rewards - mean
    if kind == "leave_one_out":
        return rewards - (rewards.sum(-1, keepdim=True) - rewards) / (g - 1)
    std = rewards.std(-1, keepdim=True)  # ddof 1
    # equal rewards, and rewards equal up to rounding (a sum of the same terms in another order): their mean
    # can differ from them by rounding, and (r - mean) / std would then be rounding noise of order 1, or, where
    # the std rounds to 0, of order 1e290, instead of 0
    scale = rewards.abs().amax(-1, keepdim=True).clamp(min=1.0)
    equal = (rewards == rewards[..., :1]).all(-1, keepdim=True) | (std <= TIE_TOLERANCE * scale)
    return torch.where(equal, 0.0, (rewards - mean) / std.clamp(min=torch.finfo(rewards.dtype).tiny))


def all_groups(n_responses: int, group_size: int) -> Tensor:
    """Every ordered G-tuple of K responses, (K^G, G)."""
    return torch.tensor(list(itertools.product(range(n_responses), repeat=group_size)), dtype=torch.long)


def surrogate(logp: Tensor, held: Tensor, env: FiniteEnvironment, *, beta: float, group_size: int, advantage: str,
              kl: str) -> Tensor:
    """The exact expected update as a scalar to minimise: its gradient in ``logp`` (X, K), with
    ``held`` (X, K) (the policy the groups are drawn from, its rewards and weights) held fixed, is
    minus the expected update. The training step passes ``held = logp.detach()``."""
    groups = all_groups(logp.shape[1], group_size)  # (T, G)
    draw = held.exp()[:, groups].prod(-1)  # (X, T): probability of each tuple
    rewards = env.rewards[:, groups]  # (X, T, G)
    if kl == "in_reward":
        rewards = rewards - beta * (held - env.reference)[:, groups]  # r - beta log(pi / pi_ref), held
    score = (advantages(rewards, advantage) * logp[:, groups]).mean(-1)  # (X, T)
    per_prompt = -(draw * score).sum(-1)  # (X,)
    if kl == "exact":
        per_prompt = per_prompt + beta * (logp.exp() * (logp - env.reference)).sum(-1)  # KL(pi || pi_ref)
    elif kl == "estimator":
        ratio = torch.exp(env.reference - logp)  # rho = pi_ref / pi
        per_prompt = per_prompt + beta * (held.exp() * (ratio - torch.log(ratio) - 1.0)).sum(-1)  # samples held
    return (env.prompt_weights * per_prompt).sum()


def _sampled_step(policy, env: FiniteEnvironment, *, beta, group_size, advantage, kl, batch_size, generator):
    def step(step: int) -> tuple[Tensor, dict]:
        prompt, response = env.sample(policy, batch_size * group_size, generator)  # (X B G,)
        logp = policy.logprobs(prompt, response)  # (X B G,)
        with torch.no_grad():
            rewards = env.reward(prompt, response)
            ref = env.reference_logprobs(prompt, response)
            if kl == "in_reward":
                rewards = rewards - beta * (logp - ref)
            adv = advantages(rewards.reshape(-1, group_size), advantage).reshape(-1)  # (X B G,)
            weight = env.prompt_weights[prompt] / (batch_size * group_size)
        loss = -(weight * adv * logp).sum()
        if kl == "estimator":
            ratio = torch.exp(ref - logp)
            loss = loss + beta * (weight * (ratio - torch.log(ratio) - 1.0)).sum()
        elif kl == "exact":
            dist = policy.log_distribution()
            loss = loss + beta * (env.prompt_weights * (dist.exp() * (dist - env.reference)).sum(-1)).sum()
        return loss, {}

    return step


def group_objective(policy: torch.nn.Module, env: FiniteEnvironment, *, beta: float, group_size: int = 4,
                    advantage: str = "standardised", kl: str = "estimator", estimator: str = "exact",
                    batch_size: int = 16, generator: torch.Generator | None = None
                    ) -> Callable[[int], tuple[Tensor, dict]]:
    """The per-step surrogate of :func:`polopt.training.loop.optimise` for group-relative updates."""
    if env.rewards is None:
        env.reward(torch.zeros(1, dtype=torch.long), torch.zeros(1, dtype=torch.long))  # raises the named error
    check_group_method(group_size, advantage, kl, estimator, env.rewards.shape[1])
    keys = dict(beta=beta, group_size=group_size, advantage=advantage, kl=kl)
    if estimator == "sampled":
        return _sampled_step(policy, env, batch_size=batch_size, generator=generator or torch.Generator(), **keys)

    def exact(step: int) -> tuple[Tensor, dict]:
        logp = policy.log_distribution()  # (X, K)
        return surrogate(logp, logp.detach(), env, **keys), {}

    return exact
