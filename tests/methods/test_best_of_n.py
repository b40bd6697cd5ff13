"""Best-of-n of the reference (toy_tasks.methods.best_of_n, polopt.methods.distill).

Checks against: brute-force enumeration of all K^n draws (itertools, derived by
hand: the kept response is the first drawn among the maxima); Monte-Carlo draws
with numpy (per-entry tolerance of 5 binomial standard deviations from the
sample size); the continuous-reward KL log n - (n-1)/n as an expectation under
scipy.stats.beta(n, 1) (F(Y) ~ Beta(n, 1) under best-of-n); the upper bound of
Beirami et al., Theoretical guarantees on the best-of-n alignment policy, 2024.
"""

import itertools

import numpy as np
import pytest
import scipy.stats
import torch

from polopt.methods.distill import empirical_distribution, sample_best_of_n
from polopt.methods.environment import FiniteEnvironment
from toy_tasks.families import bradley_terry
from toy_tasks.methods.best_of_n import best_of_n_distribution, kl_formula, kl_to_reference


def enumerate_best_of_n(reference, rewards, n):
    """Every sequence of n draws with its probability; keep the first drawn of the maxima."""
    out = np.zeros(len(reference))
    for draws in itertools.product(range(len(reference)), repeat=n):
        best = max(draws, key=lambda y: rewards[y])  # max() returns the first maximal element
        out[best] += np.prod(reference[list(draws)])
    return out


@pytest.mark.parametrize("rewards", [[0.3, -1.0, 2.0, 0.5], [1.0, 1.0, 0.0, 2.0], [0.0, 0.0, 0.0, 0.0],
                                     [1.0, 2.0, 1.0, 2.0]])
@pytest.mark.parametrize("n", [1, 2, 3, 4])
def test_matches_enumeration_of_all_draws_with_and_without_ties(rewards, n):
    reference = np.array([0.1, 0.4, 0.2, 0.3])
    np.testing.assert_allclose(best_of_n_distribution(reference, np.array(rewards), n),
                               enumerate_best_of_n(reference, rewards, n), atol=1e-12)


def test_n_equal_one_is_the_reference():
    task = bradley_terry(n_responses=7, seed=4)
    np.testing.assert_allclose(best_of_n_distribution(task.reference, task.rewards, 1), task.reference, atol=1e-15)


@pytest.mark.parametrize("seed", range(3))
def test_matches_monte_carlo_draws(seed):
    rng = np.random.default_rng(seed)
    k, n, size = 6, int(rng.integers(2, 9)), 200_000
    reference = rng.dirichlet(np.ones(k))
    rewards = rng.integers(0, 3, size=k).astype(float)  # few levels: ties are common
    draws = rng.choice(k, size=(size, n), p=reference)
    kept = draws[np.arange(size), np.argmax(rewards[draws], axis=1)]  # argmax: the first maximum
    estimate = np.bincount(kept, minlength=k) / size
    exact = best_of_n_distribution(reference, rewards, n)
    tolerance = 5 * np.sqrt(exact * (1 - exact) / size) + 1 / size
    assert np.all(np.abs(estimate - exact) <= tolerance)


def test_the_torch_sampler_matches_the_exact_distribution():
    task = bradley_terry(n_responses=5, seed=2)
    rewards = np.round(task.rewards, 0)  # coarse rewards: ties
    env = FiniteEnvironment(torch.as_tensor(np.log(task.reference)), torch.ones(1, dtype=torch.float64),
                            rewards=torch.as_tensor(rewards))
    size = 100_000
    estimate = empirical_distribution(sample_best_of_n(env, 3, size, torch.Generator().manual_seed(0)), 5)[0].numpy()
    exact = best_of_n_distribution(task.reference, rewards, 3)[0]
    assert np.all(np.abs(estimate - exact) <= 5 * np.sqrt(exact * (1 - exact) / size) + 1 / size)


@pytest.mark.parametrize("n", [1, 2, 4, 16, 64])
def test_continuous_reward_kl_formula(n):
    expected = scipy.stats.beta(n, 1).expect(lambda u: np.log(n) + (n - 1) * np.log(u))
    assert kl_formula(n) == pytest.approx(expected, abs=1e-10)


@pytest.mark.parametrize("n", [2, 4, 16])
def test_kl_is_below_the_formula_and_approaches_it_for_fine_grained_rewards(n):
    rng = np.random.default_rng(n)
    for k in (3, 10, 100):
        reference, rewards = rng.dirichlet(np.ones(k)), rng.standard_normal(k)
        assert kl_to_reference(reference, rewards, n) <= kl_formula(n) + 1e-12  # Beirami et al. 2024
    fine = np.full(4000, 1 / 4000)  # every response has reference mass 1/4000
    gap = kl_formula(n) - kl_to_reference(fine, rng.standard_normal(4000), n)
    assert 0 <= gap < 1e-3


def test_n_must_be_a_positive_integer():
    with pytest.raises(ValueError, match=r"method.n \(the number of draws of best-of-n\) must be an integer >= 1, "
                                         r"got 0"):
        best_of_n_distribution(np.full(2, 0.5), np.zeros(2), 0)


def test_distillation_reaches_the_best_of_n_distribution(run_method):
    task = bradley_terry(n_responses=6, seed=1)
    view, policy, _ = run_method(task, "best_of_n", n=4, steps=800, lr=0.1)
    with torch.no_grad():
        pi = policy.log_distribution().exp().numpy()
    exact = best_of_n_distribution(task.reference, task.rewards, 4)
    assert 0.5 * np.abs(pi - exact).sum() < 1e-3
