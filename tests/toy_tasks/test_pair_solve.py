"""The exact optimum of pair objectives on finite tasks (toy_tasks.exact.pairs).

What each check is held against, outside the solver:
- an independent solve written here: scipy's L-BFGS-B on all softmax logits of the task at once, with
  the population loss assembled here from dense (X, K, K) tensors and torch gradients (the solver
  under test works prompt by prompt with damped Newton and exact Hessians);
- closed forms from the papers: DPO's pi* ∝ pi_ref e^{r / beta} (Rafailov et al., Direct Preference
  Optimization, 2023) and the divergence family's f'(pi / pi_ref) = r / beta + c on Bradley–Terry
  preferences (Wang et al., Beyond Reverse KL, 2023);
- the margin solver of toy_tasks.exact.margin (closed forms, Newton, Ford's existence condition: Ford,
  Solution of a ranking problem from binary comparisons, 1957) for margin losses as pair objectives;
- derivations written beside the boundary cases.
"""

import numpy as np
import pytest
import scipy.optimize
import scipy.special
import torch
import user_objectives as user
from helpers_exact import independent_policy, random_task

from polopt import losses
from polopt.losses.pair import PairScores
from toy_tasks.exact.margin import solve
from toy_tasks.exact.pairs import divergence_optimum, exact_optimum, margin_objective, solve_pairs
from toy_tasks.families import deterministic

OBJECTIVES = {
    "reverse_kl": user.reverse_kl,
    "forward_kl": user.forward_kl,
    "jensen_shannon": user.jensen_shannon,
    "alpha_divergence": user.alpha_divergence,
    "length_normalised_reference_free": user.length_normalised_reference_free,
    "winner_anchored": user.winner_anchored,
    "logistic_with_winner_likelihood": user.logistic_with_winner_likelihood,
    "squared margin": margin_objective(losses.resolve_margin("squared")),
    "exponential margin": margin_objective(losses.resolve_margin("exponential")),
}
DIVERGENCES = ["reverse_kl", "forward_kl", "jensen_shannon", "alpha_divergence"]
SMOOTH_BUILTINS = [n for n in losses.names("pair") if n != "winner_anchored"]  # its max(0, .) kink: tested apart


def reported_policy(optimum, task) -> np.ndarray:
    return task.policy_from_logratios(optimum.logratios)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
@pytest.mark.parametrize("name", list(OBJECTIVES) + SMOOTH_BUILTINS)
def test_reported_optimum_matches_an_independent_solve(name, seed):
    task = random_task(seed, bradley_terry=seed % 2 == 0)
    objective = OBJECTIVES[name] if name in OBJECTIVES else losses.resolve(name)
    optimum = solve_pairs(objective, task.win_weights(), task.reference, task.lengths, beta=0.7,
                          rewards=task.rewards, population=True)
    assert optimum.finite and optimum.unique
    assert optimum.residual <= 1e-8
    np.testing.assert_allclose(reported_policy(optimum, task), independent_policy(objective, task, 0.7),
                               atol=1e-6, rtol=0)


def test_the_certificate_is_the_projected_gradient_on_the_simplex():
    # derivation: with g = dL/dpi at an interior stationary point, g_i = lambda for every i (Lagrange),
    # so pi_i (g_i - sum_j pi_j g_j) = 0; computed here from L as a function of pi itself
    task = random_task(5, bradley_terry=False)
    objective = user.length_normalised_reference_free
    optimum = solve_pairs(objective, task.win_weights(), task.reference, task.lengths, beta=0.7)
    pi = torch.as_tensor(reported_policy(optimum, task)).requires_grad_(True)
    w = torch.as_tensor(task.win_weights())
    x, i, j = torch.nonzero(w > 0, as_tuple=True)
    log_ref, n = torch.as_tensor(np.log(task.reference)), torch.as_tensor(task.lengths)
    log_pi = torch.log(pi)
    value = (w[x, i, j] * objective(PairScores(log_pi[x, i], log_pi[x, j], log_ref[x, i], log_ref[x, j],
                                               n[x, i], n[x, j]), 0.7)).sum()
    (g,) = torch.autograd.grad(value, pi)
    projected = pi * (g - (pi * g).sum(dim=1, keepdim=True))
    assert float(projected.detach().abs().max()) <= 1e-8
    assert optimum.value == pytest.approx(float(value.detach()), rel=1e-12)


@pytest.mark.parametrize("seed", [0, 2, 4])
@pytest.mark.parametrize("name", DIVERGENCES)
def test_divergence_family_closed_form(name, seed):
    # Wang et al., Beyond Reverse KL, 2023: on Bradley–Terry preferences f'(pi / pi_ref) = r / beta + c
    task = random_task(seed)
    objective, beta = OBJECTIVES[name], 0.7
    closed = np.stack([divergence_optimum(objective.ratio_link, task.reference[x], task.rewards[x], beta=beta)
                       for x in range(task.n_prompts)])
    link = objective.ratio_link(torch.as_tensor(closed / task.reference)).numpy()
    offset = link - task.rewards / beta
    np.testing.assert_allclose(offset, offset[:, :1].repeat(task.n_responses, 1), atol=1e-9)
    np.testing.assert_allclose(closed.sum(axis=1), 1.0, atol=1e-12)
    used = solve_pairs(objective, task.win_weights(), task.reference, task.lengths, beta=beta,
                       rewards=task.rewards, population=True)
    assert "Wang et al. 2023" in used.method and used.residual <= 1e-8
    numerical = solve_pairs(objective, task.win_weights(), task.reference, task.lengths, beta=beta)
    assert "Newton" in numerical.method
    np.testing.assert_allclose(reported_policy(numerical, task), closed, atol=1e-6, rtol=0)


def test_reverse_kl_closed_form_is_dpo():
    # Rafailov et al., Direct Preference Optimization, 2023: pi* ∝ pi_ref e^{r / beta}
    task = random_task(7)
    beta = 0.4
    dpo = task.reference * np.exp(task.rewards / beta)
    dpo /= dpo.sum(axis=1, keepdims=True)
    for x in range(task.n_prompts):
        got = divergence_optimum(user.reverse_kl.ratio_link, task.reference[x], task.rewards[x], beta=beta)
        np.testing.assert_allclose(got, dpo[x], rtol=1e-10)


@pytest.mark.parametrize("loss", ["logistic", "squared", "exponential"])
def test_margin_losses_as_pair_objectives_agree_with_the_margin_solver(loss):
    task = random_task(3, bradley_terry=False)
    margin = solve(losses.resolve_margin(loss), task.win_weights(), beta=0.7)
    objective = margin_objective(losses.resolve_margin(loss))
    paired = solve_pairs(objective, task.win_weights(), task.reference, task.lengths,
                         beta=0.7)
    np.testing.assert_allclose(reported_policy(paired, task), reported_policy(margin, task), atol=1e-8)
    assert paired.value == pytest.approx(margin.value, rel=1e-10)


def test_exact_optimum_hands_margin_losses_to_the_margin_solver_unchanged():
    task = random_task(2)
    via = exact_optimum(losses.resolve_margin("logistic"), task.win_weights(), task=task, beta=0.5, population=True)
    direct = solve(losses.resolve_margin("logistic"), task.win_weights(), beta=0.5, rewards=task.rewards,
                   sampling=task.sampling, preference=task.preference, population=True)
    assert via.method == direct.method and "Rafailov" in via.method
    np.testing.assert_array_equal(via.logratios, direct.logratios)


def test_reference_free_objective_on_deterministic_labels_has_no_finite_optimum():
    # derivation: reply 0 beats every other reply and is never beaten. Every term is
    # softplus(-(beta (log pi_w / n_w - log pi_l / n_l) - gamma)): it falls as a loser's probability
    # falls, and reply 0 is never a loser; so L -> 0 as pi_0 -> 1 with the others vanishing (each
    # winner's log-probability falling more slowly than its losers'), and L > 0 at every interior point.
    task = deterministic(n_responses=4, seed=0)
    optimum = solve_pairs(user.length_normalised_reference_free, task.win_weights(), task.reference,
                          task.lengths, beta=0.5)
    assert not optimum.finite and optimum.logratios is None
    assert optimum.limit_support == [[0]]
    assert np.isfinite(optimum.value) and 0.0 <= optimum.value < 1e-6
    assert np.isfinite(optimum.residual)


def test_a_supervised_term_keeps_the_winners_but_not_the_never_winning_reply():
    # derivation: reply 3 only ever loses, so log pi_3 enters only the logistic terms (i, 3), each
    # falling as pi_3 falls; the winners' likelihood term keeps replies 0-2 in the limit.
    task = deterministic(n_responses=4, seed=1)
    optimum = solve_pairs(user.logistic_with_winner_likelihood, task.win_weights(), task.reference, task.lengths,
                          beta=0.5)
    assert not optimum.finite and optimum.limit_support == [[0, 1, 2]]


def test_dpo_as_a_pair_objective_finds_fords_limit_support():
    task = deterministic(n_responses=5, seed=2)
    margin = solve(losses.resolve_margin("logistic"), task.win_weights(), beta=0.5)
    paired = solve_pairs(user.reverse_kl, task.win_weights(), task.reference, task.lengths, beta=0.5)
    assert not margin.finite and not paired.finite
    assert paired.limit_support == margin.limit_support == [[0]]


def test_starts_reveal_a_non_unique_minimiser():
    # two separate comparisons (0 vs 1, 2 vs 3) and a margin-only objective: the mass split between
    # the two pairs does not enter the loss, so seeded starts end at different policies
    w = np.zeros((1, 4, 4))
    w[0, 0, 1], w[0, 1, 0], w[0, 2, 3], w[0, 3, 2] = 0.3, 0.2, 0.3, 0.2
    optimum = solve_pairs(margin_objective(losses.resolve_margin("squared")), w, np.full((1, 4), 0.25), np.ones((1, 4)),
                          beta=1.0)
    assert optimum.finite and not optimum.unique
    assert any("not unique" in note for note in optimum.notes)


def test_an_objective_of_the_wrong_shape_gets_one_line():
    task = random_task(0)
    with pytest.raises(ValueError, match=r"loss 'wrong_shape' returned shape \(\) for a batch of \d+ pairs; a pair "
                                         r"objective must return one loss per pair, shape \(\d+,\)"):
        solve_pairs(user.wrong_shape, task.win_weights(), task.reference, task.lengths, beta=0.5)


def bradley_terry_exponential(task, scores: np.ndarray, beta: float) -> np.ndarray:
    p = np.exp(scores / beta - (scores / beta).max(axis=1, keepdims=True))
    return p / p.sum(axis=1, keepdims=True)


def test_length_regularised_dpo_closed_form():
    # Park et al., Disentangling Length from Quality in DPO, 2024; derivation: every pair's term is
    # -log sigma(beta h_w + alpha n_w - (beta h_l + alpha n_l)), minimised on Bradley–Terry pairs at
    # beta h_i + alpha n_i = r_i + c (the logit of P), so pi* ∝ pi_ref e^{(r - alpha n) / beta}
    task, beta = random_task(6), 0.6
    optimum = solve_pairs(losses.resolve("length_regularised", alpha=0.2), task.win_weights(), task.reference,
                          task.lengths, beta=beta)
    expected = bradley_terry_exponential(task, np.log(task.reference) * beta + task.rewards - 0.2 * task.lengths,
                                         beta)
    np.testing.assert_allclose(reported_policy(optimum, task), expected, atol=1e-8)


def test_reference_free_logistic_closed_form():
    # derivation: the terms -log sigma(beta (log pi_w - log pi_l)) are minimised on Bradley–Terry pairs at
    # beta log pi_i = r_i + c, so pi* ∝ e^{r / beta}: the reference plays no part (CPO's preference term,
    # Xu et al. 2024)
    task, beta = random_task(8), 0.9
    optimum = solve_pairs(losses.resolve("reference_free_logistic"), task.win_weights(), task.reference,
                          task.lengths, beta=beta)
    np.testing.assert_allclose(reported_policy(optimum, task), bradley_terry_exponential(task, task.rewards, beta),
                               atol=1e-8)


@pytest.mark.parametrize("name", ["divergence_forward_kl", "divergence_jensen_shannon", "divergence_alpha",
                                  "chi_squared_link"])
def test_registered_divergences_use_their_closed_form(name):
    # Wang et al. 2023 (f-DPO) and Huang et al. 2024 (chi-PO, link u + log u): f'(pi / pi_ref) - r / beta
    # is the same for every response; the link is written here from each paper's f, not taken from the solver
    links = {"divergence_forward_kl": lambda u: -1.0 / u,
             "divergence_jensen_shannon": lambda u: np.log(2 * u / (1 + u)),
             "divergence_alpha": lambda u: (1.0 - u**-0.5) / 0.5, "chi_squared_link": lambda u: u + np.log(u)}
    task, beta = random_task(4), 0.8
    optimum = solve_pairs(losses.resolve(name), task.win_weights(), task.reference, task.lengths, beta=beta,
                          rewards=task.rewards, population=True)
    assert optimum.method.startswith("closed form") and optimum.residual <= 1e-9
    offset = links[name](reported_policy(optimum, task) / task.reference) - task.rewards / beta
    np.testing.assert_allclose(offset - offset[:, :1], 0.0, atol=1e-8)


def dpop_by_slsqp(task, beta: float, penalty: float) -> np.ndarray:
    """DPO-Positive's optimum by an independent route: the kink max(0, -h_w) becomes a variable s >= 0,
    s >= -h (an epigraph; the loss grows with s, so s = max(0, -h) at the optimum), and the simplex is
    the constraint sum_i pi_ref,i e^{h_i} = 1; scipy's SLSQP on this smooth problem, prompt by prompt."""
    return np.stack([_dpop_prompt(task.win_weights()[x], task.reference[x], beta, penalty)
                     for x in range(task.n_prompts)])


def _dpop_prompt(weights: np.ndarray, ref: np.ndarray, beta: float, penalty: float) -> np.ndarray:
    w, k = torch.as_tensor(weights), len(ref)

    def loss(v):
        v = torch.as_tensor(v, dtype=torch.float64).requires_grad_(True)
        h, s = v[:k], v[k:]
        margin = h[:, None] - h[None, :] - penalty * s[:, None]  # (K, K): winner i, loser j
        value = (w * torch.nn.functional.softplus(-beta * margin)).sum()
        (g,) = torch.autograd.grad(value, v)
        return float(value.detach()), g.numpy()

    constraints = [{"type": "eq", "fun": lambda v: ref @ np.exp(v[:k]) - 1.0,
                    "jac": lambda v: np.concatenate([ref * np.exp(v[:k]), np.zeros(k)])},
                   {"type": "ineq", "fun": lambda v: v[k:] + v[:k],
                    "jac": lambda v: np.hstack([np.eye(k), np.eye(k)])}]
    result = scipy.optimize.minimize(loss, np.zeros(2 * k), jac=True, method="SLSQP", constraints=constraints,
                                     bounds=[(None, None)] * k + [(0.0, None)] * k,
                                     options={"ftol": 1e-16, "maxiter": 2000})
    return ref * np.exp(result.x[:k]) / (ref @ np.exp(result.x[:k]))


@pytest.mark.parametrize(("penalty", "seed"), [(50.0, 0), (2.0, 1), (2.0, 2), (0.5, 3)])
def test_winner_anchored_optimum_at_its_kink(penalty, seed):
    # Pal et al. 2024 (DPO-Positive): the anchor max(0, -h_w) has a kink at the reference, where the
    # optimum often sits; no gradient vanishes there, so the certificate is the steepest descent over
    # every transfer of mass between two responses (one-sided slopes), checked against SLSQP here
    task, beta = random_task(seed, bradley_terry=seed % 2 == 0), 0.7
    objective = losses.resolve("winner_anchored", penalty=penalty)
    optimum = solve_pairs(objective, task.win_weights(), task.reference, task.lengths, beta=beta)
    assert optimum.finite and optimum.residual <= 1e-7
    np.testing.assert_allclose(reported_policy(optimum, task), dpop_by_slsqp(task, beta, penalty), atol=1e-6)


@pytest.mark.parametrize("name", losses.names("pair"))
def test_the_assembled_hessian_is_autograds(name):
    # the solver's Hessian in the logits, assembled pair by pair with the chain rule through log-softmax,
    # against torch.autograd.functional.hessian of the same loss (K backward passes)
    from toy_tasks.exact.pairs import _Prompt

    task = random_task(3, bradley_terry=False)
    problem = _Prompt(losses.resolve(name), task.win_weights()[0], np.log(task.reference[0]), task.lengths[0],
                      0.7)
    z = np.random.default_rng(0).normal(size=task.n_responses)
    full = torch.autograd.functional.hessian(problem.loss, torch.as_tensor(z)).numpy()
    np.testing.assert_allclose(problem.hessian(z), full, atol=1e-12)


@pytest.mark.parametrize("name", losses.names("pair"))
def test_the_pinned_hessian_is_autograds(name):
    # the active-set problem with some responses pinned at the reference (DPO-Positive's kink): the free
    # responses form a softmax chart of their own, so the same chain rule holds on the free block
    from toy_tasks.exact.prompt import PromptLoss

    task = random_task(4, bradley_terry=True)
    problem = PromptLoss(losses.resolve(name), task.win_weights()[0], np.log(task.reference[0]), task.lengths[0],
                         0.7)
    pinned = np.zeros(task.n_responses, dtype=bool)
    pinned[[0, 2]] = True
    reduced = problem.chart(pinned)
    y = np.random.default_rng(1).normal(size=int((~pinned).sum()))
    full = torch.autograd.functional.hessian(reduced.loss, torch.as_tensor(y)).numpy()
    np.testing.assert_allclose(reduced.hessian(y), full, atol=1e-12)


def test_an_answer_the_solver_cannot_certify_says_so(monkeypatch):
    # the same kinked optimum with the kink search failing (as it may from a start far from the kink):
    # Newton stops with a gradient far above the certificate's tolerance, and the answer must say it is
    # no exact target rather than pass for one
    import toy_tasks.exact.pairs as pair_solve

    monkeypatch.setattr(pair_solve, "_kinked", lambda problem, z: None)
    task = random_task(0, bradley_terry=True)
    optimum = solve_pairs(losses.resolve("winner_anchored", penalty=50.0), task.win_weights(), task.reference,
                          task.lengths, beta=0.7)
    assert optimum.residual > 1e-7 and optimum.certified is False
    assert any("not certified" in n and "kink search did not certify" in n for n in optimum.notes)


def test_transfer_slopes_from_one_sided_partials_equal_measured_ones():
    # at the reference every winner sits at the anchor's kink max(0, -h_w) (Pal et al. 2024); the slopes of
    # every transfer of mass, predicted from one-sided partials (per-pair gradients with one argument
    # shifted), against a difference quotient of L along each transfer itself (the one-sided directional
    # derivative, by its definition)
    from toy_tasks.exact.kinks import measured_slope, transfer_slopes
    from toy_tasks.exact.prompt import PromptLoss

    task = random_task(1, bradley_terry=False)
    problem = PromptLoss(losses.resolve("winner_anchored", penalty=2.0), task.win_weights()[0],
                         np.log(task.reference[0]), task.lengths[0], 0.7)
    log_pi = np.log(task.reference[0])
    predicted = transfer_slopes(problem, log_pi)
    k = task.n_responses
    measured = np.array([[measured_slope(problem, log_pi, i, j) if i != j else np.inf for j in range(k)]
                         for i in range(k)])
    np.testing.assert_allclose(predicted, measured, rtol=1e-6, atol=1e-8)
    assert predicted[np.isfinite(predicted)].min() < 0 < predicted[np.isfinite(predicted)].max()  # both sides seen
