"""Tests of polopt.testing, the assertions users put in their own test suites.

The helper must pass on sound losses (the built-ins, whose exact optima come from
the DPO and IPO closed forms or the exact solver) and raise AssertionError, with a
message saying what was expected and what was reached, on broken ones.
"""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F

from polopt.testing import assert_reaches_optimum, assert_sound_loss
from toy_tasks import families


def test_passes_on_logistic_with_the_dpo_optimum():
    task = families.bradley_terry(n_responses=4, seed=1)
    facts = assert_reaches_optimum("logistic", task, beta=0.5, tol=1e-6, steps=1000)
    # the exact optimum here is the closed form pi* ∝ pi_ref e^{r / beta} (Rafailov et al. 2023)
    r = torch.as_tensor(task.rewards[0])
    expected = torch.softmax(torch.log(torch.as_tensor(task.reference[0])) + r / 0.5, 0)
    assert torch.allclose(torch.as_tensor(facts["optimum"][0], dtype=torch.float64), expected, atol=1e-9)
    assert facts["tv_to_optimum"] <= 1e-6


def test_passes_on_a_users_callable():
    def softsquare(x):
        return F.softplus(1.0 - x) ** 2

    facts = assert_reaches_optimum(softsquare, families.noisy_labels(n_responses=4), beta=0.5, tol=1e-4, steps=1000)
    assert facts["optimum_finite"] is True


def test_passes_where_no_finite_optimum_exists():
    # logistic on deterministic labels: margins grow without bound (Azar et al. 2023, 4.2)
    facts = assert_reaches_optimum("logistic", families.deterministic(n_responses=4), beta=0.5, steps=500)
    assert facts["optimum_finite"] is False and facts["limit_mass"][0] > facts["limit_mass_reference"][0]


def test_fails_on_a_sign_error_with_what_was_expected():
    with pytest.raises(AssertionError, match=r"expected the trained policy within tol=0.001 of the exact optimum "
                                             r".*prefers the losers"):
        assert_reaches_optimum(lambda x: F.softplus(x), families.bradley_terry(n_responses=4), steps=300)


def test_fails_on_a_loss_with_no_signal():
    with pytest.raises(AssertionError, match="did not move from the reference"):
        assert_reaches_optimum(lambda x: x**2, families.noisy_labels(n_responses=4), steps=100)


def test_fails_when_training_stops_short_of_the_optimum():
    with pytest.raises(AssertionError, match=r"did not reach the exact optimum: TV to the exact optimum .* > 1e-06"):
        assert_reaches_optimum("squared", families.noisy_labels(n_responses=4), tol=1e-6, steps=5)


@pytest.mark.parametrize("name", ["logistic", "squared", "hinge", "savage"])
def test_sound_loss_passes_on_builtins(name):
    assert_sound_loss(name)  # savage is not convex: a warning, which does not fail


def test_sound_loss_fails_with_the_reason():
    with pytest.raises(AssertionError, match=r"signal: sign error: f'\(0\) = 0.5 > 0"):
        assert_sound_loss(lambda x: F.softplus(x))
    with pytest.raises(AssertionError, match="elementwise: not elementwise"):
        assert_sound_loss(lambda x: F.softplus(-(x - x.mean())))
