"""Exact optima of finite tasks against published closed forms and independent solvers."""

from unittest import mock

import numpy as np
import pytest
import scipy.optimize
import scipy.special

from polopt import losses
from toy_tasks import families
from toy_tasks.exact import margin as margin_solver
from toy_tasks.exact.margin import GRADIENT_TOLERANCE, population_loss, smoothed_weights, solve
from toy_tasks.finite.task import make_task


def centred(h):
    return h - h.mean(axis=1, keepdims=True)


def random_task(seed, k, kind):
    rng = np.random.default_rng(seed)
    reference = rng.dirichlet(np.ones(k))
    if kind == "bt":
        return make_task(reference, rewards=rng.normal(0.0, 1.5, k))
    upper = rng.random((k, k))
    pref = np.triu(upper, 1) + np.triu(1.0 - upper, 1).T + 0.5 * np.eye(k)
    return make_task(reference, pref)


def newton(loss, task, beta):
    # no task extras and no per-pair closed form: Newton from h = 0
    with mock.patch.object(margin_solver, "_per_pair_star", lambda *args: None):
        return solve(loss, task.win_weights(), beta=beta)


@pytest.mark.parametrize("seed", range(3))
@pytest.mark.parametrize("beta", [0.1, 1.0])
def test_logistic_on_bradley_terry_is_r_over_beta(seed, beta):
    # Rafailov et al. 2023: the KL-regularised optimum pi* ∝ pi_ref e^{r / beta}
    task = random_task(seed, 8, "bt")
    opt = newton(losses.resolve_margin("logistic"), task, beta)
    np.testing.assert_allclose(opt.logratios, centred(task.rewards / beta), atol=1e-7)
    assert opt.residual < 1e-9


@pytest.mark.parametrize("task", [families.bradley_terry(), families.nontransitive(), random_task(4, 9, "P"),
                                  families.contextual()], ids=["bt", "cycle", "random", "contextual"])
@pytest.mark.parametrize("beta", [0.2, 2.0])
def test_squared_is_the_ipo_optimum_on_any_preference(task, beta):
    # Azar et al. 2023: h_i = (2 / beta) p(i > mu) + c, with p(i > mu) = sum_j mu_j P[i, j]
    opt = newton(losses.resolve_margin("squared"), task, beta)
    ipo = (2.0 / beta) * np.einsum("xj,xij->xi", task.sampling, task.preference)
    np.testing.assert_allclose(opt.logratios, centred(ipo), atol=1e-7)


def test_exponential_on_bradley_terry_is_r_over_two_beta():
    # Tang et al. 2024: the exponential loss's per-pair optimum is logit(p) / 2, so on Bradley–Terry
    # every pair is at its optimum with h = r / (2 beta)
    task = random_task(7, 6, "bt")
    opt = newton(losses.resolve_margin("exponential"), task, 0.5)
    np.testing.assert_allclose(opt.logratios, centred(task.rewards / 1.0), atol=1e-7)


@pytest.mark.parametrize(("name", "scale"), [("logistic", 1.0), ("exponential", 0.5), ("savage", 1.0)])
def test_per_pair_optima_on_bradley_terry_are_a_closed_form(name, scale):
    # Tang et al. 2024: per-pair optima x*(p) = logit p (logistic, Savage) and logit(p) / 2 (exponential); on
    # Bradley–Terry preferences p_ij = sigma(r_i - r_j), so beta (h_i - h_j) = scale (r_i - r_j) puts every pair at
    # its own optimum at once: the global minimum of L, convex loss or not
    task = random_task(11, 7, "bt")
    w = task.win_weights()
    opt = solve(losses.resolve_margin(name), w, beta=0.4)
    assert opt.method.startswith("closed form: every response's log-ratio from its per-pair optimum")
    margins = 0.4 * (opt.logratios[0][:, None] - opt.logratios[0][None, :])  # (K, K)
    p = w[0] / (w[0] + w[0].T + np.eye(7))
    off = ~np.eye(7, dtype=bool)
    np.testing.assert_allclose(margins[off], scale * scipy.special.logit(p[off]), atol=1e-9)
    by_newton = newton(losses.resolve_margin(name), task, 0.4)
    np.testing.assert_allclose(opt.logratios, by_newton.logratios, atol=1e-7)
    assert opt.unique == (name != "savage")  # the Savage loss is not convex: its answer is a certified stationary point


@pytest.mark.parametrize("name", ["huber", "truncated_quadratic"])
def test_an_inconsistent_per_pair_start_still_ends_at_the_newton_optimum(name):
    # their per-pair optima (2p - 1 and its Huber variant) are not additive on Bradley–Terry preferences:
    # the candidate fails its residual and Newton starts from it instead of h = 0
    task = random_task(12, 7, "bt")
    opt = solve(losses.resolve_margin(name), task.win_weights(), beta=0.4)
    assert opt.method.startswith("Newton")
    np.testing.assert_allclose(opt.logratios, newton(losses.resolve_margin(name), task, 0.4).logratios, atol=1e-8)


def test_closed_forms_are_used_and_agree_with_newton():
    task = families.bradley_terry()
    extras = dict(rewards=task.rewards, sampling=task.sampling, preference=task.preference, population=True)
    for name in ("logistic", "squared"):
        closed = solve(losses.resolve_margin(name), task.win_weights(), beta=0.3, **extras)
        assert closed.method.startswith("closed form")
        by_newton = newton(losses.resolve_margin(name), task, 0.3)
        np.testing.assert_allclose(closed.logratios, by_newton.logratios, atol=1e-7)


@pytest.mark.parametrize("name", ["huber", "truncated_quadratic", "exponential", "savage"])
def test_newton_agrees_with_scipy_bfgs(name):
    # an independent minimiser on the same population loss, gauge fixed by h_0 = 0
    task = random_task(11, 5, "P")
    loss, beta, w = losses.resolve_margin(name), 0.7, task.win_weights()
    opt = newton(loss, task, beta)

    def objective(free):
        return population_loss(loss, w, np.concatenate([[0.0], free])[None], beta=beta)

    bfgs = scipy.optimize.minimize(objective, np.zeros(4), method="BFGS", options={"gtol": 1e-11})
    assert opt.value == pytest.approx(bfgs.fun, abs=1e-9)
    np.testing.assert_allclose(opt.logratios[0], centred(np.concatenate([[0.0], bfgs.x])[None])[0], atol=1e-4)
    assert opt.residual < GRADIENT_TOLERANCE * 10


def test_truncated_quadratic_equals_ipo_when_margins_stay_below_one():
    # docs/maths.md: truncated quadratic = squared wherever every IPO margin beta * d is at most 1
    task = families.noisy_labels(flip_rate=0.3)
    sq = newton(losses.resolve_margin("squared"), task, 1.0)
    margins = sq.logratios[0][:, None] - sq.logratios[0][None, :]
    assert margins.max() <= 1.0
    np.testing.assert_allclose(newton(losses.resolve_margin("truncated_quadratic"), task, 1.0).logratios, sq.logratios,
                               atol=1e-7)


def test_hinge_two_responses_by_hand():
    # K = 2, W = (w, 1 - w) with w > 1/2: L(d) = w max(0, 1 - beta d) + (1 - w) max(0, 1 + beta d),
    # minimised at beta d = 1 with value 2 (1 - w)
    w = np.array([[[0.0, 0.7], [0.3, 0.0]]])
    opt = solve(losses.resolve_margin("hinge"), w, beta=0.5)
    assert opt.value == pytest.approx(0.6)
    assert 0.5 * (opt.logratios[0, 0] - opt.logratios[0, 1]) == pytest.approx(1.0)
    assert opt.unique is False


@pytest.mark.parametrize("seed", range(3))
def test_hinge_lp_matches_a_subgradient_free_reference(seed):
    # the hinge optimum from scipy's HiGHS equals the optimum of the same LP written densely and solved
    # by scipy's interior-point HiGHS variant: two solvers, one convex programme
    task = random_task(seed, 5, "P")
    w = task.win_weights()[0]
    opt = solve(losses.resolve_margin("hinge"), w[None], beta=1.0)
    pairs = np.argwhere(w > 0)
    k, e = 5, len(pairs)
    a = np.zeros((e, k + e))
    for n, (i, j) in enumerate(pairs):
        a[n, i], a[n, j], a[n, k + n] = -1.0, 1.0, -1.0
    c = np.concatenate([np.zeros(k), w[pairs[:, 0], pairs[:, 1]]])
    ref = scipy.optimize.linprog(c, A_ub=a, b_ub=-np.ones(e), bounds=[(0, 0)] + [(None, None)] * (k - 1)
                                 + [(0, None)] * e, method="highs-ipm")
    assert opt.value == pytest.approx(ref.fun, abs=1e-9)


@pytest.mark.parametrize("seed", range(3))
def test_the_hinge_is_solved_by_its_dual_circulation_and_certified_by_the_gap(seed):
    # LP duality (Bertsimas and Tsitsiklis 1997, ch. 4): the circulation's value equals the primal optimum;
    # the primal, solved as written (margin._hinge_lp), gives the same value, and the gap is reported
    task = random_task(10 + seed, 7, "P")
    w = task.win_weights()[0]
    loss = losses.resolve_margin("hinge")
    h, gap = margin_solver._hinge_by_circulation(loss, w, 0.8, margin_solver.weak_components(w))
    primal = margin_solver._hinge_lp(w, 0.8, margin_solver.weak_components(w))
    assert gap is not None and gap <= 1e-9
    assert population_loss(loss, w[None], h[None], beta=0.8) == pytest.approx(
        population_loss(loss, w[None], primal[None], beta=0.8), abs=1e-9)
    opt = solve(loss, w[None], beta=0.8)
    assert "maximum circulation" in opt.method and any("duality gap" in note for note in opt.notes)


def test_logistic_on_deterministic_preferences_has_no_finite_optimum():
    # Azar et al. 2023, section 4.2; Ford 1957: the win graph of a total order is not strongly connected
    task = families.deterministic(n_responses=4)
    opt = newton(losses.resolve_margin("logistic"), task, 0.5)
    assert opt.finite is False and opt.logratios is None
    assert opt.value == pytest.approx(0.0)  # every pair's loss can be driven to 0
    assert opt.limit_support == [[0]]  # the response that is never beaten takes all the mass


@pytest.mark.parametrize("name", ["squared", "hinge", "huber", "truncated_quadratic"])
def test_losses_with_a_finite_pair_optimum_stay_finite_on_deterministic_preferences(name):
    assert newton(losses.resolve_margin(name), families.deterministic(n_responses=4), 0.5).finite


def test_deterministic_cycle_is_strongly_connected_and_has_a_finite_optimum():
    # docs/maths.md: a deterministic but cyclic P is strongly connected, so logistic has a finite optimum
    cycle = [[0.5, 1.0, 0.0], [0.0, 0.5, 1.0], [1.0, 0.0, 0.5]]
    opt = newton(losses.resolve_margin("logistic"), make_task([1 / 3, 1 / 3, 1 / 3], cycle), 1.0)
    assert opt.finite
    np.testing.assert_allclose(opt.logratios, 0.0, atol=1e-8)  # by symmetry the uniform policy


def test_partial_order_infimum_keeps_the_finite_part():
    # responses {0, 1} beat each other at random, both always beat 2: the infimum is the {0, 1} subproblem
    pref = [[0.5, 0.6, 1.0], [0.4, 0.5, 1.0], [0.0, 0.0, 0.5]]
    task = make_task([0.4, 0.4, 0.2], pref)
    loss, w = losses.resolve_margin("logistic"), task.win_weights()
    opt = newton(loss, task, 1.0)
    assert opt.finite is False and opt.limit_support == [[0, 1]]
    sub = w[:, :2, :2]
    d = scipy.special.logit(sub[0, 0, 1] / (sub[0, 0, 1] + sub[0, 1, 0]))  # the logistic per-pair optimum
    expected = sub[0, 0, 1] * np.log1p(np.exp(-d)) + sub[0, 1, 0] * np.log1p(np.exp(d))
    assert opt.value == pytest.approx(expected, rel=1e-9)


def test_smoothing_is_a_change_of_weights():
    task = families.deterministic(n_responses=3)
    w = smoothed_weights(task.win_weights(), 0.1)
    h = np.array([[0.4, -0.2, 0.1]])
    f = losses.resolve_margin("logistic")
    import torch

    d = 2.0 * (h[0][:, None] - h[0][None, :])
    raw = task.win_weights()[0]
    x = torch.as_tensor(d)
    direct = float((raw * (0.9 * f(x) + 0.1 * f(-x)).numpy()).sum())
    assert population_loss(f, w, h, beta=2.0) == pytest.approx(direct)
    # with smoothing every pair is contested, so logistic has a finite optimum again
    assert solve(f, w, beta=2.0).finite


def test_disconnected_responses_are_reported_and_aligned():
    w = np.zeros((1, 4, 4))
    w[0, 0, 1], w[0, 1, 0], w[0, 2, 3], w[0, 3, 2] = 0.3, 0.2, 0.3, 0.2  # two separate pairs
    opt = solve(losses.resolve_margin("squared"), w, beta=1.0)
    assert any("not connected" in n for n in opt.notes)
    h = np.array([[5.0, 4.0, -1.0, 3.0]])
    aligned = opt.aligned_to(h)
    assert aligned[0, :2].mean() == pytest.approx(4.5) and aligned[0, 2:].mean() == pytest.approx(1.0)
