"""The loss family: values, derivatives, convexity, extremes, per-pair optima, registry.

``BUILTINS`` is read from the registry, so every test that iterates it covers a new member
automatically, and a member without an independent formula below fails. Expected
values come from independent float64 formulas in numpy/scipy (named beside each),
from torch's own reference functions, or from derivations written beside them.
"""

import math

import numpy as np
import pytest
import scipy.special
import torch
import torch.nn.functional as F

from polopt import losses

BUILTINS = losses.builtin_names("margin")

# Independent float64 evaluations of each member's formula (docs/maths.md's table).
REFERENCE = {
    "logistic": lambda x: -scipy.special.log_expit(x),  # log(1 + e^-x) = -log sigmoid(x)
    "squared": lambda x: (x - 1.0) ** 2,
    "hinge": lambda x: np.maximum(0.0, 1.0 - x),
    "huber": lambda x: 2.0 * scipy.special.huber(1.0, x - 1.0),  # scipy's huber carries a factor 1/2
    "exponential": lambda x: np.exp(-x),
    "truncated_quadratic": lambda x: np.maximum(0.0, 1.0 - x) ** 2,
    "savage": lambda x: scipy.special.expit(-x) ** 2,  # 1 / (1 + e^x)^2
}

GRID = np.linspace(-30.0, 30.0, 1201)


def test_every_builtin_has_an_independent_formula_and_the_table_is_complete():
    # the seven members of docs/maths.md's table, and nothing registered without a reference formula
    assert {"logistic", "squared", "hinge", "huber", "exponential", "truncated_quadratic", "savage"} <= set(BUILTINS)
    assert set(REFERENCE) == set(BUILTINS)
    with_closed_form = {n for n in BUILTINS if losses.resolve_margin(n).closed_form_optimum is not None}
    assert set(PAIR_OPTIMA) | {"hinge"} == with_closed_form  # hinge: test_hinge_pair_optimum_is_the_margin_one


@pytest.mark.parametrize("name", BUILTINS)
def test_values_match_an_independent_formula(name):
    loss = losses.resolve_margin(name)
    got = loss(torch.tensor(GRID, dtype=torch.float64)).numpy()
    np.testing.assert_allclose(got, REFERENCE[name](GRID), rtol=1e-6, atol=1e-6)


@pytest.mark.parametrize("delta", [0.25, 1.0, 3.0])
def test_huber_matches_torch_huber_loss(delta):
    x = torch.tensor(GRID, dtype=torch.float64)
    expected = 2.0 * F.huber_loss(x, torch.ones_like(x), reduction="none", delta=delta)  # torch's 1/2 convention
    torch.testing.assert_close(losses.resolve_margin("huber", delta=delta)(x), expected, rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(losses.resolve_margin("huber", delta=delta)(x).numpy(),
                               2.0 * scipy.special.huber(delta, GRID - 1.0), rtol=1e-6, atol=1e-6)


def test_huber_becomes_squared_for_large_delta():
    # Huber 1964: inside |u| <= delta the loss is u^2, so a delta wider than the grid gives the squared loss
    x = torch.tensor(GRID, dtype=torch.float64)
    torch.testing.assert_close(losses.resolve_margin("huber", delta=100.0)(x), losses.resolve_margin("squared")(x))


def test_truncated_quadratic_equals_squared_below_one():
    x = torch.tensor(GRID[GRID <= 1.0], dtype=torch.float64)
    torch.testing.assert_close(losses.resolve_margin("truncated_quadratic")(x), losses.resolve_margin("squared")(x))


# Kinks where the derivative jumps: finite differences are not meaningful there.
KINKS = {"hinge": [1.0], "huber": [0.0, 2.0], "truncated_quadratic": [1.0]}


@pytest.mark.parametrize("name", BUILTINS)
def test_gradient_matches_finite_differences(name):
    x = torch.linspace(-6.0, 6.0, 97, dtype=torch.float64)
    for kink in KINKS.get(name, []):
        x = x[(x - kink).abs() > 0.05]
    x.requires_grad_(True)
    assert torch.autograd.gradcheck(losses.resolve_margin(name), (x,), eps=1e-6, atol=1e-6)


@pytest.mark.parametrize("name", [n for n in BUILTINS if losses.resolve_margin(n).convex])
def test_convex_members_are_convex_on_a_grid(name):
    # midpoint convexity f((a + b) / 2) <= (f(a) + f(b)) / 2 on neighbouring grid points
    f = REFERENCE[name]
    a, b = GRID[:-2], GRID[2:]
    assert np.all(f((a + b) / 2) <= (f(a) + f(b)) / 2 + 1e-9)


def test_savage_is_flagged_not_convex_and_is_not():
    f = REFERENCE["savage"]
    a, b = np.array([-6.0]), np.array([-2.0])
    assert losses.resolve_margin("savage").convex is False
    assert f((a + b) / 2)[0] > (f(a)[0] + f(b)[0]) / 2  # concave on the far negative side


@pytest.mark.parametrize("dtype", [torch.float32, torch.bfloat16])
@pytest.mark.parametrize("name", BUILTINS)
def test_finite_values_and_gradients_at_extreme_margins(name, dtype):
    x = torch.tensor([-1e4, -1e3, -88.0, -50.0, -1.0, 0.0, 1.0, 50.0, 88.0, 1e3, 1e4], dtype=dtype,
                     requires_grad=True)
    values = losses.resolve_margin(name)(x)
    (grad,) = torch.autograd.grad(values.sum(), x)
    assert values.dtype == dtype and values.shape == x.shape
    assert torch.isfinite(values).all(), values
    assert torch.isfinite(grad).all(), grad


@pytest.mark.parametrize("name", BUILTINS)
def test_losses_are_elementwise_and_shape_preserving(name):
    x = torch.randn(3, 4, 5, dtype=torch.float64, generator=torch.Generator().manual_seed(0))
    loss = losses.resolve_margin(name)
    whole = loss(x)
    assert whole.shape == x.shape
    torch.testing.assert_close(whole[1, 2], loss(x[1, 2]))


# (f(0), f'(0), f''(0)), derived by hand from each formula.
TAYLOR = {
    "logistic": (math.log(2.0), -0.5, 0.25),  # f' = -sigmoid(-x), f'' = sigmoid(x) sigmoid(-x)
    "squared": (1.0, -2.0, 2.0),
    "hinge": (1.0, -1.0, 0.0),
    # delta = 1 puts the kink between the quadratic and the linear branch at x = 0: f'' is 2 on the right,
    # 0 on the left; torch's huber_loss (quadratic only for |u| < delta) takes the linear branch there
    "huber": (1.0, -2.0, 0.0),
    "exponential": (1.0, -1.0, 1.0),
    "truncated_quadratic": (1.0, -2.0, 2.0),
    "savage": (0.25, -0.25, 0.125),  # f = s(-x)^2: f' = -2 s^2(1-s), f'' = 2 s^2(1-s)(2 - 3s) at s = 1/2 gives 1/8
}


@pytest.mark.parametrize("name", BUILTINS)
def test_taylor_coefficients_at_zero(name):
    np.testing.assert_allclose(losses.resolve_margin(name).derivatives_at(0.0), TAYLOR[name], atol=1e-12)


P_GRID = [0.05, 0.2, 0.5, 0.73, 0.95]


# Closed-form per-pair optima x* = argmin p f(x) + (1 - p) f(-x):
PAIR_OPTIMA = {
    "logistic": lambda p: scipy.special.logit(p),  # Rafailov et al. 2023: beta d = logit p
    "squared": lambda p: 2 * p - 1,  # Azar et al. 2023: beta d = 2p - 1
    "exponential": lambda p: scipy.special.logit(p) / 2,  # Tang et al. 2024 (GPO)
    "savage": lambda p: scipy.special.logit(p),  # derived: f'(x)/f'(-x) = e^{-x} ... gives e^x = p/(1-p)
    "truncated_quadratic": lambda p: 2 * p - 1,  # equals squared on [-1, 1]
    "huber": lambda p: (2 * p - 1) / max(p, 1 - p),  # derived by hand for delta = 1
}


@pytest.mark.parametrize("name", sorted(PAIR_OPTIMA))
@pytest.mark.parametrize("p", P_GRID)
def test_pair_optimum_closed_forms(name, p):
    assert losses.resolve_margin(name).pair_optimum(p) == pytest.approx(PAIR_OPTIMA[name](p), abs=1e-9)


@pytest.mark.parametrize("name", BUILTINS)
@pytest.mark.parametrize("p", P_GRID)
def test_closed_form_agrees_with_the_numerical_minimiser(name, p):
    loss = losses.resolve_margin(name)
    closed = loss.pair_optimum(p)
    numeric = losses.margin.numerical_pair_optimum(loss, p)
    if name == "hinge" and p == 0.5:  # any x in [-1, 1] is optimal: compare objective values
        assert loss.expected_pair_loss(closed, p) == pytest.approx(loss.expected_pair_loss(numeric, p), abs=1e-9)
    else:
        assert numeric == pytest.approx(closed, abs=1e-5)


def test_hinge_pair_optimum_is_the_margin_one():
    # Zhao et al. 2023: the hinge pushes the preferred response ahead by the margin 1
    assert losses.resolve_margin("hinge").pair_optimum(0.8) == 1.0
    assert losses.resolve_margin("hinge").pair_optimum(0.2) == -1.0


@pytest.mark.parametrize("name,finite", [("logistic", False), ("exponential", False), ("savage", False),
                                         ("squared", True), ("hinge", True), ("huber", True),
                                         ("truncated_quadratic", True)])
def test_finite_pair_optimum_at_certainty(name, finite):
    # Azar et al. 2023, section 4.2: with p = 1 the logistic margin grows without bound; squared stops at 1
    loss = losses.resolve_margin(name)
    assert losses.has_finite_pair_optimum_at_certainty(loss) is finite
    assert math.isfinite(loss.pair_optimum(1.0)) is finite
    if not finite:
        assert loss.pair_optimum(1.0) == math.inf and loss.pair_optimum(0.0) == -math.inf


def test_a_bounded_loss_has_one_per_pair_optimum_everywhere():
    """f(x) = 1 - tanh(x) is bounded below by 0 and approaches it only as x -> inf (derived:
    f'(x) = -(1 - tanh^2 x) < 0), so at p = 1 the pair objective f(x) has no finite minimiser; in
    float64 tanh(x) == 1 from x ~ 19 on, which a grid search would take for a finite minimum. The
    one definition (MarginLoss.pair_optimum) reports inf, and the check's curve and the solver's
    existence test read the same answer."""
    from polopt.checks import margin as check

    loss = losses.MarginLoss("one_minus_tanh", lambda x: 1 - torch.tanh(x), convex=False)
    assert loss.pair_optimum(1.0) == math.inf and loss.pair_optimum(0.0) == -math.inf
    assert losses.margin.numerical_pair_optimum(loss, 1.0) == math.inf
    assert losses.has_finite_pair_optimum_at_certainty(loss) is False
    assert check.pair_optimum_curve(loss, [1.0])[0] == math.inf
    # and an objective flat in x has every margin optimal: nan, not a number picked by the grid
    assert math.isnan(losses.MarginLoss("constant", lambda x: 0 * x + 1).pair_optimum(0.7))


def test_unknown_loss_lists_the_known_ones():
    with pytest.raises(ValueError, match=r"unknown loss 'cross'; known losses: logistic, squared, hinge"):
        losses.resolve_margin("cross")


def test_unknown_parameter_names_what_the_loss_takes():
    with pytest.raises(ValueError, match=r"loss 'huber' got unknown parameter\(s\) width; it takes: delta"):
        losses.resolve_margin("huber", width=2)


def test_dotted_path_loads_a_user_loss(tmp_path, monkeypatch):
    (tmp_path / "my_losses.py").write_text(
        "import torch\ndef softsquare(x):\n    return torch.nn.functional.softplus(1 - x) ** 2\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    loss = losses.resolve_margin("my_losses:softsquare")
    x = torch.tensor([0.0, 1.0], dtype=torch.float64)
    torch.testing.assert_close(loss(x), F.softplus(1 - x) ** 2)
    assert loss.convex is None and loss.closed_form_optimum is None


@pytest.mark.parametrize("path,message", [
    ("no_such_module_here:f", r"cannot import module 'no_such_module_here'"),
    ("math:no_such_function", r"module 'math' has no attribute 'no_such_function'"),
    ("math:pi", r"names a float, not a callable"),
    (":f", r"must look like 'pkg.module:name'"),
])
def test_dotted_path_errors(path, message):
    with pytest.raises((ValueError, TypeError), match=message):
        losses.resolve_margin(path)


def test_register_decorator_adds_a_member():
    @losses.register("test_only_cubic_hinge", convex=True, source="test")
    def cubic_hinge(x):
        return F.relu(1 - x) ** 3

    try:
        assert "test_only_cubic_hinge" in losses.names("margin")
        assert losses.resolve_margin("test_only_cubic_hinge")(torch.tensor(0.0)).item() == 1.0
    finally:
        losses.unregister("test_only_cubic_hinge")


def test_parameters_at_non_default_values_drop_the_closed_form():
    assert losses.resolve_margin("huber").closed_form_optimum is not None
    assert losses.resolve_margin("huber", delta=0.5).closed_form_optimum is None
    x_star = losses.resolve_margin("huber", delta=0.5).pair_optimum(0.8)
    # the scalar solve is the only route now; check stationarity of p f(x) + (1 - p) f(-x)
    t = torch.tensor(x_star, dtype=torch.float64, requires_grad=True)
    f = losses.resolve_margin("huber", delta=0.5)
    (g,) = torch.autograd.grad(0.8 * f(t) + 0.2 * f(-t), t)
    assert abs(float(g)) < 1e-6
