"""The Nash equilibrium of the KL-regularised preference game, solved independently of any trainer.

The game, per prompt (Munos et al., Nash Learning from Human Feedback, 2023)::

    max_pi min_pi'  P(pi > pi') - tau KL(pi || pi_ref) + tau KL(pi' || pi_ref),
    P(pi > pi') = pi^T P pi' = sum_{i,j} pi_i P[i,j] pi'_j.

It is symmetric (P + P^T = 1) and strongly concave-convex, so its equilibrium
is unique and symmetric, (pi*, pi*), and a fixed point of the regularised best
response::

    pi*(y) ∝ pi_ref(y) exp(P(y > pi*) / tau),   P(y > pi) = sum_j P[y, j] pi(j).

Relation to the kit's beta: the squared loss ``(beta rho - 1)^2 = beta^2 (rho - 1/beta)^2``
is IPO's ``(rho - 1/(2 tau))^2`` with ``tau = beta / 2`` (Azar et al., A General
Theoretical Paradigm to Understand Learning from Human Preferences, 2023). IPO's
optimum against a sampling distribution mu is ``pi ∝ pi_ref exp(P(y > mu) / tau)``;
self-play samples mu = pi, whose fixed point is exactly the equilibrium above
with ``tau = beta / 2`` (Calandriello et al., Human Alignment of Large Language
Models through Online Preference Optimisation, 2024). :func:`tau_of_beta` says so
in code.

Residual: the duality gap at the symmetric profile (pi, pi)::

    gap(pi) = max_q f(q, pi) - min_q f(pi, q)
            = 2 [max_q (q^T P pi - tau KL(q)) - (1/2 - tau KL(pi))]     (pi^T P pi = 1/2)
            = 2 tau KL(pi || BR(pi)),   BR(pi) ∝ pi_ref exp(P pi / tau),

zero exactly at the equilibrium and >= 0 everywhere.

Solver: mirror-prox (Nemirovski, Prox-method with rate of convergence O(1/t)...,
2004) in the entropy geometry, run on the symmetric profile (both players'
updates coincide because P^T pi = 1 - P pi), then Newton's method on the
fixed-point equation ``g = P softmax(log pi_ref + g) / tau`` (scipy.optimize.root)
to polish; stopped when the duality gap is below ``tolerance``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.optimize
import scipy.special

GAP_TOLERANCE = 1e-13


@dataclass
class Equilibrium:
    """The regularised game's equilibrium per prompt.

    Attributes:
        policy: (X, K) pi*.
        tau: the game's regularisation.
        gap: the largest duality gap over prompts at ``policy`` (see the module docstring).
        iterations: mirror-prox iterations used (the Newton polish comes on top).
        method: how it was found.
    """

    policy: np.ndarray
    tau: float
    gap: float
    iterations: int
    method: str


def tau_of_beta(beta: float) -> float:
    """The game's tau for the squared loss at ``beta``: tau = beta / 2 (Azar et al. 2023)."""
    return beta / 2.0


def best_response(policy: np.ndarray, reference: np.ndarray, preference: np.ndarray, tau: float) -> np.ndarray:
    """BR(pi) ∝ pi_ref exp(P pi / tau) per prompt. Shapes (X, K), (X, K), (X, K, K) -> (X, K)."""
    win = np.einsum("xij,xj->xi", preference, policy)  # (X, K): P(y > pi)
    return scipy.special.softmax(np.log(reference) + win / tau, axis=1)


def duality_gap(policy: np.ndarray, reference: np.ndarray, preference: np.ndarray, tau: float) -> np.ndarray:
    """gap(pi) = 2 tau KL(pi || BR(pi)) per prompt, (X,); 0 exactly at the equilibrium."""
    br = best_response(policy, reference, preference, tau)
    return 2.0 * tau * scipy.special.rel_entr(policy, br).sum(axis=1)


def _mirror_prox(reference: np.ndarray, preference: np.ndarray, tau: float, eta: float,
                 iterations: int, tolerance: float) -> tuple[np.ndarray, int]:
    """Entropic mirror-prox on one prompt's symmetric profile.

    One mirror step with gradient g from the point p: the KL-regularised step
    ``log p' = (1 - eta tau) log p + eta tau log pi_ref + eta g`` (the regulariser
    handled exactly, the bilinear part linearised; eta tau < 1).
    """
    log_ref = np.log(reference)
    log_p = log_ref.copy()

    def step(log_from: np.ndarray, at: np.ndarray) -> np.ndarray:
        z = (1.0 - eta * tau) * log_from + eta * tau * log_ref + eta * (preference @ at)
        return z - scipy.special.logsumexp(z)

    for t in range(1, iterations + 1):
        half = step(log_p, np.exp(log_p))
        log_p = step(log_p, np.exp(half))
        if t % 50 == 0 and duality_gap(np.exp(log_p)[None], reference[None], preference[None], tau)[0] < tolerance:
            return np.exp(log_p), t
    return np.exp(log_p), iterations


def _newton_polish(p: np.ndarray, reference: np.ndarray, preference: np.ndarray, tau: float) -> np.ndarray:
    """Solve ``g = P softmax(log pi_ref + g) / tau`` for g (K equations, K unknowns) from
    the mirror-prox point; the equilibrium is softmax(log pi_ref + g)."""
    log_ref = np.log(reference)

    def residual(g):
        pi = scipy.special.softmax(log_ref + g)
        jac_softmax = np.diag(pi) - np.outer(pi, pi)
        return g - preference @ pi / tau, np.eye(len(g)) - preference @ jac_softmax / tau

    result = scipy.optimize.root(residual, preference @ p / tau, jac=True, method="hybr", options={"xtol": 1e-15})
    return scipy.special.softmax(log_ref + result.x)


def nash_equilibrium(reference: np.ndarray, preference: np.ndarray, *, tau: float,
                     tolerance: float = GAP_TOLERANCE, max_iterations: int = 200_000) -> Equilibrium:
    """The equilibrium of the regularised preference game (module docstring), per prompt.

    Args:
        reference: (X, K) or (K,) pi_ref, > 0.
        preference: (X, K, K) or (K, K) P with P + P^T = 1.
        tau: > 0, the game's regularisation (``tau_of_beta(beta)`` for self-play at beta).
        tolerance: stop when the duality gap is below this.

    Raises:
        ValueError: tau not > 0.
    """
    if not tau > 0:
        raise ValueError(f"tau must be > 0, got {tau!r}")
    reference = np.atleast_2d(np.asarray(reference, dtype=np.float64))
    preference = np.asarray(preference, dtype=np.float64)
    if preference.ndim == 2:
        preference = preference[None]
    eta = 0.5 / max(tau, 1.0)  # eta tau <= 1/2 and eta times the bilinear part's Lipschitz constant (<= 1) <= 1/2
    out, used = np.empty_like(reference), 0
    for x in range(reference.shape[0]):
        p, t = _mirror_prox(reference[x], preference[x], tau, eta, max_iterations, tolerance)
        polished = _newton_polish(p, reference[x], preference[x], tau)
        gaps = duality_gap(np.stack([p, polished]), reference[[x, x]], preference[[x, x]], tau)
        out[x] = polished if gaps[1] <= gaps[0] else p
        used = max(used, t)
    gap = max(float(duality_gap(out, reference, preference, tau).max()), 0.0)  # rounding can dip below 0
    return Equilibrium(out, float(tau), gap, used,
                       f"mirror-prox ({used} iterations) + Newton polish (scipy root), duality gap {gap:.1e}")
