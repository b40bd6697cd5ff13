"""The group solver's Hessian from per-group member derivatives equals torch's own Jacobian of the gradient.

Held against: ``torch.autograd.functional.jacobian`` of L's gradient in the logits (the path the solver
keeps for objectives with a statistic of the batch), on every built-in group objective without a
stop-gradient, on the feedback kinds it reads.
"""

import numpy as np
import pytest
import torch
from helpers_exact import random_task

from polopt import losses
from polopt.losses.group_objective import GroupObjective
from toy_tasks.exact.groups import _Population
from toy_tasks.finite.feedback import population_groups

SMOOTH = [n for n in losses.builtin_names("group") if not losses.resolve(n).stop_gradient]


def population(objective, feedback: str) -> _Population:
    task = random_task(2, bradley_terry=True)
    groups = population_groups(task, feedback, 2 if feedback == "pairs" else 3)
    return _Population(objective, groups, np.log(task.reference), task.lengths, 0.7)


def jacobian_hessian(problem: _Population, z: np.ndarray) -> np.ndarray:
    zt = torch.as_tensor(z, dtype=torch.float64)
    jac = torch.autograd.functional.jacobian(lambda v: torch.autograd.grad(problem.loss(v), v, create_graph=True)[0],
                                             zt)
    return jac.numpy() + np.kron(np.eye(problem.shape[0]), np.ones((problem.shape[1],) * 2))


READ = [(n, f) for n in SMOOTH for f in ("pairs", "ranking", "scored") if losses.resolve(n).reads_feedback(f)]


@pytest.mark.parametrize(("name", "feedback"), READ)
def test_member_hessian_equals_the_jacobian(name, feedback):
    objective = losses.resolve(name)
    problem = population(objective, feedback)
    assert problem.separable
    z = problem.log_ref.numpy() + np.random.default_rng(0).normal(0.0, 1.0, problem.log_ref.shape)
    value, grad, hess = problem.gauged_derivatives(z)
    want_value, want_grad = problem.fun(z)
    assert value == pytest.approx(want_value, rel=1e-12)
    np.testing.assert_allclose(grad, want_grad, rtol=0, atol=1e-12)
    np.testing.assert_allclose(hess, jacobian_hessian(problem, z), rtol=0, atol=1e-12 * (1 + np.abs(hess).max()))


def test_every_smooth_built_in_is_held_on_a_kind_it_reads():
    assert {n for n, _ in READ} == set(SMOOTH)


def test_a_statistic_of_the_batch_keeps_the_jacobian():
    # each group's loss minus the batch's mean log-ratio: groups are coupled, so the member path would be wrong
    def centred(group, beta):
        h = group.logratio[:, 0] - group.logratio[:, 1]  # (B,)
        return torch.nn.functional.softplus(-beta * (h - h.mean()))

    objective = GroupObjective("centred", centred, {}, "user-supplied", reads=("ranks",))
    assert not population(objective, "pairs").separable


PAIRWISE = [n for n in SMOOTH if losses.resolve(n).pairwise]


@pytest.mark.parametrize("feedback", ["pairs", "ranking"])
@pytest.mark.parametrize("name", PAIRWISE)
def test_a_pairwise_objective_on_groups_of_two_is_its_pair_loss_in_the_pair_solver(name, feedback):
    # ranked_pairs at G = 2 is the pair loss itself; the pair solver's chart over W (the groups' weights by
    # winner and loser) must give the group population's value, gradient and Hessian, here torch's own
    from toy_tasks.exact.groups import _pair_prompt, _prompt_groups

    task = random_task(4, bradley_terry=True)
    objective = losses.resolve(name)
    groups = _prompt_groups(population_groups(task, feedback, 2), 0)
    log_ref = np.log(task.reference[:1])
    chart = _pair_prompt(objective, groups, log_ref, task.lengths[:1], 0.7)
    problem = _Population(objective, groups, log_ref, task.lengths[:1], 0.7)
    assert chart is not None
    z = log_ref[0] + np.random.default_rng(0).normal(0.0, 0.5, log_ref.shape[1])
    value, grad, hess = chart.gauged_derivatives(z)
    assert value == pytest.approx(problem.gauged_value(z), rel=1e-12)
    np.testing.assert_allclose(grad, problem.fun(z)[1], rtol=0, atol=1e-12)
    np.testing.assert_allclose(hess, jacobian_hessian(problem, z), rtol=0, atol=1e-10)
