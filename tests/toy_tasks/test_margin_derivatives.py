"""The built-in margin losses' derivatives written out (toy_tasks.exact.margin_derivatives).

Held against torch autograd (the reference: the first and second derivatives of each member as torch
differentiates it) and against each member's derivative formula as its paper writes it: the logistic
loss's -sigma(-x) and sigma(x) sigma(-x) (Rafailov et al. 2023), the squared loss's 2 (x - 1) and 2 (Azar et
al. 2023), the exponential loss's -e^-x and e^-x (Tang et al. 2024), the Savage loss's sigma(-x)^2
(Masnadi-Shirazi and Vasconcelos 2008) differentiated by hand, Huber's 2u and 2 delta sign u (Huber 1964).
"""

import numpy as np
import pytest
import torch
import user_losses

from polopt import losses
from polopt.losses import margin as members
from toy_tasks.exact import margin, margin_derivatives
from toy_tasks.finite.task import make_task

BUILTINS = [("logistic", {}), ("squared", {}), ("exponential", {}), ("savage", {}), ("huber", {}),
            ("huber", {"delta": 0.5}), ("truncated_quadratic", {})]
GRID = torch.linspace(-80.0, 80.0, 2001, dtype=torch.float64) + 0.0037  # off every kink


@pytest.mark.parametrize(("name", "params"), BUILTINS)
def test_written_out_derivatives_equal_autograd(name, params):
    loss = losses.resolve_margin(name, **params)
    form = margin_derivatives.written_out(loss)
    assert form is not None
    x = GRID.clone().requires_grad_(True)
    value = loss(x)
    (d1,) = torch.autograd.grad(value.sum(), x, create_graph=True)
    d2 = torch.autograd.grad(d1.sum(), x)[0] if d1.requires_grad else torch.zeros_like(x)
    got = form(GRID.clone())
    for want, have in zip((value.detach(), d1.detach(), d2), got, strict=True):
        torch.testing.assert_close(have, want, rtol=1e-12, atol=1e-12)  # autograd loses digits where f'' is tiny
    assert margin_derivatives.checked_form(loss) is not None


def test_the_formulas_are_the_papers():
    x = torch.tensor([-3.0, -0.5, 0.25, 2.0], dtype=torch.float64)
    sig = torch.sigmoid
    _, d1, d2 = margin_derivatives.written_out(losses.resolve_margin("logistic"))(x)
    torch.testing.assert_close(d1, -sig(-x))  # Rafailov et al. 2023
    torch.testing.assert_close(d2, sig(x) * sig(-x))
    _, d1, d2 = margin_derivatives.written_out(losses.resolve_margin("squared"))(x)
    torch.testing.assert_close(d1, 2.0 * (x - 1.0))  # Azar et al. 2023
    torch.testing.assert_close(d2, torch.full_like(x, 2.0))
    _, d1, d2 = margin_derivatives.written_out(losses.resolve_margin("exponential"))(x)
    torch.testing.assert_close(d1, -torch.exp(-x))  # Tang et al. 2024
    torch.testing.assert_close(d2, torch.exp(-x))
    # Savage: f = s^2, s = sigma(-x), s' = -s (1 - s): f' = -2 s^2 (1 - s); f'' = 2 s^2 (1 - s) (2 - 3 s)
    s = sig(-x)
    _, d1, d2 = margin_derivatives.written_out(losses.resolve_margin("savage"))(x)
    torch.testing.assert_close(d1, -2.0 * s**2 * (1.0 - s))
    torch.testing.assert_close(d2, 2.0 * s**2 * (1.0 - s) * (2.0 - 3.0 * s))
    # Huber (delta = 1) around 1: 2u inside |u| < 1, 2 sign(u) outside (Huber 1964)
    _, d1, _ = margin_derivatives.written_out(losses.resolve_margin("huber"))(x)
    torch.testing.assert_close(d1, torch.tensor([-2.0, -2.0, -1.5, 2.0], dtype=torch.float64))


def test_the_exponential_tail_is_its_tangent():
    # below x = -50 the member continues along its tangent (polopt.losses.margin.exponential)
    x = torch.tensor([-50.5, -60.0], dtype=torch.float64)
    value, d1, d2 = margin_derivatives.written_out(losses.resolve_margin("exponential"))(x)
    torch.testing.assert_close(d1, torch.full_like(x, -np.exp(50.0)))
    torch.testing.assert_close(d2, torch.zeros_like(x))
    torch.testing.assert_close(value, members.exponential(x))


def test_a_user_loss_keeps_autograd():
    user = losses.resolve_margin(user_losses.sqrt_abs)
    assert margin_derivatives.written_out(user) is None
    assert margin_derivatives.checked_form(user) is None


def test_a_form_that_disagrees_with_its_member_is_not_used(monkeypatch):
    def wrong(x):  # the squared loss with f' off by 2
        return (x - 1.0) ** 2, 2.0 * x, torch.full_like(x, 2.0)

    monkeypatch.setitem(margin_derivatives.FORMS, members.squared, wrong)
    assert margin_derivatives.written_out(losses.resolve_margin("squared")) is not None
    assert margin_derivatives.checked_form(losses.resolve_margin("squared")) is None


@pytest.mark.parametrize("name", ["exponential", "savage", "huber", "truncated_quadratic", "squared"])
def test_the_solver_finds_the_same_optimum_either_way(name, monkeypatch):
    rng = np.random.default_rng(3)
    task = make_task(rng.dirichlet(np.ones(6), size=2), rewards=rng.normal(size=(2, 6)))
    loss = losses.resolve_margin(name)
    fast = margin.solve(loss, task.win_weights(), beta=0.7)
    monkeypatch.setattr(margin_derivatives, "checked_form", lambda loss: None)
    by_autograd = margin.solve(loss, task.win_weights(), beta=0.7)
    np.testing.assert_allclose(fast.logratios, by_autograd.logratios, atol=1e-10, rtol=0)
    assert fast.residual <= 1e-9 and by_autograd.residual <= 1e-9
