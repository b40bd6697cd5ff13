"""Pairwise members of the group family: losses of a (winner, loser) pair run on ranked groups.

Each is a pair function ``name(pair, beta, *, params...) -> (B,)`` of a
:class:`polopt.losses.pair.PairScores`; the registry (:mod:`polopt.losses.registry`) runs it on
ranking feedback through the pair adapter (a pair is the G = 2 ranking; a larger group's loss is the
mean over the pairs its ranking orders), so ``task.feedback=pairs`` and ``task.feedback=ranking``
both train it. Notation: ``h_w, h_l`` the log-ratios, ``rho = h_w - h_l`` the margin, ``sigma`` the
logistic function.

The stored copies of these papers return their abstracts only (see each docstring); the formulas
are written from memory where the docstring says so, and pinned in ``tests/losses/test_group.py``
by values computed by hand from the equation given here.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from polopt.losses.pair import PairScores, _exp_tail

Tensor = torch.Tensor


def flip_corrected_logistic(pair: PairScores, beta: float, *, flip_rate: float = 0.1) -> Tensor:
    """Noise-corrected DPO for labels flipped at a known rate epsilon.

    ``loss = [(1 - eps) l(beta rho) - eps l(-beta rho)] / (1 - 2 eps)`` with ``l(z) = -log sigma(z)``.
    Its expectation over labels flipped with probability eps is the clean logistic loss (the
    coefficient of ``l(beta rho)`` is ``(P' - eps) / (1 - 2 eps) = P``, P' = (1 - eps) P + eps (1 - P)),
    so its population optimum is the clean DPO optimum. Not convex per pair (the second term is
    concave); convex in population.

    References:
        Chowdhury et al., Provably Robust DPO: Aligning Language Models with Noisy Feedback, 2024
        (arXiv 2403.00409). Confirmed from a summary: an unbiased loss that de-biases random label
        flips at rate epsilon, with error bounds scaling as 1 / (1 - 2 epsilon). The formula is from
        memory; its unbiasedness is derived above and tested.
    """
    if not (isinstance(flip_rate, (int, float)) and 0.0 <= flip_rate < 0.5):
        raise ValueError(f"loss.flip_rate must lie in [0, 0.5) (e.g. loss.flip_rate=0.1), got {flip_rate!r}")
    return flip_corrected_of_margin(beta * (pair.logratio_winner - pair.logratio_loser), flip_rate)  # (B,)


def flip_corrected_of_margin(z: Tensor, flip_rate: float) -> Tensor:
    """:func:`flip_corrected_logistic` as a function of the scaled margin ``z = beta rho``, elementwise (the
    exact solver's score form reads it too)."""
    return ((1.0 - flip_rate) * F.softplus(-z) - flip_rate * F.softplus(z)) / (1.0 - 2.0 * flip_rate)


def calibrated_logistic(pair: PairScores, beta: float) -> Tensor:
    """Cal-DPO: the logistic loss of the log-ratio margin plus a calibration of each log-ratio.

    ``loss = -log sigma(h_w - h_l) + (h_w - 1 / (2 beta))^2 + (h_l + 1 / (2 beta))^2``: the squared
    terms hold the winner's log-ratio at ``r_w / beta`` and the loser's at ``r_l / beta`` for the
    rewards ``r = +-1/2``, so the implicit rewards keep a scale and the winner's likelihood cannot
    fall freely.

    References:
        Xiao et al., Cal-DPO: Calibrated Direct Preference Optimization for Language Model Alignment,
        2024 (arXiv 2412.14516, NeurIPS 2024). Confirmed from a summary: a squared calibration term
        added to the DPO objective aligns ``log pi / pi_ref`` with ``r / beta``. The targets +-1 /
        (2 beta) and the logistic term without beta are from memory.
    """
    hw, hl = pair.logratio_winner, pair.logratio_loser
    target = 1.0 / (2.0 * beta)
    return F.softplus(-(hw - hl)) + (hw - target) ** 2 + (hl + target) ** 2


def anchored_raise_lower(pair: PairScores, beta: float) -> Tensor:
    """APO-zero: raise the winner's and lower the loser's likelihood, each anchored at the reference.

    ``loss = 1 - sigma(beta h_w) + sigma(beta h_l)`` (the paper's ``-sigma(beta h_w) + sigma(beta h_l)``
    plus 1, so the loss is >= 0). Each term saturates, so the pull on a response fades as it moves
    away from the reference.

    References:
        D'Oosterlinck et al., Anchored Preference Optimization and Contrastive Revisions: Addressing
        Underspecification in Alignment, 2024 (arXiv 2408.06266; TACL). Confirmed from the
        abstract: APO is an anchored objective giving more control over the model. The formula is
        from memory (one secondary summary writes log-sigmoids instead; the paper could not be
        read to settle it).
    """
    return 1.0 - torch.sigmoid(beta * pair.logratio_winner) + torch.sigmoid(beta * pair.logratio_loser)


def anchored_lower_both(pair: PairScores, beta: float) -> Tensor:
    """APO-down: lower the winner's likelihood and lower the loser's more.

    ``loss = sigma(beta h_w) + 1 - sigma(beta (h_w - h_l))`` (the paper's ``sigma(beta h_w) -
    sigma(beta (h_w - h_l))`` plus 1): the first term pushes the winner down, the second keeps the
    margin growing, for data whose winners are worse than the model's own outputs.

    References:
        D'Oosterlinck et al., Anchored Preference Optimization and Contrastive Revisions, 2024
        (arXiv 2408.06266). From memory, as :func:`anchored_raise_lower`.
    """
    hw, hl = pair.logratio_winner, pair.logratio_loser
    return torch.sigmoid(beta * hw) + 1.0 - torch.sigmoid(beta * (hw - hl))


def logistic_exponential_blend(pair: PairScores, beta: float, *, tau: float = 0.05) -> Tensor:
    """DiscoPOP: the logistic and exponential losses blended by a sigmoid of the scaled margin.

    With ``x = beta rho``: ``loss = (1 - sigma(x / tau)) (-log sigma(x)) + sigma(x / tau) e^{-x}``.
    Below a margin of 0 it is nearly the logistic loss, above nearly the exponential one; the blend
    makes it non-convex. A function of the margin alone. ``e^{-x}`` keeps a linear tail beyond
    ``-x = 50`` so that values and gradients stay finite.

    References:
        Lu et al., Discovering Preference Optimization Algorithms with and for Large Language
        Models, 2024 (arXiv 2406.08414; NeurIPS 2024). Confirmed from the abstract: DiscoPOP
        adaptively blends logistic and exponential losses. The blend by sigma(x / tau), tau = 0.05,
        is from memory.
    """
    if not (isinstance(tau, (int, float)) and tau > 0):
        raise ValueError(f"loss.tau must be a number > 0 (e.g. loss.tau=0.05), got {tau!r}")
    return blend_of_margin(beta * (pair.logratio_winner - pair.logratio_loser), tau)  # (B,)


def blend_of_margin(x: Tensor, tau: float) -> Tensor:
    """:func:`logistic_exponential_blend` as a function of the scaled margin ``x = beta rho``, elementwise (the
    exact solver's score form reads it too)."""
    blend = torch.sigmoid(x / tau)
    return (1.0 - blend) * F.softplus(-x) + blend * _exp_tail(-x)
