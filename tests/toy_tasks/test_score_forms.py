"""The pair objectives' score forms (toy_tasks/exact/scores.py) give the objectives' own losses and derivatives.

Held against: torch autograd over every pair (``PairTerms``: the gradient and Hessian of the objective itself,
three backward passes, scattered onto (K, K)), which shares nothing with the forms' (K, K) formulas but the
objective's definition; and the objectives' per-pair values (``per_pair_losses``).
"""

import numpy as np
import pytest
import torch
import user_objectives as user
from helpers_exact import random_task

from polopt import losses
from polopt.losses.pair import PairLoss, PairScores
from toy_tasks.exact import scores
from toy_tasks.exact.pairs import margin_objective
from toy_tasks.exact.prompt import PairTerms, PromptLoss

BETA = 0.7
OBJECTIVES = {name: losses.resolve(name) for name in losses.builtin_names("pair")}
OBJECTIVES |= {"savage (as a pair loss)": margin_objective(losses.resolve_margin("savage")),
               "chi_squared_link clipped": losses.resolve("chi_squared_link", clip=0.8),
               "plus_winner_nll on length_regularised": losses.resolve("plus_winner_nll", base="length_regularised",
                                                                       per_token=True, weight=0.3),
               "winner_anchored penalty 2": losses.resolve("winner_anchored", penalty=2.0)}
# the pairwise group objectives that are links of the margin, as the group solver hands them to the pair solver
OBJECTIVES |= {f"{name} (group, on pairs)": PairLoss(name, fn.fn, dict(fn.params), fn.source)
               for name, fn in ((n, losses.resolve(n, **p)) for n, p in (
                   ("flip_corrected_logistic", {"flip_rate": 0.2}), ("logistic_exponential_blend", {})))}


def prompt_loss(objective, seed: int = 3) -> PromptLoss:
    task = random_task(seed, bradley_terry=False)
    return PromptLoss(objective, task.win_weights()[0], np.log(task.reference[0]), task.lengths[0], BETA)


def random_log_pi(prompt: PromptLoss, seed: int, spread: float) -> torch.Tensor:
    noise = torch.as_tensor(np.random.default_rng(seed).normal(0.0, spread, prompt.k))
    return torch.log_softmax(prompt.log_ref + noise, 0)


@pytest.mark.parametrize("name", list(OBJECTIVES))
def test_every_builtin_takes_the_dense_path(name):
    assert isinstance(prompt_loss(OBJECTIVES[name]).terms, scores.DenseTerms)


@pytest.mark.parametrize("seed", [0, 1])
@pytest.mark.parametrize("name", list(OBJECTIVES))
def test_dense_derivatives_equal_autograd_over_the_pairs(name, seed):
    # log-ratios within about +-0.4, so that every link argument stays below 20, where torch's softplus turns
    # linear (its documented threshold) and autograd's link' and link'' are off by up to e^-20 (times the scores'
    # slopes, up to beta (1 + penalty) = 35.7 here); the logistic link's derivatives are written out exactly
    prompt = prompt_loss(OBJECTIVES[name])
    log_pi = random_log_pi(prompt, seed, 0.15)
    value, grad, hess = prompt.terms.derivatives(log_pi)
    want_value, want_grad, want_hess = PairTerms(prompt).derivatives(log_pi)
    # the forms regroup each pair's arithmetic (beta h_w - beta h_l for beta (h_w - h_l)): rounding differs
    assert value == pytest.approx(want_value, rel=1e-10)
    assert prompt.value_at(log_pi) == pytest.approx(want_value, rel=1e-10)
    scale = 1.0 + float(want_hess.abs().max())
    torch.testing.assert_close(grad, want_grad, rtol=0, atol=1e-11 * scale)
    torch.testing.assert_close(hess, want_hess, rtol=0, atol=1e-11 * scale)
    for shift in (1e-6, -1e-6):  # the kink search's one-sided partials
        torch.testing.assert_close(prompt.terms.gradient(log_pi, shift), PairTerms(prompt).gradient(log_pi, shift),
                                   rtol=0, atol=1e-11 * scale)


def test_the_forms_give_the_objectives_own_per_pair_values():
    rng = np.random.default_rng(0)
    t = lambda a: torch.as_tensor(a, dtype=torch.float64)  # noqa: E731
    pair = PairScores(t(rng.normal(-4, 2, 50)), t(rng.normal(-4, 2, 50)), t(rng.normal(-4, 1, 50)),
                      t(rng.normal(-4, 1, 50)), t(rng.integers(1, 6, 50)), t(rng.integers(1, 6, 50)))
    for name, objective in OBJECTIVES.items():
        want = losses.reduce.per_pair_losses(objective, pair, beta=BETA)
        torch.testing.assert_close(scores.form_of(objective, BETA).pair_values(pair), want, rtol=1e-10, atol=1e-12,
                                   msg=name)


def test_an_objective_without_a_form_keeps_autograd():
    assert scores.form_of(user.length_normalised_reference_free, BETA) is None
    assert isinstance(prompt_loss(user.length_normalised_reference_free).terms, PairTerms)


def test_a_declared_form_is_used_only_where_it_gives_the_objectives_values():
    # SimPO without its margin (Meng et al. 2024 with gamma = 0), declared by the objective itself
    def simpo(pair, beta):
        return torch.nn.functional.softplus(-beta * (pair.winner / pair.len_winner - pair.loser / pair.len_loser))

    score = lambda a, ref, n: BETA * a / n  # noqa: E731
    simpo.score_form = lambda beta: scores.ScoreForm(scores.Link(), score, score)
    assert isinstance(prompt_loss(simpo).terms, scores.DenseTerms)

    def wrong(pair, beta):  # the same declaration on a different objective: refused by the check, autograd instead
        return torch.nn.functional.softplus(-beta * (pair.winner - pair.loser))

    wrong.score_form = simpo.score_form
    assert isinstance(prompt_loss(wrong).terms, PairTerms)
