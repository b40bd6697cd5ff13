"""The fast exact solvers give the landed solvers' answers, certificate included.

Held against: the solvers as they stood before (``toy_tasks.exact.landed``: scipy's trust-region Newton,
``trust-exact``, with derivatives by torch autograd per call), themselves pinned to published closed forms
and independent solves in test_solve.py and test_pair_solve.py. The fast solvers share no solving code
with them (their own Newton, derivative assembly and kink search). Nothing about time is asserted.

Agreement: the same finiteness, uniqueness and certification; policies within TV 1e-8 where the optimum is
finite and unique, plus the landed answer's own distance from the optimum (one Newton step from it, in the
landed answer's own chart: the landed solver stops at a gradient of up to 1e-10, which moves a policy by up
to ~1e-8 where the curvature is small); values within 1e-10 (relative); the same limit support where the
infimum lies on the boundary.
"""

import numpy as np
import pytest
import scipy.special
import user_objectives as user
from helpers_exact import random_task

from polopt import losses
from toy_tasks.exact import landed
from toy_tasks.exact.landed.margin import solve as landed_solve
from toy_tasks.exact.landed.pairs import solve_pairs as landed_solve_pairs
from toy_tasks.exact.margin import solve
from toy_tasks.exact.newton import newton_step
from toy_tasks.exact.pairs import CERTIFIED, margin_objective, solve_pairs
from toy_tasks.exact.prompt import PromptLoss
from toy_tasks.families import deterministic
from toy_tasks.finite.task import make_task

assert landed.__doc__  # the landed package says what it is

TV = 1e-8
USER = {"length_normalised_reference_free": user.length_normalised_reference_free,
        "logistic_with_winner_likelihood": user.logistic_with_winner_likelihood,
        "winner_anchored_user": user.winner_anchored, "forward_kl_user": user.forward_kl}


def tv(p: np.ndarray, q: np.ndarray) -> float:
    return float(0.5 * np.abs(p - q).sum(axis=1).max())


def landed_own_error(objective, task, weights, optimum, beta) -> float:
    """TV between the landed answer and one Newton step from it (its distance from the smooth optimum,
    to first order); 0 where the answer sits at a kink (no Newton step measures it there)."""
    policy = task.policy_from_logratios(optimum.logratios)
    moved = []
    for x in range(task.n_prompts):
        chart = PromptLoss(objective, weights[x], np.log(task.reference[x]), task.lengths[x], beta).chart()
        z = np.log(policy[x])
        z = z - z.mean()
        _, grad, hess = chart.gauged_derivatives(z)
        moved.append(scipy.special.softmax(z + newton_step(hess, grad)))
    return tv(policy, np.stack(moved)) if optimum.residual <= 1e-9 else 0.0


def assert_same(fast, slow, task, *, error: float = 0.0):
    assert fast.finite == slow.finite and fast.unique == slow.unique and fast.certified == slow.certified
    assert fast.value == pytest.approx(slow.value, rel=1e-10, abs=1e-12)
    if fast.finite:
        if slow.residual is not None:
            assert (fast.residual <= CERTIFIED) == (slow.residual <= CERTIFIED)
        if fast.unique:
            assert tv(task.policy_from_logratios(fast.logratios), task.policy_from_logratios(slow.logratios)) \
                <= TV + 2.0 * error
    else:
        assert fast.limit_support == slow.limit_support


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
@pytest.mark.parametrize("name", losses.builtin_names("pair"))
def test_every_builtin_pair_objective_on_random_tasks(name, seed):
    task = random_task(seed, bradley_terry=seed % 2 == 0)
    objective, weights = losses.resolve(name), task.win_weights()
    kwargs = dict(beta=0.7, rewards=task.rewards, population=True)
    slow = landed_solve_pairs(objective, weights, task.reference, task.lengths, **kwargs)
    fast = solve_pairs(objective, weights, task.reference, task.lengths, **kwargs)
    assert_same(fast, slow, task, error=landed_own_error(objective, task, weights, slow, 0.7))


@pytest.mark.parametrize("name", list(USER))
def test_user_objectives_on_a_random_task(name):
    task = random_task(5, bradley_terry=False)
    weights = task.win_weights()
    slow = landed_solve_pairs(USER[name], weights, task.reference, task.lengths, beta=0.7)
    fast = solve_pairs(USER[name], weights, task.reference, task.lengths, beta=0.7)
    assert_same(fast, slow, task, error=landed_own_error(USER[name], task, weights, slow, 0.7))


@pytest.mark.parametrize(("penalty", "seed"), [(50.0, 0), (2.0, 1), (2.0, 2), (0.5, 3), (5.0, 6)])
def test_kinked_optima_agree(penalty, seed):
    # DPO-Positive's anchor max(0, -h_w) (Pal et al. 2024): optima at the kink, certified by transfer slopes
    task = random_task(seed, bradley_terry=seed % 2 == 0)
    objective, weights = losses.resolve("winner_anchored", penalty=penalty), task.win_weights()
    slow = landed_solve_pairs(objective, weights, task.reference, task.lengths, beta=0.7)
    fast = solve_pairs(objective, weights, task.reference, task.lengths, beta=0.7)
    assert fast.certified and fast.residual <= CERTIFIED
    assert_same(fast, slow, task, error=landed_own_error(objective, task, weights, slow, 0.7))


@pytest.mark.parametrize(("objective", "seed"), [(user.length_normalised_reference_free, 0),
                                                 (user.logistic_with_winner_likelihood, 1), (user.reverse_kl, 2)])
def test_boundary_infima_agree(objective, seed):
    # deterministic labels: the infimum lies on the simplex's boundary (derivations in test_pair_solve.py)
    task = deterministic(n_responses=5, seed=seed)
    slow = landed_solve_pairs(objective, task.win_weights(), task.reference, task.lengths, beta=0.5)
    fast = solve_pairs(objective, task.win_weights(), task.reference, task.lengths, beta=0.5)
    assert not fast.finite and fast.limit_support == slow.limit_support
    assert fast.value == pytest.approx(slow.value, abs=1e-6)


def test_a_non_unique_minimiser_is_reported_by_both():
    # two separate comparisons (0 vs 1, 2 vs 3): the mass split between the two pairs is free
    w = np.zeros((1, 4, 4))
    w[0, 0, 1], w[0, 1, 0], w[0, 2, 3], w[0, 3, 2] = 0.3, 0.2, 0.3, 0.2
    args = (margin_objective(losses.resolve_margin("squared")), w, np.full((1, 4), 0.25), np.ones((1, 4)))
    slow, fast = landed_solve_pairs(*args, beta=1.0), solve_pairs(*args, beta=1.0)
    assert not slow.unique and not fast.unique
    assert fast.value == pytest.approx(slow.value, rel=1e-10)


def margin_task(seed: int, k: int, kind: str):
    rng = np.random.default_rng(seed)
    reference = rng.dirichlet(np.ones(k))
    if kind == "bt":
        return make_task(reference, rewards=rng.normal(0.0, 1.5, k))
    upper = rng.random((k, k))
    if kind == "deterministic":
        upper = (upper > 0.5).astype(float)
    pref = np.triu(upper, 1) + np.triu(1.0 - upper, 1).T + 0.5 * np.eye(k)
    return make_task(reference, pref)


@pytest.mark.parametrize("kind", ["bt", "noisy", "deterministic"])
@pytest.mark.parametrize("name", [n for n in losses.builtin_names("margin") if n != "hinge"])
def test_every_builtin_margin_loss(name, kind):
    # no closed form is offered (population=False), so both run Newton; deterministic labels leave the win
    # graph not strongly connected for some seeds (no finite optimum for logistic, exponential, savage)
    task = margin_task(3, 9, kind)
    loss, weights = losses.resolve_margin(name), task.win_weights()
    slow, fast = landed_solve(loss, weights, beta=0.8), solve(loss, weights, beta=0.8)
    assert fast.finite == slow.finite and fast.unique == slow.unique
    assert fast.value == pytest.approx(slow.value, rel=1e-10, abs=1e-12)
    if fast.finite:
        assert fast.residual <= 1e-9 and slow.residual <= 1e-9
        assert tv(task.policy_from_logratios(fast.logratios), task.policy_from_logratios(slow.logratios)) <= TV
    else:
        assert fast.limit_support == slow.limit_support


def test_a_warm_start_reaches_the_same_margin_optimum():
    # the optimum at beta = 0.5 scaled to beta = 0.8 (toy_tasks.exact.margin.warm_start) as the start
    from toy_tasks.exact.margin import warm_start

    task = margin_task(4, 9, "noisy")
    loss, weights = losses.resolve_margin("exponential"), task.win_weights()
    start = warm_start(solve(loss, weights, beta=0.5), 0.5, 0.8)
    cold, warm = solve(loss, weights, beta=0.8), solve(loss, weights, beta=0.8, start=start)
    assert tv(task.policy_from_logratios(cold.logratios), task.policy_from_logratios(warm.logratios)) <= TV


def test_a_warm_start_reaches_the_same_pair_optimum():
    # the optimum at beta = 0.5 as the first start at beta = 0.8 (toy_tasks.exact.pairs.warm_start)
    from toy_tasks.exact.pairs import warm_start

    task = random_task(6, bradley_terry=False)
    objective, weights = losses.resolve("length_regularised"), task.win_weights()
    start = warm_start(solve_pairs(objective, weights, task.reference, task.lengths, beta=0.5))
    cold = solve_pairs(objective, weights, task.reference, task.lengths, beta=0.8)
    warm = solve_pairs(objective, weights, task.reference, task.lengths, beta=0.8, warm=start)
    assert warm.certified and warm.unique
    assert tv(task.policy_from_logratios(cold.logratios), task.policy_from_logratios(warm.logratios)) <= TV
