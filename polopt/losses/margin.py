"""The margin family: losses f of the scaled margin ``x = beta * rho``, and what a member knows.

Every member is a pure, elementwise function of ``x = beta * rho``, where ``rho`` is the
policy/reference log-ratio margin of a labelled pair (computed once, in
:func:`polopt.losses.reduce.margins`). Losses are unreduced: a tensor in, a tensor of the same
shape out; reduction is decided once, in :func:`polopt.losses.reduce.weighted_mean`.

The generalised family (Tang et al., Generalized Preference Optimization: A Unified Approach to
Offline Alignment, 2024) writes the offline objective as ``E f(beta * rho)`` for a scalar
function ``f``. :class:`MarginLoss` binds a member to its parameters and knows its per-pair
optimum ``x*(p)``; the one registry that names members for ``loss=`` is
:mod:`polopt.losses.registry`.

Usage::

    from polopt import losses
    f = losses.resolve("huber", delta=0.5)     # a MarginLoss
    f(torch.tensor([0.0, 2.0]))
    f.pair_optimum(0.8)
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import scipy.optimize
import scipy.special
import torch
import torch.nn.functional as F

Tensor = torch.Tensor

# Above this scaled margin the exponential loss continues linearly: e^50 ~ 5e21 keeps
# values and gradients finite in float32 and bfloat16 even at |x| = 1e4.
_EXP_LINEAR_TAIL = 50.0
# Per-pair optima beyond this scaled margin are reported as "no finite optimum".
_PAIR_SEARCH_BOUND = 60.0


# ----------------------------------------------------------------------------
# The members: pure elementwise functions of x = beta * rho
# ----------------------------------------------------------------------------


def logistic(x: Tensor) -> Tensor:
    """Logistic loss ``f(x) = log(1 + e^{-x})``.

    ``f'(x) = -sigmoid(-x)``, ``f''(x) = sigmoid(x) sigmoid(-x)``; convex, no finite
    minimiser (decreases towards 0 as x -> inf).

    References:
        Rafailov et al., Direct Preference Optimization: Your Language Model is
        Secretly a Reward Model, 2023.
    """
    return F.softplus(-x)  # softplus is the overflow-safe log(1 + e^z)


def squared(x: Tensor) -> Tensor:
    """Squared loss ``f(x) = (x - 1)^2``.

    ``f'(x) = 2 (x - 1)``, ``f''(x) = 2``; strictly convex, minimiser x = 1.
    With ``x = beta * rho`` this is IPO's objective with ``tau = beta / 2``.

    References:
        Azar et al., A General Theoretical Paradigm to Understand Learning from
        Human Preferences, 2023.
    """
    return (x - 1.0) ** 2


def hinge(x: Tensor) -> Tensor:
    """Hinge loss ``f(x) = max(0, 1 - x)``.

    ``f'(x) = -1`` for x < 1, 0 above; convex, piecewise linear, minimised by any x >= 1.

    References:
        Zhao et al., SLiC-HF: Sequence Likelihood Calibration with Human
        Feedback, 2023.
    """
    return F.relu(1.0 - x)


def huber(x: Tensor, *, delta: float = 1.0) -> Tensor:
    """Huber loss around the squared loss's target 1.

    With ``u = x - 1``: ``f(x) = u^2`` if ``|u| <= delta`` else
    ``2 delta |u| - delta^2``. Convex, minimiser x = 1. As ``delta -> inf`` it
    becomes :func:`squared`; it equals ``2 *`` torch's ``huber_loss``, whose
    convention carries a factor 1/2. With the default delta = 1 the kink between
    the branches sits at x = 0 exactly: f''(0) is 2 from the right and 0 from the
    left, and autograd reports torch's branch there (the linear one, 0).

    References:
        Huber, Robust Estimation of a Location Parameter, 1964 (applied here to
        the squared loss of Azar et al., 2023).
    """
    return 2.0 * F.huber_loss(x, torch.ones_like(x), reduction="none", delta=delta)


def exponential(x: Tensor) -> Tensor:
    """Exponential loss ``f(x) = e^{-x}``.

    ``f'(x) = -e^{-x}``, ``f''(x) = e^{-x}``; strictly convex, no finite minimiser.
    For ``x < -50`` it continues along its tangent so that values and gradients
    stay finite in float32 and bfloat16 (a margin of -50 is far outside training).

    References:
        Tang et al., Generalized Preference Optimization: A Unified Approach to
        Offline Alignment, 2024.
    """
    t = _EXP_LINEAR_TAIL
    inside = torch.exp(-x.clamp(min=-t))  # clamp keeps the unselected branch finite
    tail = math.exp(t) * (1.0 - (x + t))  # tangent line at x = -t
    return torch.where(x >= -t, inside, tail)


def truncated_quadratic(x: Tensor) -> Tensor:
    """Truncated quadratic loss ``f(x) = max(0, 1 - x)^2``.

    ``f'(x) = -2 max(0, 1 - x)``; convex, minimised by any x >= 1; equals
    :func:`squared` for x <= 1.

    References:
        Tang et al., Generalized Preference Optimization, 2024.
    """
    return F.relu(1.0 - x) ** 2


def savage(x: Tensor) -> Tensor:
    """Savage loss ``f(x) = 1 / (1 + e^x)^2 = sigmoid(-x)^2``.

    Bounded and *not convex* (concave for large negative x); no finite
    minimiser. Its per-pair optimum is ``logit p``, the same as the logistic loss.

    References:
        Masnadi-Shirazi and Vasconcelos, On the Design of Loss Functions for
        Classification, 2008; Tang et al., Generalized Preference Optimization, 2024.
    """
    return torch.sigmoid(-x) ** 2  # sigmoid saturates cleanly, no overflow


# ----------------------------------------------------------------------------
# Closed-form per-pair optima: argmin_x  p f(x) + (1 - p) f(-x)
# ----------------------------------------------------------------------------


def _logit_optimum(p: float) -> float:
    return float(scipy.special.logit(p))


def _linear_optimum(p: float) -> float:
    return 2.0 * p - 1.0


def _half_logit_optimum(p: float) -> float:
    return 0.5 * float(scipy.special.logit(p))


def _hinge_optimum(p: float) -> float:
    return float(np.sign(2.0 * p - 1.0))  # any x in [-1, 1] at p = 1/2; 0 is reported


# ----------------------------------------------------------------------------
# A member with what optimum analysis needs
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class MarginLoss:
    """A member of the family with what optimum analysis needs.

    Attributes:
        name: registry name or dotted path.
        fn: the elementwise callable ``f(x)``.
        params: keyword hyperparameters bound into ``fn`` (e.g. ``delta``).
        convex: True / False, or None when unknown (user losses: see ``polopt check``).
        source: the paper the member comes from.
        closed_form_optimum: ``p -> x*`` where a closed form exists, else None.
    """

    name: str
    fn: Callable[..., Tensor]
    params: dict = field(default_factory=dict)
    convex: bool | None = None
    source: str = ""
    closed_form_optimum: Callable[[float], float] | None = None

    def __call__(self, x: Tensor) -> Tensor:
        return self.fn(x, **self.params)

    def __repr__(self) -> str:
        extra = "".join(f", {k}={v}" for k, v in self.params.items())
        return f"Loss({self.name!r}{extra})"

    def derivatives_at(self, x: float = 0.0) -> tuple[float, float, float]:
        """``(f(x), f'(x), f''(x))`` in float64 by autograd."""
        t = torch.tensor(float(x), dtype=torch.float64, requires_grad=True)
        value = self(t)
        (d1,) = torch.autograd.grad(value, t, create_graph=True)
        if d1.requires_grad:
            (d2,) = torch.autograd.grad(d1, t)
        else:  # f is linear around x: autograd leaves no graph for the second derivative
            d2 = torch.zeros((), dtype=torch.float64)
        return value.item(), d1.item(), d2.item()

    def expected_pair_loss(self, x: np.ndarray | float, p: float) -> np.ndarray:
        """``p f(x) + (1 - p) f(-x)``: the expected loss of one pair whose first
        response is preferred with probability ``p``, at scaled margin ``x``."""
        t = torch.as_tensor(np.asarray(x, dtype=np.float64))
        return (p * self(t) + (1.0 - p) * self(-t)).numpy()

    def pair_optimum(self, p: float) -> float:
        """The scaled margin ``x* = beta * d*`` minimising ``p f(x) + (1 - p) f(-x)``: the one
        definition of the per-pair optimum x*(p) (``polopt check``, the solver's existence test
        and the tests all read it here).

        Returns ``+inf`` (``-inf``) where the objective keeps decreasing as the
        margin grows (shrinks), e.g. the logistic loss at p = 1, and nan where it is flat
        in x (every margin optimal). Uses the closed form where the member has one, else
        :func:`numerical_pair_optimum`.
        """
        if not 0.0 <= p <= 1.0:
            raise ValueError(f"pair_optimum: p must lie in [0, 1], got {p}")
        if self.closed_form_optimum is not None and 0.0 < p < 1.0:
            return float(self.closed_form_optimum(p))
        return numerical_pair_optimum(self, p)


def numerical_pair_optimum(loss: MarginLoss, p: float, *, bound: float = _PAIR_SEARCH_BOUND) -> float:
    """Minimise ``p f(x) + (1 - p) f(-x)`` over ``[-bound, bound]`` with scipy.

    A grid first brackets the global minimum (the objective may be non-convex),
    then ``minimize_scalar`` refines it. A minimiser at the boundary means the
    objective still decreases there: reported as ``+-inf``; so is a minimiser where
    the objective has become flat to rounding (:func:`_flat_to_rounding`); an objective
    flat over the whole grid gives nan (every margin is optimal).
    """
    grid = np.linspace(-bound, bound, 2401)
    values = loss.expected_pair_loss(grid, p)
    if np.ptp(values) <= 1e-12 * max(1.0, float(np.abs(values).max())):
        return math.nan
    k = int(np.nanargmin(values))
    if k == len(grid) - 1 and values[k] < values[k - 1]:
        return math.inf
    if k == 0 and values[0] < values[1]:
        return -math.inf
    lo, hi = grid[max(k - 1, 0)], grid[min(k + 1, len(grid) - 1)]
    result = scipy.optimize.minimize_scalar(
        lambda x: float(loss.expected_pair_loss(x, p)), bounds=(lo, hi), method="bounded",
        options={"xatol": 1e-10},
    )
    # a flat minimum (hinge at p = 1/2, any x >= 1 at p = 1) is reported at its left edge
    x = float(result.x)
    return math.copysign(math.inf, x) if _flat_to_rounding(loss, p, x, bound) else x


def _flat_to_rounding(loss: MarginLoss, p: float, x: float, bound: float) -> bool:
    """Whether a numerical minimiser ``x`` (|x| > 1) only marks where a bounded f (a sigmoid,
    1 - tanh) became flat in floating point, its infimum being approached only at infinity:
    no better at the search bound than at x, and less than 1e-9 lower at x than one unit
    before it. A hinge's flat minimum, reached with slope -1, stays finite."""
    if abs(x) <= 1.0:
        return False
    step = math.copysign(1.0, x)
    value = float(loss.expected_pair_loss(x, p))
    at_edge, before = float(loss.expected_pair_loss(bound * step, p)), float(loss.expected_pair_loss(x - step, p))
    scale = max(1.0, abs(value))
    return at_edge <= value + 1e-12 * scale and before - value < 1e-9 * scale


def has_finite_pair_optimum_at_certainty(loss: MarginLoss) -> bool:
    """Whether a pair preferred with probability 1 has a finite optimal margin.

    False for logistic, exponential and savage: with deterministic labels their
    margins grow without bound (Azar et al., 2023, section 4.2).
    """
    return math.isfinite(loss.pair_optimum(1.0))


# the closed-form per-pair optimum of each built-in member (docs/maths.md's table), read by the registry
CLOSED_FORM_OPTIMA = {
    "logistic": _logit_optimum, "squared": _linear_optimum, "hinge": _hinge_optimum,
    "huber": lambda p: (2.0 * p - 1.0) / max(p, 1.0 - p), "exponential": _half_logit_optimum,
    "truncated_quadratic": _linear_optimum, "savage": _logit_optimum,
}
