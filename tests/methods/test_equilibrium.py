"""The Nash equilibrium of the regularised preference game (toy_tasks.methods.equilibrium).

Checks against: the game's definition in Munos et al., Nash Learning from Human
Feedback, 2023 (a saddle point of P(pi > pi') - tau KL(pi) + tau KL(pi')); the
symmetry argument (a symmetric cycle with a uniform reference has the uniform
equilibrium, since then P(y > uniform) = 1/2 for every y); IPO's closed form
(Azar et al. 2023) as computed by toy_tasks.exact.margin; scipy's optimiser for the
duality gap.
"""

import numpy as np
import pytest
import scipy.optimize
import scipy.special

from polopt import losses
from toy_tasks.exact.margin import solve
from toy_tasks.families import nontransitive
from toy_tasks.finite.task import make_task
from toy_tasks.methods.equilibrium import best_response, duality_gap, nash_equilibrium, tau_of_beta


def random_preference(rng, k):
    """A random P with P + P^T = 1 and P[i, i] = 1/2."""
    upper = np.triu(rng.random((k, k)), 1)
    return upper + np.tril(1.0 - upper.T, -1) + 0.5 * np.eye(k)


def payoff(p, q, reference, preference, tau):
    """f(p, q) = p^T P q - tau KL(p || ref) + tau KL(q || ref): the game of Munos et al. 2023."""
    kl = lambda a: scipy.special.rel_entr(a, reference).sum()  # noqa: E731
    return p @ preference @ q - tau * kl(p) + tau * kl(q)


@pytest.mark.parametrize("tau", [0.05, 0.25, 1.0])
def test_symmetric_cycle_with_uniform_reference_has_the_uniform_equilibrium(tau):
    rock_paper_scissors = np.array([[0.5, 1.0, 0.0], [0.0, 0.5, 1.0], [1.0, 0.0, 0.5]])
    for preference in (rock_paper_scissors, nontransitive(uniform_reference=True).preference[0]):
        eq = nash_equilibrium(np.full(3, 1 / 3), preference, tau=tau)
        np.testing.assert_allclose(eq.policy[0], np.full(3, 1 / 3), atol=1e-12)


@pytest.mark.parametrize("seed", range(4))
def test_random_instances_are_fixed_points_and_saddle_points(seed):
    rng = np.random.default_rng(seed)
    k = int(rng.integers(2, 8))
    reference, preference, tau = rng.dirichlet(np.ones(k)), random_preference(rng, k), float(rng.uniform(0.05, 2))
    eq = nash_equilibrium(reference, preference, tau=tau)
    pi = eq.policy[0]
    assert eq.gap < 1e-12
    np.testing.assert_allclose(best_response(eq.policy, reference[None], preference[None], tau)[0], pi, atol=1e-10)
    value = payoff(pi, pi, reference, preference, tau)
    for q in rng.dirichlet(np.ones(k), size=50):  # no unilateral deviation pays (Munos et al. 2023)
        assert payoff(q, pi, reference, preference, tau) <= value + 1e-12
        assert payoff(pi, q, reference, preference, tau) >= value - 1e-12


def test_duality_gap_matches_a_numerical_max_min():
    rng = np.random.default_rng(7)
    k, tau = 4, 0.3
    reference, preference = rng.dirichlet(np.ones(k)), random_preference(rng, k)
    pi = rng.dirichlet(np.ones(k))

    def best(sign, fix_first):
        def objective(z):
            q = scipy.special.softmax(z)
            return -sign * (payoff(q, pi, reference, preference, tau) if fix_first
                            else payoff(pi, q, reference, preference, tau))
        return -sign * scipy.optimize.minimize(objective, np.zeros(k), method="BFGS", options={"gtol": 1e-10}).fun

    numerical = best(+1, True) - best(-1, False)  # max_q f(q, pi) - min_q f(pi, q)
    assert duality_gap(pi[None], reference[None], preference[None], tau)[0] == pytest.approx(numerical, abs=1e-8)


def test_tau_is_half_beta_for_the_squared_loss():
    """Against a fixed sampling distribution mu, IPO's optimum (toy_tasks.exact.margin's closed form, Azar et al. 2023)
    is the regularised best response to mu at tau = beta / 2."""
    rng = np.random.default_rng(3)
    k, beta = 5, 0.7
    reference, mu, preference = rng.dirichlet(np.ones(k)), rng.dirichlet(np.ones(k)), random_preference(rng, k)
    task = make_task(reference, preference, sampling=mu)
    optimum = solve(losses.resolve_margin("squared"), task.win_weights(), beta=beta, sampling=task.sampling,
                    preference=task.preference, population=True)
    ipo = task.policy_from_logratios(optimum.logratios)
    np.testing.assert_allclose(best_response(mu[None], reference[None], preference[None], tau_of_beta(beta)), ipo,
                               atol=1e-12)


def test_tau_must_be_positive():
    with pytest.raises(ValueError, match=r"tau must be > 0, got 0"):
        nash_equilibrium(np.full(3, 1 / 3), np.full((3, 3), 0.5), tau=0)
