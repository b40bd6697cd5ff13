"""The convexity proof of a pair objective's optimum (toy_tasks.exact.convexity) and the one-start solve it allows.

Held against: scipy's L-BFGS-B on all softmax logits (helpers_exact.independent_policy), the solver's own seeded
starts with the proof switched off, and torch's Hessian (torch.autograd.functional.hessian) of the objectives'
own population loss for the convexity the proof rests on (a logistic link of affine scores is convex: Boyd
and Vandenberghe, Convex Optimization, 2004, section 3.2.2). Objectives: DPO's reverse KL (Rafailov et al.
2023), SimPO (Meng et al. 2024), R-DPO (Park et al. 2024), the reference-free logistic and CPO's winner NLL
(Xu et al. 2024).
"""

import numpy as np
import pytest
import torch
from helpers_exact import independent_policy, random_task

from polopt import losses
from polopt.losses.pair import PairScores
from toy_tasks.exact import convexity, pairs
from toy_tasks.exact.pairs import margin_objective, solve_pairs
from toy_tasks.exact.prompt import PromptLoss

AFFINE = ["divergence_reverse_kl", "length_normalised_free", "length_regularised", "reference_free_logistic",
          "plus_winner_nll"]


def solve(objective, task, **kwargs):
    # population=False: the reverse KL's closed form is not taken, so every objective goes through Newton
    return solve_pairs(objective, task.win_weights(), task.reference, task.lengths, beta=0.7, **kwargs)


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("name", AFFINE)
def test_one_start_finds_what_the_seeded_starts_and_an_independent_solve_find(name, seed, monkeypatch):
    task = random_task(seed, bradley_terry=seed % 2 == 0)
    objective = losses.resolve(name)
    proved = solve(objective, task)
    assert proved.certified and proved.unique and "by convexity" in proved.method
    np.testing.assert_allclose(task.policy_from_logratios(proved.logratios),
                               independent_policy(objective, task, 0.7), atol=1e-6, rtol=0)
    monkeypatch.setattr(convexity, "certificate", lambda *args, **kwargs: None)
    started = solve(objective, task)
    assert started.unique and "3 seeded starts" in started.method
    tv = 0.5 * np.abs(task.policy_from_logratios(proved.logratios) - task.policy_from_logratios(started.logratios))
    assert tv.sum(axis=1).max() <= 1e-8


@pytest.mark.parametrize("name", AFFINE)
def test_the_declared_affine_objectives_are_convex_in_the_log_probabilities(name):
    # the premise itself, by torch's Hessian of the objective's own loss at random log-probabilities
    task = random_task(4)
    prompt = PromptLoss(losses.resolve(name), task.win_weights()[0], np.log(task.reference[0]), task.lengths[0], 0.7)
    assert prompt.terms.form.affine
    rng = np.random.default_rng(0)
    for _ in range(5):
        point = torch.as_tensor(np.log(task.reference[0]) + 2.0 * rng.standard_normal(prompt.k))
        hessian = torch.autograd.functional.hessian(prompt.loss_at, point)
        eigenvalues = torch.linalg.eigvalsh(hessian)
        assert float(eigenvalues.min()) >= -1e-10 * max(1.0, float(eigenvalues.abs().max()))


def test_no_proof_without_a_connected_win_graph():
    # two separate comparisons (0 vs 1, 2 vs 3): the split of mass between them is free, so the seeded starts
    # must run (and they find the minimiser is not unique)
    w = np.zeros((1, 4, 4))
    w[0, 0, 1], w[0, 1, 0], w[0, 2, 3], w[0, 3, 2] = 0.3, 0.2, 0.3, 0.2
    optimum = solve_pairs(losses.resolve("divergence_reverse_kl"), w, np.full((1, 4), 0.25), np.ones((1, 4)),
                          beta=1.0)
    assert not optimum.unique and "by convexity" not in optimum.method


@pytest.mark.parametrize("objective", [losses.resolve("odds_ratio_with_nll"), losses.resolve("divergence_forward_kl"),
                                       margin_objective(losses.resolve_margin("squared"))])
def test_no_proof_for_scores_that_are_not_declared_affine(objective):
    task = random_task(5)
    prompt = PromptLoss(objective, task.win_weights()[0], np.log(task.reference[0]), task.lengths[0], 0.7)
    assert convexity.certificate(prompt, np.log(task.reference[0]), tol=1e-7) is None
    assert "by convexity" not in solve(objective, task).method


def pushed_from_winners(pair: PairScores, beta: float) -> torch.Tensor:
    """The reference-free logistic plus ``+0.3 log pi_w``: a term that pays for moving mass off the winners,
    so the KKT multiplier ``-sum G`` is negative (the relaxed problem's minimiser leaves the simplex)."""
    return -torch.nn.functional.logsigmoid(beta * (pair.winner - pair.loser)) + 0.3 * pair.winner


def _pushed_form(beta):
    from toy_tasks.exact.scores import FORMS

    inner = FORMS["reference_free_logistic"](beta)
    return type(inner)(inner.link, inner.winner_score, inner.loser_score, lambda a, ref, n: 0.3 * a, affine=True)


pushed_from_winners.score_form = _pushed_form


def test_no_proof_where_the_kkt_multiplier_is_negative():
    task = random_task(6)
    prompt = PromptLoss(pushed_from_winners, task.win_weights()[0], np.log(task.reference[0]), task.lengths[0], 0.7)
    assert prompt.terms.form.affine  # the declared form is used (it reproduces the objective's values)
    run = pairs._solve_prompt(prompt.chart(), np.log(task.reference[0]))
    log_pi = torch.log_softmax(torch.as_tensor(run["z"]), 0).numpy()
    assert float(prompt.logpi_gradient(log_pi).sum()) > 1e-3
    assert convexity.certificate(prompt, log_pi, tol=1e-7) is None


# ------------------------------------------------------------------ group objectives

GROUP_CONVEX = [("ranking_likelihood", {}, "ranking", 3), ("calibrated_logistic", {}, "pairs", 2),
                ("score_cross_entropy", {"temperature": 0.8}, "scored", 3)]


def group_solve(name, params, kind, g, seed):
    from polopt.losses import registry
    from toy_tasks.exact.groups import solve_groups
    from toy_tasks.finite.feedback import population_groups

    task = random_task(seed)
    objective = registry.as_group_objective(registry.resolve(name, **params))
    return task, solve_groups(objective, population_groups(task, kind, g), task.reference, task.lengths, beta=0.7)


@pytest.mark.parametrize(("name", "params", "kind", "g"), GROUP_CONVEX, ids=[c[0] for c in GROUP_CONVEX])
def test_a_convex_group_objective_takes_one_start_and_agrees_with_the_seeded_starts(name, params, kind, g,
                                                                                    monkeypatch):
    task, proved = group_solve(name, params, kind, g, seed=7)
    assert proved.certified and proved.unique and "by convexity" in proved.method
    monkeypatch.setattr(convexity, "group_certificate", lambda *args, **kwargs: None)
    _, started = group_solve(name, params, kind, g, seed=7)
    assert started.unique and "3 seeded starts" in started.method
    policy = task.policy_from_logratios
    assert 0.5 * np.abs(policy(proved.logratios) - policy(started.logratios)).sum(axis=1).max() <= 1e-8


@pytest.mark.parametrize(("name", "params", "kind", "g"), GROUP_CONVEX, ids=[c[0] for c in GROUP_CONVEX])
def test_the_declared_group_objectives_are_convex_in_the_log_probabilities(name, params, kind, g):
    # the premise, by torch's Hessian of the objective's own population loss at random log-probabilities
    from polopt.losses import registry
    from toy_tasks.exact.groups import _Population, _prompt_groups
    from toy_tasks.finite.feedback import population_groups

    task = random_task(8)
    objective = registry.as_group_objective(registry.resolve(name, **params))
    groups = _prompt_groups(population_groups(task, kind, g), 0)
    problem = _Population(objective, groups, np.log(task.reference[:1]), task.lengths[:1], 0.7)
    rng = np.random.default_rng(1)
    for _ in range(4):
        point = torch.as_tensor(np.log(task.reference[:1]) + 2.0 * rng.standard_normal(task.reference[:1].shape))
        hessian = torch.autograd.functional.hessian(lambda lp: problem.loss_at(lp.reshape(1, -1)), point.reshape(-1))
        eigenvalues = torch.linalg.eigvalsh(hessian)
        assert float(eigenvalues.min()) >= -1e-10 * max(1.0, float(eigenvalues.abs().max()))


def test_no_group_proof_for_an_objective_not_declared_convex():
    # DiscoPOP (Lu et al. 2024) blends a logistic and an exponential loss through a sigmoid gate: not convex
    _, optimum = group_solve("logistic_exponential_blend", {}, "pairs", 2, seed=9)
    assert "by convexity" not in optimum.method
