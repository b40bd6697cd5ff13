"""The built-in margin losses' first and second derivatives written out, checked against autograd before use.

The exact solvers need ``f(x)``, ``f'(x)`` and ``f''(x)`` of a margin loss on every pair of a prompt (a
(K, K) grid: 132,496 values at K = 364) at every Newton iteration. Autograd's double backward through the
loss costs several passes over the grid; each built-in's derivatives are one or two elementwise formulas
(written beside each member in :mod:`polopt.losses.margin`, from the papers it cites):

- logistic ``log(1 + e^-x)``: ``-sigma(-x)``, ``sigma(x) sigma(-x)`` (Rafailov et al. 2023), and ``-1``, ``0``
  below x = -20, where the member (torch's ``softplus``, linear above its threshold 20) is ``-x``;
- squared ``(x - 1)^2``: ``2 (x - 1)``, ``2`` (Azar et al. 2023);
- exponential ``e^-x`` (continued along its tangent below x = -50): ``-e^-x``, ``e^-x`` (Tang et al. 2024);
- savage ``s^2`` with ``s = sigma(-x)``: ``-2 s^2 (1 - s)``, ``2 s^2 (1 - s) (2 - 3 s)`` (Masnadi-Shirazi and
  Vasconcelos 2008);
- huber around 1 (``u = x - 1``): ``u^2``, ``2u``, ``2`` where ``|u| < delta``, else ``2 delta |u| - delta^2``,
  ``2 delta sign u``, ``0`` (Huber 1964; at ``|u| = delta`` the linear branch, as torch's ``huber_loss``);
- truncated quadratic ``max(0, 1 - x)^2``: ``-2 max(0, 1 - x)``, ``2 [x < 1]`` (Tang et al. 2024; at x = 1
  the flat branch, as autograd through ``relu``).

:func:`checked_form` hands a solver the written-out form only after it reproduces autograd's values, first
and second derivatives (:func:`toy_tasks.exact.scores.elementwise_derivatives`) at :data:`PROBES` (relative
agreement :data:`AGREEMENT`), so a member whose definition changes falls back to autograd instead of
giving a wrong optimum; any other loss (a user's, or a member with parameters the form does not take)
keeps autograd.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import torch

from polopt.losses import margin as members
from polopt.losses.margin import MarginLoss
from toy_tasks.exact.scores import elementwise_derivatives

Tensor = torch.Tensor
Derivatives = Callable[[Tensor], tuple[Tensor, Tensor, Tensor]]  # x -> f(x), f'(x), f''(x), each x's shape

SOFTPLUS_THRESHOLD = 20.0  # torch.nn.functional.softplus is linear above this input (its documented default)
AGREEMENT = 1e-12  # relative agreement with autograd before a written-out form is used
# scaled margins where the forms are compared: 0, both sides of every built-in's kinks and tails, and a grid
PROBES = torch.cat([torch.tensor([0.0, 1.0, -1.0, 0.5, 1.5, 2.0, -2.0, 49.9, -49.9, -50.1, -60.0, 60.0, 700.0,
                                  -700.0, 36.0, -36.0], dtype=torch.float64),
                    torch.linspace(-40.0, 40.0, 161, dtype=torch.float64) + 0.013])


def _logistic(x: Tensor) -> tuple[Tensor, Tensor, Tensor]:
    high, low = torch.sigmoid(x), torch.sigmoid(-x)  # sigma(x), 1 - sigma(x), each to full precision
    linear = -x > SOFTPLUS_THRESHOLD  # where torch's softplus, the member, returns its argument
    return members.logistic(x), torch.where(linear, -1.0, -low), torch.where(linear, 0.0, high * low)


def _squared(x: Tensor) -> tuple[Tensor, Tensor, Tensor]:
    return (x - 1.0) ** 2, 2.0 * (x - 1.0), torch.full_like(x, 2.0)


def _exponential(x: Tensor) -> tuple[Tensor, Tensor, Tensor]:
    if float(x.min()) >= -members._EXP_LINEAR_TAIL:  # no margin in the tail: the formulas alone
        e = torch.exp(-x)
        return e, -e, e.clone()
    inside = x >= -members._EXP_LINEAR_TAIL
    e = torch.exp(-x.clamp(min=-members._EXP_LINEAR_TAIL))  # e^-x, the tangent's slope below the tail
    value = torch.where(inside, e, math.exp(members._EXP_LINEAR_TAIL) * (1.0 - (x + members._EXP_LINEAR_TAIL)))
    return value, -e, torch.where(inside, e, 0.0)


def _savage(x: Tensor) -> tuple[Tensor, Tensor, Tensor]:
    s = torch.sigmoid(-x)
    square = s * s
    rest = torch.sigmoid(x)  # 1 - s, to full precision
    return square, -2.0 * square * rest, 2.0 * square * rest * (2.0 - 3.0 * s)


def _huber(x: Tensor, delta: float = 1.0) -> tuple[Tensor, Tensor, Tensor]:
    u = x - 1.0
    curved = (u.abs() < delta).to(x.dtype)  # 1 on the quadratic branch, 0 on the linear ones
    return members.huber(x, delta=delta), 2.0 * u.clamp(-delta, delta), curved.mul_(2.0)


def _truncated_quadratic(x: Tensor) -> tuple[Tensor, Tensor, Tensor]:
    gap = torch.relu(1.0 - x)
    return gap * gap, -2.0 * gap, (x < 1.0).to(x.dtype).mul_(2.0)


FORMS: dict[Callable[..., Tensor], Callable[..., tuple[Tensor, Tensor, Tensor]]] = {
    members.logistic: _logistic,
    members.squared: _squared,
    members.exponential: _exponential,
    members.savage: _savage,
    members.huber: _huber,
    members.truncated_quadratic: _truncated_quadratic,
}


def autograd_derivatives(loss: Callable[[Tensor], Tensor]) -> Derivatives:
    """f, f', f'' of any elementwise loss by autograd."""
    return lambda x: elementwise_derivatives(loss, x)


def written_out(loss: MarginLoss) -> Derivatives | None:
    """The built-in member's written-out derivatives with its parameters bound, else None (not checked)."""
    form = FORMS.get(getattr(loss, "fn", None))
    if form is None:
        return None
    params = dict(getattr(loss, "params", {}) or {})
    try:
        form(PROBES[:1], **params)
    except TypeError:  # a parameter the form does not take
        return None
    return lambda x: form(x, **params)


def agrees(derivatives: Derivatives, loss: Callable[[Tensor], Tensor]) -> bool:
    """Whether ``derivatives`` give autograd's f, f' and f'' of ``loss`` at :data:`PROBES`."""
    want = autograd_derivatives(loss)(PROBES)
    got = derivatives(PROBES)
    return all(a.shape == b.shape and bool(torch.all(torch.abs(a - b) <= AGREEMENT * (1.0 + a.abs())))
               for a, b in zip(want, got, strict=True))


def checked_form(loss: MarginLoss) -> Derivatives | None:
    """f, f', f'' of the margin loss f written out, where it is a built-in and they agree with autograd
    (:func:`agrees`); else None (the caller keeps autograd: :func:`autograd_derivatives`)."""
    form = written_out(loss)
    return form if form is not None and agrees(form, loss) else None
