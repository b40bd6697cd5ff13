"""The exact target of group-relative updates (``method=group``) on a finite task: the stationary
point of the expected update.

The expected update of :mod:`polopt.methods.group` is minus the gradient of its surrogate in the
policy's log-probabilities with the sampling policy (its tuple probabilities, its rewards' KL part)
held fixed; in the softmax chart its zero is solved for from seeded starts: Euler steps along the update itself
until it is small (the update also vanishes at every deterministic policy, where Newton from afar
would run), then the same damped Newton steps as the stop-gradient group objectives
(:func:`toy_tasks.exact.groups.newton_on_field`) with the Jacobian of the whole field by autograd;
certified by the update's residual. Several distinct stationary points are reported as such.
"""

from __future__ import annotations

import numpy as np
import scipy.special
import torch

from polopt.methods.environment import FiniteEnvironment
from polopt.methods.group import surrogate
from toy_tasks.exact.groups import VANISHED, newton_on_field
from toy_tasks.exact.pairs import CERTIFIED, STARTS

FLOW_RATE = 1.0  # first Euler step of the update flow in the logits; grown by 1.2 per step, halved on overshoot
FLOW_MAX_RATE = 4.0
FLOW_STEPS = 4_000
FLOW_TOLERANCE = 1e-4  # then damped Newton on the update takes over


class _UpdateField:
    """The expected update at logits z (X K,) as the solver's problem: ``grad`` is minus the update,
    ``hess`` its Jacobian plus the gauge's, ``value`` the regularised objective's surrogate."""

    def __init__(self, env: FiniteEnvironment, keys: dict):
        self.env, self.keys = env, keys
        self.shape = tuple(env.reference.shape)

    def field(self, z: torch.Tensor) -> torch.Tensor:
        log_pi = torch.log_softmax(z.reshape(self.shape), dim=1)
        moving = log_pi + 0.0  # the differentiated copy; log_pi itself is the held policy
        (g,) = torch.autograd.grad(surrogate(moving, log_pi, self.env, **self.keys), moving, create_graph=True)
        pi = log_pi.exp()
        return (g - pi * g.sum(1, keepdim=True)).reshape(-1)  # chain rule through log_softmax: d/dz

    def _gauge(self, z: np.ndarray) -> np.ndarray:
        return np.repeat(z.reshape(self.shape).sum(1), self.shape[1])

    def grad(self, z: np.ndarray) -> np.ndarray:
        return self.field(torch.tensor(z, dtype=torch.float64, requires_grad=True)).detach().numpy()

    def hess(self, z: np.ndarray) -> np.ndarray:
        jac = torch.autograd.functional.jacobian(self.field, torch.as_tensor(z, dtype=torch.float64))
        return jac.numpy() + np.kron(np.eye(self.shape[0]), np.ones((self.shape[1],) * 2))

    def value(self, z: np.ndarray) -> float:
        return 0.0  # the update is no gradient of one loss: nothing to report but its residual


def _flow(problem: _UpdateField, z: np.ndarray) -> np.ndarray:
    """Follow the expected update itself (Euler steps, halved where the update turns back) until it is small, so
    that Newton starts near the stationary point training reaches: the update also vanishes at every
    deterministic policy (a group of one response has no advantage), and Newton from afar runs there."""
    rate, field = FLOW_RATE, problem.grad(z)
    for _ in range(FLOW_STEPS):
        if np.abs(field).max() <= FLOW_TOLERANCE:
            break
        trial = z - rate * field
        ahead = problem.grad(trial)
        if float(ahead @ field) < 0.0:  # the update turned back: the step overshot; shorter, and again
            rate *= 0.5
            continue
        z, field, rate = trial, ahead, min(1.2 * rate, FLOW_MAX_RATE)
    return z


def group_update_target(env: FiniteEnvironment, *, beta: float, group_size: int, advantage: str, kl: str,
                        starts: int = STARTS, seed: int = 0) -> tuple[np.ndarray | None, str, list[str]]:
    """(the stationary policy (X, K) or None, how it was found, notes)."""
    problem = _UpdateField(env, dict(beta=beta, group_size=group_size, advantage=advantage, kl=kl))
    log_ref = env.reference.numpy()
    rng = np.random.default_rng(seed)
    inits = [log_ref] + [log_ref + rng.standard_normal(log_ref.shape) for _ in range(starts - 1)]
    runs = [newton_on_field(problem, _flow(problem, z0.reshape(-1))) for z0 in inits]
    policies = [scipy.special.softmax(r["z"].reshape(problem.shape), axis=1) for r in runs]
    good = [(r, p) for r, p in zip(runs, policies, strict=True) if r["residual"] <= CERTIFIED and p.min() >= VANISHED]
    how = (f"stationary point of the expected update (damped Newton on it, {starts} seeded starts, torch autograd "
           "float64)")
    if kl == "in_reward":
        return _in_reward_target(env, beta, advantage, how, [p for _, p in good])
    if not good:
        residuals = ", ".join(f"{r['residual']:.2g}" for r in runs)
        return None, how + ": none certified in the simplex's interior", [
            f"no start reached an interior stationary point (residuals {residuals})"]
    notes = []
    spread = max(0.5 * np.abs(p - good[0][1]).sum(1).max() for _, p in good)
    if spread > 1e-6:
        notes.append(f"the starts reached stationary points up to TV {spread:.3g} apart: several stationary points; "
                     "the one from the reference start (or the first certified) is reported")
    return good[0][1], how + f", residual {good[0][0]['residual']:.2g}", notes


def _in_reward_target(env: FiniteEnvironment, beta: float, advantage: str, how: str,
                      found: list[np.ndarray]) -> tuple[np.ndarray, str, list[str]]:
    """With the KL inside the reward, ``pi* = norm(pi_ref e^{r / beta})`` is a stationary point of the
    update for every advantage: there ``r - beta log(pi* / pi_ref) = beta log Z`` for every response, so
    every group's rewards are equal and every advantage is 0 by definition (the module docstring of
    :mod:`polopt.methods.group`). Certified by that identity's spread in float64, not by the update's
    residual: the standardised update does not shrink near ``pi*`` (its advantages keep unit scale), so
    it is no smooth root for Newton. Stationary points the seeded starts found elsewhere are reported."""
    rewards, log_ref = env.rewards.double().numpy(), env.reference.double().numpy()
    log_star = scipy.special.log_softmax(log_ref + rewards / beta, axis=1)
    adjusted = rewards - beta * (log_star - log_ref)  # beta log Z per prompt, up to rounding
    spread = float((adjusted.max(1) - adjusted.min(1)).max())
    scale = max(1.0, float(np.abs(rewards).max()), float(beta * np.abs(log_star - log_ref).max()))
    if spread > 1e-12 * scale:
        raise RuntimeError(f"r - beta log(pi*/pi_ref) spread {spread:.3g} at pi_ref e^(r/beta): rounding this large "
                           "means the task's rewards or reference are not finite")
    star = np.exp(log_star)
    notes = []
    if advantage == "standardised":
        notes.append("the standardised update keeps unit scale near this point, so a constant learning rate circles "
                     "it; a decaying one (optim.schedule=cosine, the default) settles on it")
    apart = [0.5 * np.abs(p - star).sum(1).max() for p in found]
    if any(tv > 1e-6 for tv in apart):
        notes.append(f"the seeded starts also reached stationary points TV {max(apart):.3g} from it: several "
                     "stationary points; pi_ref e^(r / beta) is reported")
    return star, (how.replace("damped Newton on it", "pi_ref e^(r / beta), where every adjusted reward equals "
                              f"beta log Z (spread {spread:.1g}); damped Newton on it elsewhere")), notes


# ----------------------------------------------------------------------------
# Many responses, few distinct rewards: the update on reward classes
# ----------------------------------------------------------------------------

REWARD_DIGITS = 12  # rewards equal to this many decimals form one class (sums of the same terms in another order)


def reward_classes(rewards: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(class of each response (K,), mean reward of each class (R,)) of one prompt's rewards (K,)."""
    _, index = np.unique(np.round(rewards, REWARD_DIGITS), return_inverse=True)
    return index, np.bincount(index, weights=rewards) / np.bincount(index)


def lumped_classes(env: FiniteEnvironment, group_size: int) -> int:
    """The most ordered G-tuples of reward classes a prompt of ``env`` has: what :func:`lumped_group_target` sums."""
    return max(len(reward_classes(r)[1]) for r in env.rewards.numpy()) ** group_size


def lumped_group_target(env: FiniteEnvironment, *, beta: float, group_size: int, advantage: str, kl: str,
                        starts: int = STARTS, seed: int = 0) -> tuple[np.ndarray | None, str, list[str]]:
    """:func:`group_update_target` on the responses lumped by equal reward, prompt by prompt, then spread
    back in proportion to the reference: (the stationary policy (X, K) or None, how, notes).

    Exact, derived here: the advantages depend on a group's rewards only, so the expected update of
    response y is ``pi_y a(r_y)`` with ``a`` a function of the classes' masses Q_c = sum_{y in c} pi_y;
    the KL terms' parts are ``beta (pi_y - pi_ref_y)`` (estimator), ``beta pi_y (h_y + 1)`` (exact) and
    ``r_y - beta h_y`` inside the reward (in_reward). On policies with h constant within each class
    (pi_y = Q_c pi_ref_y / Q_ref_c) every one of them is the lumped task's update spread over the class
    in proportion to pi_ref, so a stationary point of the lumped task is one of the whole task; the
    expected update from the reference stays on those policies."""
    reference, rewards = env.reference.exp().numpy(), env.rewards.numpy()
    policy, notes, hows = np.zeros_like(reference), [], []
    for x in range(reference.shape[0]):
        index, values = reward_classes(rewards[x])
        mass = np.bincount(index, weights=reference[x])  # (R,) Q_ref
        lumped = FiniteEnvironment(torch.as_tensor(np.log(mass))[None], torch.ones(1, dtype=torch.float64),
                                   torch.as_tensor(values)[None])
        target, how, found = group_update_target(lumped, beta=beta, group_size=group_size, advantage=advantage,
                                                 kl=kl, starts=starts, seed=seed + x)
        notes += [f"prompt {x}: {n}" for n in found]
        hows.append(how)
        if target is None:
            return None, how + f" (prompt {x}, {len(values)} reward classes)", notes
        policy[x] = target[0][index] * reference[x] / mass[index]
    classes = [len(reward_classes(r)[1]) for r in rewards]
    return policy, (f"{hows[0]}, on the responses lumped by equal reward ({', '.join(map(str, classes))} classes "
                    f"per prompt), spread back in proportion to pi_ref"), notes
