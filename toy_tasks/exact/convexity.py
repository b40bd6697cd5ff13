"""A proof that a pair objective's stationary point is its global and only minimiser, from its shape.

Where an objective's score form (:class:`toy_tasks.exact.scores.ScoreForm`) has the logistic link and
``affine`` scores, ``ell(a, b) = -log sigma(c_w a - c_l b + b_0) + t a`` on the winner's and loser's
log-probabilities a, b with one slope per response (``c_k``, e.g. ``beta`` for DPO, Rafailov et al. 2023,
and R-DPO, Park et al. 2024; ``beta / n_k`` for SimPO, Meng et al. 2024), the population loss
``f(l) = sum_{i != j} W_ij ell(l_i, l_j)`` is convex in the log-probabilities l: ``-log sigma`` is convex and
its argument affine (Boyd and Vandenberghe, Convex Optimization, 2004, section 3.2.2). Then:

- **global.** The set ``C = {l : sum_k e^{l_k} <= 1}`` is convex and holds every policy (its boundary). A
  point of the boundary is a minimiser of f over C when the KKT conditions hold (ibid., section 5.5.3;
  Slater's condition holds): ``grad f(l) + mu e^l = 0`` with ``mu >= 0``. A stationary point in the softmax
  logits has ``G = pi sum_k G_k`` (:mod:`toy_tasks.exact.prompt`), which is that condition with
  ``mu = -sum_k G_k``: so where ``sum_k G_k <= 0`` it minimises f over C, hence over the simplex.
- **unique.** If two policies l1 != l2 both minimise, f is constant on the segment between them (convexity),
  so ``v = l2 - l1`` has ``v^T H(l1) v = sum_{ij} W_ij sigma(x) sigma(-x) (c_i v_i - c_j v_j)^2 = 0``: on a connected
  win graph with every ``sigma(x) sigma(-x) > 0``, ``c_k v_k`` is one constant, so v is a multiple of ``1 / c``,
  of one sign where every ``c_k`` has one sign; then ``sum e^{l2} != sum e^{l1}`` unless v = 0, and both cannot
  be policies.

:func:`certificate` checks each premise on the prompt and the answer (the link, the declared affine scores,
their slopes read at the answer: one sign, equal for winner and loser, no curvature; the connected graph;
``sum G <= tol``) and returns None where one fails, so the solver runs its seeded starts there. A segment of
minimisers would have zero curvature along it at every inner point, hence at l1 by continuity of H.
"""

from __future__ import annotations

import numpy as np
import torch

from toy_tasks.exact import scores
from toy_tasks.exact.margin import weak_components

F64 = torch.float64
SLOPE_AGREEMENT = 1e-12  # the winner's and the loser's slopes agree to this (relative)


def certificate(prompt, log_pi: np.ndarray, *, tol: float) -> str | None:
    """Why the stationary point at log-probabilities ``log_pi`` (K,) of ``prompt`` (a
    :class:`toy_tasks.exact.prompt.PromptLoss`) is the global and only minimiser (the module docstring), or
    None where a premise fails. ``tol``: the largest ``sum_k G_k`` taken as <= 0 (the solver's certified
    residual: G's sum is a rounding error for an objective invariant to a shift of every l)."""
    terms = prompt.terms
    if not isinstance(terms, scores.DenseTerms):
        return None
    form = terms.form
    if not form.affine or form.link.fn is not None or form.link.clip is not None:
        return None
    if np.any(weak_components(prompt.w.numpy()) != 0):
        return None  # not one connected win graph (or a response with no pair)
    log_pi = torch.as_tensor(log_pi, dtype=F64)
    (_, winner_slope, winner_curve), (_, loser_slope, loser_curve), (_, _, term_curve) = terms._scores(log_pi, 2)
    slope_sign = torch.sign(winner_slope)
    if not (bool(torch.all(slope_sign == slope_sign[0])) and float(slope_sign[0]) != 0.0):
        return None
    if not bool(torch.all(torch.abs(winner_slope - loser_slope) <= SLOPE_AGREEMENT * winner_slope.abs())):
        return None
    if any(bool(torch.any(curve != 0)) for curve in (winner_curve, loser_curve, term_curve)):
        return None
    total = float(prompt.logpi_gradient(log_pi).sum())
    if total > tol:
        return None
    return (f"global and unique by convexity in the log-probabilities (logistic link of affine scores, "
            f"connected win graph, KKT multiplier -sum G = {-total:.3g} >= 0)")


# ------------------------------------------------------------------ group objectives

def _convex_group_members() -> dict:
    """The built-in group objectives convex in the log-probabilities, with why (each a convex function of
    affine functions of l, since h = l - log pi_ref): listwise DPO, ``sum_k logsumexp_{j >= k}(beta h_j) - beta
    h_k`` (Rafailov et al. 2023, appendix A.3); Cal-DPO, ``softplus(h_l - h_w)`` plus two squares (Xiao et al.
    2024), averaged over a ranking's pairs; InfoNCA, ``logsumexp(beta h) - sum_i q_i beta h_i`` with q the
    scores' softmax, q >= 0 (Chen et al. 2024)."""
    from polopt.losses import group, group_pairwise

    return {group.ranking_likelihood: "a log-sum-exp of affine terms minus an affine term",
            group_pairwise.calibrated_logistic: "a softplus of an affine margin plus two squares",
            group.score_cross_entropy: "a log-sum-exp minus a non-negative combination of affine terms"}


NULL_EIGENVALUE = 1e-10  # an eigenvalue of the Hessian below this times the largest counts as zero


def group_certificate(problem, z: np.ndarray, *, tol: float) -> str | None:
    """Why the stationary point at logits ``z`` (K,) of one prompt's group population ``problem`` (a separable
    :class:`toy_tasks.exact.groups._Population`) is its global and only minimiser, or None where a premise
    fails. The argument of the module docstring with the objective's convexity declared
    (:func:`_convex_group_members`) and uniqueness read from the Hessian H in the log-probabilities at the
    answer: positive definite, or positive semi-definite with one null direction whose vector has one sign
    (two minimisers would differ by a direction of zero curvature at either, and both cannot sum to one)."""
    objective = problem.objective
    why = _convex_group_members().get(objective.fn)
    if why is None or objective.stop_gradient or not problem.separable or problem.shape[0] != 1:
        return None
    log_pi = torch.log_softmax(torch.as_tensor(z, dtype=F64).reshape(problem.shape), dim=1)  # (1, K)
    _, gradient, hessian = problem.logpi_hessian(log_pi)
    total = float(gradient.sum())
    if total > tol:
        return None
    eigenvalues, vectors = torch.linalg.eigh(0.5 * (hessian + hessian.T))
    largest = float(eigenvalues.abs().max())
    if largest == 0.0 or float(eigenvalues[0]) < -NULL_EIGENVALUE * largest:
        return None  # not positive semi-definite here
    null = int((eigenvalues <= NULL_EIGENVALUE * largest).sum())
    if null > 1 or (null == 1 and not bool(torch.all(vectors[:, 0] > 0) or torch.all(vectors[:, 0] < 0))):
        return None
    return (f"global and unique by convexity in the log-probabilities ({why}; Hessian positive definite"
            f"{'' if null == 0 else ' but for one one-signed direction'}; KKT multiplier -sum G = {-total:.3g} >= 0)")
