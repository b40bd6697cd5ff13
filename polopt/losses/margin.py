"""The loss family f and its registry.

Every member is a pure, elementwise function of the *scaled margin*
``x = beta * rho``, where ``rho`` is the policy/reference log-ratio margin of
a labelled pair (see :mod:`polopt.losses.reduce`). Losses are unreduced: a tensor
in, a tensor of the same shape out. Reduction is decided once, in
:func:`polopt.losses.reduce.preference_loss`.

The generalised family (Tang et al., Generalized Preference Optimization: A
Unified Approach to Offline Alignment, 2024) writes the offline objective as
``E f(beta * rho)`` for a scalar function ``f``. The registry below holds its
published members; users add their own with :func:`register` or name one by a
dotted path ``pkg.module:name`` (imported only when named, never from config
data that is executed).

Usage::

    from polopt.losses import margin as losses
    f = losses.get("huber", delta=0.5)
    f(torch.tensor([0.0, 2.0]))
    losses.names()
"""

from __future__ import annotations

import importlib
import inspect
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
# The registry
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class Loss:
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

    def pair_objective(self, x: np.ndarray | float, p: float) -> np.ndarray:
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


def numerical_pair_optimum(loss: Loss, p: float, *, bound: float = _PAIR_SEARCH_BOUND) -> float:
    """Minimise ``p f(x) + (1 - p) f(-x)`` over ``[-bound, bound]`` with scipy.

    A grid first brackets the global minimum (the objective may be non-convex),
    then ``minimize_scalar`` refines it. A minimiser at the boundary means the
    objective still decreases there: reported as ``+-inf``; so is a minimiser where
    the objective has become flat to rounding (:func:`_flat_to_rounding`); an objective
    flat over the whole grid gives nan (every margin is optimal).
    """
    grid = np.linspace(-bound, bound, 2401)
    values = loss.pair_objective(grid, p)
    if np.ptp(values) <= 1e-12 * max(1.0, float(np.abs(values).max())):
        return math.nan
    k = int(np.nanargmin(values))
    if k == len(grid) - 1 and values[k] < values[k - 1]:
        return math.inf
    if k == 0 and values[0] < values[1]:
        return -math.inf
    lo, hi = grid[max(k - 1, 0)], grid[min(k + 1, len(grid) - 1)]
    result = scipy.optimize.minimize_scalar(
        lambda x: float(loss.pair_objective(x, p)), bounds=(lo, hi), method="bounded",
        options={"xatol": 1e-10},
    )
    # a flat minimum (hinge at p = 1/2, any x >= 1 at p = 1) is reported at its left edge
    x = float(result.x)
    return math.copysign(math.inf, x) if _flat_to_rounding(loss, p, x, bound) else x


def _flat_to_rounding(loss: Loss, p: float, x: float, bound: float) -> bool:
    """Whether a numerical minimiser ``x`` (|x| > 1) only marks where a bounded f (a sigmoid,
    1 - tanh) became flat in floating point, its infimum being approached only at infinity:
    no better at the search bound than at x, and less than 1e-9 lower at x than one unit
    before it. A hinge's flat minimum, reached with slope -1, stays finite."""
    if abs(x) <= 1.0:
        return False
    step = math.copysign(1.0, x)
    value = float(loss.pair_objective(x, p))
    at_edge, before = float(loss.pair_objective(bound * step, p)), float(loss.pair_objective(x - step, p))
    scale = max(1.0, abs(value))
    return at_edge <= value + 1e-12 * scale and before - value < 1e-9 * scale


_REGISTRY: dict[str, Loss] = {}


def register(name: str | None = None, *, convex: bool | None = None, source: str = "",
             closed_form_optimum: Callable[[float], float] | None = None):
    """Decorator adding an elementwise ``f(x)`` to the registry under ``name``.

    Example::

        @polopt.losses.margin.register("softsquare", convex=True, source="ours")
        def softsquare(x):
            return torch.nn.functional.softplus(1 - x) ** 2
    """

    def decorate(fn: Callable[..., Tensor]) -> Callable[..., Tensor]:
        key = name or fn.__name__
        if not callable(fn):
            raise TypeError(f"register: a loss must be callable, got {type(fn).__name__}")
        _REGISTRY[key] = Loss(key, fn, {}, convex, source, closed_form_optimum)
        return fn

    return decorate


def names() -> list[str]:
    """The registered loss names, in registration order."""
    return list(_REGISTRY)


def builtin_names() -> list[str]:
    """The registry's own members (defined in this module), not users' additions."""
    return [name for name in names() if _REGISTRY[name].fn.__module__ == __name__]


def _import_dotted(path: str) -> Callable[..., Tensor]:
    module_name, _, attr = path.partition(":")
    if not module_name or not attr:
        raise ValueError(f"loss path {path!r} must look like 'pkg.module:name'")
    try:
        module = importlib.import_module(module_name)
    except ImportError as err:
        raise ValueError(f"loss path {path!r}: cannot import module {module_name!r} ({err}); "
                         "is it on PYTHONPATH?") from err
    try:
        fn = getattr(module, attr)
    except AttributeError as err:
        raise ValueError(f"loss path {path!r}: module {module_name!r} has no attribute {attr!r}") from err
    if not callable(fn):
        raise TypeError(f"loss path {path!r} names a {type(fn).__name__}, not a callable f(x)")
    return fn


def get(name: str, **params) -> Loss:
    """The registered loss ``name`` (or a dotted path ``pkg.module:name``) with
    hyperparameters ``params`` bound, e.g. ``get("huber", delta=0.5)``.

    Raises:
        ValueError: unknown name (the message lists the known ones) or a
            parameter the loss does not take.
    """
    if not isinstance(name, str) or not name:
        raise ValueError(f"loss name must be a non-empty string, got {name!r}")
    if ":" in name:
        fn = _import_dotted(name)
        base = _REGISTRY.get(getattr(fn, "__name__", ""))
        if base is not None and base.fn is fn:  # a registered member named by path
            loss = base
        else:
            loss = Loss(name, fn, {}, None, "user-supplied", None)
    elif name in _REGISTRY:
        loss = _REGISTRY[name]
    else:
        raise ValueError(f"unknown loss {name!r}; known losses: {', '.join(names())}; "
                         "or give a dotted path 'pkg.module:name'")
    if params:
        accepted = inspect.signature(loss.fn).parameters
        unknown = [k for k in params if k not in accepted]
        if unknown:
            takes = [k for k, p in accepted.items() if p.kind is p.KEYWORD_ONLY] or ["no parameters"]
            raise ValueError(f"loss {name!r} got unknown parameter(s) {', '.join(unknown)}; "
                             f"it takes: {', '.join(takes)}")
        # the closed form of a member holds at its default parameters only
        loss = Loss(loss.name, loss.fn, dict(params), loss.convex, loss.source,
                    loss.closed_form_optimum if _defaults_match(loss.fn, params) else None)
    return loss


def _defaults_match(fn: Callable, params: dict) -> bool:
    sig = inspect.signature(fn).parameters
    return all(sig[k].default == v for k, v in params.items())


def has_finite_pair_optimum_at_certainty(loss: Loss) -> bool:
    """Whether a pair preferred with probability 1 has a finite optimal margin.

    False for logistic, exponential and savage: with deterministic labels their
    margins grow without bound (Azar et al., 2023, section 4.2).
    """
    return math.isfinite(loss.pair_optimum(1.0))


_BUILTINS = [
    (logistic, True, "Rafailov et al. 2023 (DPO)", _logit_optimum),
    (squared, True, "Azar et al. 2023 (IPO)", _linear_optimum),
    (hinge, True, "Zhao et al. 2023 (SLiC)", _hinge_optimum),
    (huber, True, "Huber 1964, on the squared loss", lambda p: (2.0 * p - 1.0) / max(p, 1.0 - p)),
    (exponential, True, "Tang et al. 2024 (GPO)", _half_logit_optimum),
    (truncated_quadratic, True, "Tang et al. 2024 (GPO)", _linear_optimum),
    (savage, False, "Tang et al. 2024 (GPO)", _logit_optimum),
]
for _fn, _convex, _source, _optimum in _BUILTINS:
    register(_fn.__name__, convex=_convex, source=_source, closed_form_optimum=_optimum)(_fn)
