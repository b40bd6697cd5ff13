"""Tests of polopt.testing, the assertions users put in their own test suites.

The helper must pass on sound losses (the built-ins, whose exact optima come from
the DPO and IPO closed forms or the exact solver) and raise AssertionError, with a
message saying what was expected and what was reached, on broken ones.
"""

from __future__ import annotations

import math

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


def test_a_sign_error_reaches_its_own_optimum_and_fails_the_sound_loss_check():
    """The population check judges against the certified optimum (issue 25: a heuristic about where the
    optimum ought to be may only warn): log(1 + e^x) has a finite optimum that favours the losers, and
    training reaches it, so assert_reaches_optimum holds; the sign error itself is what assert_sound_loss
    catches (f'(0) = +1/2 > 0, by hand)."""
    def flipped(x):
        return F.softplus(x)

    facts = assert_reaches_optimum(flipped, families.bradley_terry(n_responses=4), steps=300)
    assert facts["tv_to_optimum"] <= 1e-3 and facts["mean_margin"] < 0
    with pytest.raises(AssertionError, match=r"signal: sign error: f'\(0\) = 0.5 > 0"):
        assert_sound_loss(flipped)


def test_a_loss_with_no_signal_stays_at_its_optimum_the_reference_and_fails_the_sound_loss_check():
    """x^2 is minimised by every margin 0: the reference is its certified optimum, so training that stays
    there reaches it; f'(0) = 0 is the defect, and assert_sound_loss names it."""
    def no_signal(x):
        return x**2

    facts = assert_reaches_optimum(no_signal, families.noisy_labels(n_responses=4), steps=100)
    assert facts["tv_to_optimum"] <= 1e-3
    with pytest.raises(AssertionError, match=r"no preference signal: f'\(0\) = 0"):
        assert_sound_loss(no_signal)


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


def test_a_sound_anchored_objective_is_not_failed_where_its_certified_optimum_is_the_reference():
    """Issue 25's case: the logistic margin loss plus 0.5 * relu(-h_w), an anchor with a kink at the
    reference. On the nontransitive task (a symmetric cycle, uniform reference) the net win weight of
    every response is 0, and at the reference the anchor's one-sided slope (0.5 per unit of mass taken
    from a winner) outweighs what the cycle's margins can gain, so the certified optimum is the reference
    itself with loss log 2 (derived by hand: every margin 0 gives softplus(0) = log 2). Training stays
    there; the population check must not fail it."""
    def anchored(pair, beta):
        rho = pair.logratio_winner - pair.logratio_loser
        return F.softplus(-beta * rho) + 0.5 * torch.relu(-pair.logratio_winner)

    facts = assert_reaches_optimum(anchored, families.nontransitive(), beta=0.5, steps=300)
    assert facts["tv_to_optimum"] <= 1e-3
    assert facts["optimum_value"] == pytest.approx(math.log(2.0), abs=1e-9)
