"""Newton minimisation with exact derivatives and a step-length cap: the inner loop of the exact solvers.

Each iteration solves ``H p = -g`` by a Cholesky factorisation (torch.linalg.cholesky_ex, on torch's thread
count, so that a run's thread setting holds here too); where H is not positive definite, ``H + lam s I`` with
the smallest ``lam`` in 1e-10, 1e-9, ... that makes it so (s the largest |H_ii|: a modified Newton method,
Nocedal & Wright, Numerical Optimization, 2nd ed., 2006, section 3.4). The step taken is ``t p`` with
``t = min(1, radius / |p|)``, cut by four until Armijo's sufficient decrease ``f(x + t p) <= f(x) + c t g.p``
holds, c = 1e-4 (ibid., section 3.1). The radius follows the trust-region rule (ibid., Algorithm 4.1): the
ratio rho of the decrease obtained to the decrease the quadratic model promised halves it below 1/4 and
triples it above 3/4 where the cap bound the step. The cap keeps a nearly flat direction (a response of tiny
weight in a saturated logistic term, whose Newton step is enormous) from taking a huge step without damping
every other direction, as a Levenberg–Marquardt shift of the whole diagonal would. Where the decrease a step
promises is below what float64 resolves in f, the full step is taken blind and kept only if it shrinks the
gradient (Newton's local quadratic convergence does the rest).

It stops at ``max |g| <= tol``, after ``max_iterations``, when no step lowers f (the floor of float64), after
``patience`` iterations that did not halve the smallest gradient met, or (when asked) once ``stalled`` of
those iterations had their step cut (a kink, where no gradient vanishes and Newton circles): the caller
reads ``gradient`` to tell which.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import torch

Derivatives = Callable[[np.ndarray], tuple[float, np.ndarray, np.ndarray]]  # x -> f, g (n,), H (n, n)

ARMIJO = 1e-4  # sufficient-decrease constant c
SMALLEST_STEP = 2.0**-40  # the backtracking gives up below this step fraction t
FIRST_RADIUS = 5.0  # the first cap on a step's Euclidean length
SHRINK, GROW = 0.25, 0.75  # rho below SHRINK halves the radius; above GROW, with the cap binding, it triples
PATIENCE = 25  # iterations without halving the best gradient so far mean Newton circles a kink
POLISH = 3  # full Newton steps past the tolerance, each kept only if it shrinks the gradient
POLISHED = 1e-3  # no polishing below this fraction of the tolerance: the answers already agree far below it
RESOLVED = 1e-13  # a promised decrease below this times (1 + |f|) is not resolved by float64: step blind


@dataclass
class NewtonResult:
    """Where the minimisation stopped: ``x``, ``f(x)``, ``max |g(x)|`` and the iterations taken."""

    x: np.ndarray
    value: float
    gradient: float
    iterations: int


def newton_step(hessian: np.ndarray, gradient: np.ndarray, damping: float = 0.0) -> np.ndarray:
    """``-(H + lam s I)^{-1} g`` with the smallest ``lam >= damping`` in 0, 1e-10, 1e-9, ... (s the
    largest |H_ii|) that makes the matrix positive definite; the steepest-descent step if none does."""
    h, g = torch.as_tensor(hessian, dtype=torch.float64), torch.as_tensor(gradient, dtype=torch.float64)
    diagonal = h.diagonal().clone()  # (n,)
    scale = max(float(diagonal.abs().max()) if len(g) else 0.0, 1e-300)
    damped = h.clone()
    for lam in [damping] + [10.0**e for e in range(-10, 9) if 10.0**e > damping]:
        damped.diagonal().copy_(diagonal + lam * scale)
        factor, info = torch.linalg.cholesky_ex(damped)
        if int(info) != 0:
            continue
        step = -torch.cholesky_solve(g[:, None], factor)[:, 0]  # (n,)
        if bool(torch.isfinite(step).all()):
            return step.numpy()
    return -np.asarray(gradient, dtype=np.float64)


def _descent(hessian: np.ndarray, g: np.ndarray, damping: float) -> tuple[np.ndarray, float]:
    """The damped Newton step and its slope ``g.p`` (steepest descent where the step does not descend)."""
    step = newton_step(hessian, g, damping)
    slope = float(g @ step)
    if slope >= 0.0:
        step, slope = -g, -float(g @ g)
    return step, slope


def _accepted(value, x, f, step, slope) -> bool:
    return value(x + step) <= f + ARMIJO * slope


def _capped_step(value, x, f, step, slope, hessian, radius: float) -> tuple[np.ndarray | None, float, bool]:
    """``t step`` with t capped by the radius and cut by four until Armijo's rule holds: (the step or None, the
    next radius, whether the step was cut)."""
    norm = float(np.linalg.norm(step))
    t = min(1.0, radius / norm) if norm > 0 else 1.0
    cut = t < 1.0
    while True:
        moved = value(x + t * step)
        if moved <= f + ARMIJO * t * slope:
            break
        t, cut = t / 4.0, True
        if t < SMALLEST_STEP:
            return None, radius, True
    promised = -(t * slope + 0.5 * t * t * float(step @ (hessian @ step)))
    rho = (f - moved) / promised if promised > 0 else 0.0
    length = t * norm
    if rho < SHRINK:
        radius = max(0.5 * length, 1e-12)
    elif rho > GROW and length >= 0.99 * radius:
        radius = 3.0 * radius
    else:
        radius = max(radius, length)
    return t * step, radius, cut


def minimise(derivatives: Derivatives, value: Callable[[np.ndarray], float], x0: np.ndarray, *, tol: float,
             max_iterations: int, polish: int = POLISH, patience: int = PATIENCE, stalled: int | None = None
             ) -> NewtonResult:
    """Minimise f from ``x0`` (see the module docstring); ``derivatives(x) -> (f, g, H)``, ``value(x) -> f``.
    Once ``max |g| <= tol``, up to ``polish`` more full Newton steps are kept while each shrinks the
    gradient and it is above ``POLISHED tol``, so that two solvers meeting the same tolerance from different
    sides agree far below it.
    ``stalled``: stop once this many iterations since the smallest gradient last halved had their step cut
    (Newton circling a kink is cut about every other step; a smooth slow stretch seldom)."""
    x = np.array(x0, dtype=np.float64)
    blind = None  # (x, f, max |g|) before a blind step, to return to if it did not help
    polished = refused = 0
    radius = FIRST_RADIUS
    best, best_at = np.inf, 0  # the smallest gradient met and the iteration that halved the previous best
    for iteration in range(max_iterations + polish + 1):
        f, g, h = derivatives(x)
        size = float(np.abs(g).max(initial=0.0))
        if blind is not None and not size < blind[2]:
            return NewtonResult(blind[0], blind[1], blind[2], iteration)
        if size <= tol:
            if polished == polish or size <= POLISHED * tol:
                return NewtonResult(x, f, size, iteration)
            polished += 1
            blind, x = (x, f, size), x + newton_step(h, g)
            continue
        if size < 0.5 * best:
            best, best_at, refused = size, iteration, 0
        if iteration >= max_iterations or iteration - best_at > patience:
            return NewtonResult(x, f, size, iteration)
        step, slope = _descent(h, g, 0.0)
        if -slope < RESOLVED * (1.0 + abs(f)):
            blind, x = (x, f, size), x + step
            continue
        blind = None
        step, radius, was_cut = _capped_step(value, x, f, step, slope, h, radius)
        refused += was_cut
        if step is None or refused == stalled:
            return NewtonResult(x, f, size, iteration)
        x = x + step
    raise AssertionError("unreachable: the loop returns by max_iterations + polish")
