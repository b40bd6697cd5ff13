"""Margins, smoothing and reduction (polopt.losses.reduce)."""

import pytest
import torch
from helpers_losses import loss_of_margins, per_pair_of_margins

from polopt import losses
from polopt.losses.reduce import margins, validate_hyperparameters


def test_margin_is_the_difference_of_log_ratios():
    # Rafailov et al. 2023, eq. 7: beta * (log pi(y_w)/pi_ref(y_w) - log pi(y_l)/pi_ref(y_l))
    pw, pl = torch.tensor([-1.0, -2.0]), torch.tensor([-3.0, -0.5])
    rw, rl = torch.tensor([-1.5, -1.0]), torch.tensor([-2.0, -1.0])
    torch.testing.assert_close(margins(pw, pl, rw, rl), torch.tensor([(-1.0 + 1.5) - (-3.0 + 2.0),
                                                                      (-2.0 + 1.0) - (-0.5 + 1.0)]))


def test_logistic_objective_is_minus_log_sigmoid_of_the_scaled_margin():
    rho = torch.linspace(-5, 5, 11, dtype=torch.float64)
    expected = -torch.nn.functional.logsigmoid(0.3 * rho).mean()  # DPO's loss, Rafailov et al. 2023
    torch.testing.assert_close(loss_of_margins(losses.resolve_margin("logistic"), rho, beta=0.3), expected)


def test_label_smoothing_mixes_the_flipped_label():
    # (1 - eps) f(beta rho) + eps f(-beta rho): the label flipped with probability eps (conservative
    # DPO, common practice); beta = 0.7 so that a version dropping beta (or applying it once) fails
    rho = torch.linspace(-2, 2, 5, dtype=torch.float64)
    f = losses.resolve_margin("logistic")
    expected = 0.9 * -torch.nn.functional.logsigmoid(0.7 * rho) + 0.1 * -torch.nn.functional.logsigmoid(-0.7 * rho)
    torch.testing.assert_close(per_pair_of_margins(f, rho, beta=0.7, smoothing=0.1), expected)
    assert not torch.allclose(per_pair_of_margins(f, rho, beta=1.0, smoothing=0.1), expected)


def test_weights_give_a_weighted_mean():
    rho = torch.tensor([0.0, 1.0, 2.0], dtype=torch.float64)
    w = torch.tensor([1.0, 0.0, 3.0], dtype=torch.float64)
    f = losses.resolve_margin("squared")
    expected = (1.0 * f(torch.tensor(0.0)) + 3.0 * f(torch.tensor(2.0))) / 4.0
    assert loss_of_margins(f, rho, beta=1.0, weights=w).item() == pytest.approx(expected.item())


@pytest.mark.parametrize("beta", [0.0, -1.0, float("nan"), "0.1", True])
def test_beta_must_be_positive(beta):
    with pytest.raises(ValueError, match=r"beta must be a number > 0 \(e.g. beta=0.1\), got"):
        validate_hyperparameters(beta)


@pytest.mark.parametrize("smoothing", [-0.1, 0.5, 2.0])
def test_smoothing_range(smoothing):
    with pytest.raises(ValueError, match=r"loss.smoothing must lie in \[0, 0.5\)"):
        validate_hyperparameters(0.1, smoothing)
