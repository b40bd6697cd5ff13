"""Optima at a kink: objectives with a term such as max(0, -h_w) (DPO-Positive's anchor, Pal et al., Smaug:
Fixing Failure Modes of Preference Optimisation with DPO-Positive, 2024) are not differentiable where a
response's log-ratio is 0, and their optimum often sits there, so no gradient vanishes at it.

The search is an active-set method: responses whose log-ratio Newton left within :data:`KINK_BAND` of 0
are *pinned* at the reference and the rest minimised by Newton in their own softmax chart
(:class:`toy_tasks.exact.prompt.Chart`); free responses that land on a kink of their own are pinned
too; every pinned response that a transfer of mass can still improve is released on its descent side
(all of them at once, one pair at a time where a round of releases did not lower L). The certificate
is the largest of the free gradient and the steepest one-sided descent over every transfer of mass
between two responses. The one-sided partial derivatives of L in each log-probability come from the
per-pair gradients with that argument shifted by +-t (Richardson-extrapolated, error O(t^2)): 8 passes
over the pairs, where difference quotients of L took 4K evaluations of L.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import torch

from toy_tasks.exact.newton import ARMIJO, SMALLEST_STEP, newton_step
from toy_tasks.exact.prompt import F64, PromptLoss

KINK_BAND = 1e-4  # log-ratios this close to 0 are taken to sit at an anchor term's kink
SLOPE_AGREEMENT = 1e-6  # a transfer's measured slope and the one its one-sided partials predict agree this well
PARTIAL_STEP = 1e-6  # the shift t of the one-sided partials
PROJECTED_TRIES = 4  # step lengths 1, 1/2, 1/4, 1/8 tried with the crossed responses put on their kinks
RELEASE_OFFSET = 10 * KINK_BAND  # a released response starts this far off its kink, on the descent side


def richardson(quotient: Callable[[float], float | np.ndarray], step: float):
    """``2 q(step / 2) - q(step)``: a one-sided quotient or derivative q(t) with its O(t) error removed."""
    return 2.0 * quotient(step / 2) - quotient(step)


def one_sided_partials(prompt: PromptLoss, log_pi: np.ndarray, step: float = PARTIAL_STEP
                       ) -> tuple[np.ndarray, np.ndarray]:
    """L's one-sided partial derivatives in each log-probability at ``log_pi`` (K,): ``up[k]`` as log pi_k
    rises, ``down[k]`` as it falls (both as rates of change per unit of log pi_k, so that they agree
    where L is smooth). A pair's term reads log pi_k as its winner or its loser argument, so the
    partial in log pi_k is the sum of the per-pair derivatives with that argument shifted by t."""
    def partial(t: float) -> np.ndarray:
        return prompt.logpi_gradient(log_pi, t).numpy()

    return richardson(partial, step), richardson(partial, -step)


def transfer_slopes(prompt: PromptLoss, log_pi: np.ndarray, partials: tuple[np.ndarray, np.ndarray] | None = None
                    ) -> np.ndarray:
    """One-sided derivatives (K, K) of L when mass ``t pi_j`` moves from response j to response i
    (t -> 0+); the diagonal (no move) is +inf, so that it is never the steepest.

    The move raises log pi_i at rate pi_j / pi_i and lowers log pi_j at rate 1. A kink that is a
    function of one response's log-ratio composed into smooth terms makes L's directional derivative
    the sum of one-sided partials along each coordinate: ``slope[i, j] = (pi_j / pi_i) up_i - down_j``.
    The steepest transfer found is then measured directly (:func:`measured_slope`), so a kink of
    another shape is caught rather than trusted."""
    pi = np.exp(log_pi)
    up, down = one_sided_partials(prompt, log_pi) if partials is None else partials
    slopes = np.outer(up / pi, pi) - down[None, :]
    np.fill_diagonal(slopes, np.inf)
    return slopes


def measured_slope(prompt: PromptLoss, log_pi: np.ndarray, i: int, j: int, step: float = PARTIAL_STEP) -> float:
    """The one-sided derivative of L along the transfer of mass ``t pi_j`` from j to i, measured by
    Richardson-extrapolated forward differences of L itself."""
    pi, base = np.exp(log_pi), prompt.value_at(log_pi)

    def slope(t):
        moved = pi.copy()
        moved[i], moved[j] = pi[i] + t * pi[j], pi[j] * (1.0 - t)
        return (prompt.value_at(np.log(moved)) - base) / t

    return richardson(slope, step)


def _releases(pinned: np.ndarray, slopes: np.ndarray, tol: float, one_pair: tuple[int, int] | None
              ) -> tuple[np.ndarray, np.ndarray]:
    """The pinned responses to release upwards (mass in) and downwards (mass out): every pinned one
    with a descending transfer, on its steeper side; or only the steepest pair ``one_pair``."""
    if one_pair is not None:
        up, down = np.zeros_like(pinned), np.zeros_like(pinned)
        up[one_pair[0]], down[one_pair[1]] = True, True
        return up, down
    gain, give = slopes.min(axis=1), slopes.min(axis=0)  # steepest transfer into / out of each response
    up = pinned & (gain < -tol) & (gain <= give)
    down = pinned & (give < -tol) & ~up
    return up, down


def _first_kink(chart, y: np.ndarray, step: np.ndarray, h: np.ndarray) -> float:
    """The step length t in (0, 1] at which a free response's log-ratio first reaches 0 along y + t step,
    to first order (``d h_f / dt = step_f - q . step``, q the free shares); 1 where none does."""
    q = torch.softmax(torch.as_tensor(y, dtype=F64), 0).numpy()
    rate = step - q @ step  # (F,)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = -h / rate
    towards = (t > 0) & np.isfinite(t)
    return float(min(1.0, t[towards].min(initial=1.0)))


def _projected(prompt: PromptLoss, pinned: np.ndarray, h_before: np.ndarray, h_after: np.ndarray
               ) -> tuple[np.ndarray, np.ndarray]:
    """Log-ratios after a step with every free response that crossed its kink (or came within
    :data:`KINK_BAND` of it) put on it, the other free ones sharing the rest of the mass: (h, pinned)."""
    crossed = ~pinned & ((np.sign(h_after) != np.sign(h_before)) | (np.abs(h_after) < KINK_BAND))
    now = pinned | crossed
    out = np.zeros_like(h_after)
    if not now.all():
        log_ref = prompt.log_ref.numpy()
        chart = prompt.chart(now)
        out[~now] = chart.log_policy(h_after[~now] + log_ref[~now]).numpy()[~now] - log_ref[~now]
    return out, now


def _newton_iteration(prompt: PromptLoss, pinned: np.ndarray, h: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """One Newton step of the pinned problem from log-ratios h: the full or halved step with the free
    responses it carried across their kinks put on them (projected Newton, Bertsekas 1982), where that
    lowers L enough; else the step cut at the first kink it reaches and then by Armijo's rule.
    Returns the new log-ratios, the new pinned set and the free gradient before the step."""
    log_ref = prompt.log_ref.numpy()
    chart = prompt.chart(pinned)
    y = h[~pinned] + log_ref[~pinned]
    y = y - y.mean()  # the gauge term vanishes at sum y = 0, so the gauged and plain derivatives agree
    f, g, hess = chart.gauged_derivatives(y)
    size = float(np.abs(g).max())
    step = newton_step(hess, g)
    slope = float(g @ step)
    if slope >= 0.0:
        step, slope = -g, -float(g @ g)

    def after(t):  # log-ratios (K,) after the step of length t, nothing projected
        out = np.zeros_like(h)
        out[~pinned] = chart.log_policy(y + t * step).numpy()[~pinned] - log_ref[~pinned]
        return out

    t = 1.0
    for _ in range(PROJECTED_TRIES):
        h_new, now = _projected(prompt, pinned, h, after(t))
        if now.sum() > pinned.sum() and prompt.value_at(log_ref + h_new) <= f + ARMIJO * t * slope:
            return h_new, now, size
        t /= 2.0
    t = _first_kink(chart, y, step, h[~pinned])
    while t >= SMALLEST_STEP and not chart.gauged_value(y + t * step) <= f + ARMIJO * t * slope:
        t /= 2.0
    if t < SMALLEST_STEP:
        return h, pinned, size
    h_new = after(t)
    now = pinned | (np.abs(h_new) < KINK_BAND)
    h_new[now] = 0.0
    return h_new, now, size


def _certificate(prompt: PromptLoss, log_pi: np.ndarray
                 ) -> tuple[np.ndarray, float, tuple[int, int], np.ndarray] | None:
    """Transfer slopes (K, K), the steepest one-sided descent over every transfer of mass, the
    steepest pair (j -> i), and which responses sit at a kink (their two one-sided partials differ);
    None where a kink is not a function of one log-ratio (the one-sided partials do not predict the
    measured slope of the steepest transfer)."""
    up, down = one_sided_partials(prompt, log_pi)
    at_kink = np.abs(up - down) > SLOPE_AGREEMENT * (1.0 + np.abs(up))
    slopes = transfer_slopes(prompt, log_pi, (up, down))
    i, j = np.unravel_index(int(slopes.argmin()), slopes.shape)  # the steepest transfer: j -> i
    measured = measured_slope(prompt, log_pi, i, j)
    if abs(measured - slopes[i, j]) > SLOPE_AGREEMENT * (1.0 + abs(measured)):
        return None
    return slopes, -min(0.0, slopes.min(), measured), (int(i), int(j)), at_kink


def search(prompt: PromptLoss, z: np.ndarray, *, tol: float, gradient_tol: float, max_iterations: int
           ) -> dict | None:
    """The kinked optimum from where Newton stopped at logits z (see the module docstring): projected
    Newton on the free responses, a response pinned when a step lands it within :data:`KINK_BAND` of its
    kink, pinned responses released by the transfer slopes once the free gradient is below
    ``gradient_tol``. Returns the answer with its certificate (``smooth``: no pinned response sits at a
    kink, so plain Newton can polish it), or None when it does not certify."""
    log_ref = prompt.log_ref.numpy()
    h = torch.log_softmax(torch.as_tensor(z, dtype=F64), 0).numpy() - log_ref
    pinned = np.abs(h) < KINK_BAND
    h[pinned] = 0.0
    previous, one_at_a_time, since_release = np.inf, False, 0
    for _ in range(max_iterations * 10):
        free_gradient = 0.0
        if not pinned.all():
            h, pinned, free_gradient = _newton_iteration(prompt, pinned, h)
            since_release += 1
            if free_gradient > gradient_tol and since_release < max_iterations:
                continue
        log_pi = log_ref + h
        log_pi = log_pi - np.logaddexp.reduce(log_pi)
        found = _certificate(prompt, log_pi)
        if found is None:
            return None
        slopes, descent, (i, j), at_kink = found
        value = prompt.value_at(log_pi)
        if descent <= tol and free_gradient <= tol:
            z_out = log_pi - log_pi.mean()
            return {"z": z_out, "value": value, "residual": max(free_gradient, descent), "finite": True,
                    "support": None, "smooth": not (pinned & at_kink).any()}
        one_at_a_time |= not value < previous  # a round of releases that did not help: one pair at a time
        previous, since_release = value, 0
        up, down = _releases(pinned, slopes, tol, (i, j) if one_at_a_time else None)
        if not (up | down).any() or one_at_a_time and not (pinned[i] or pinned[j]):
            return None
        pinned &= ~(up | down)
        h = h + RELEASE_OFFSET * (up.astype(float) - down.astype(float))
    return None
