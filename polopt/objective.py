"""From four log-probabilities to one scalar objective.

This module owns the only place where the margin is computed, and the only
place where per-pair losses are reduced:

    h(x, y)  = log pi(y|x) - log pi_ref(y|x)                (log-ratio)
    rho      = h(x, y_w) - h(x, y_l)                          (margin)
    loss     = sum_k w_k [(1 - eps) f(beta rho_k) + eps f(-beta rho_k)] / sum_k w_k

with optional per-pair weights ``w`` (exact mode passes the population win
weights) and label smoothing ``eps`` (the label is flipped with probability eps).
"""

from __future__ import annotations

import torch

from polopt.losses import Loss

Tensor = torch.Tensor


def margins(policy_winner: Tensor, policy_loser: Tensor,
            reference_winner: Tensor, reference_loser: Tensor) -> Tensor:
    """Log-ratio margins ``rho = (log pi(y_w) - log pi_ref(y_w)) - (log pi(y_l) - log pi_ref(y_l))``.

    Shape: all four inputs (B,), output (B,).

    References:
        Rafailov et al., Direct Preference Optimization, 2023, eq. 7.
    """
    return (policy_winner - reference_winner) - (policy_loser - reference_loser)


def pair_losses(loss: Loss, rho: Tensor, *, beta: float, smoothing: float = 0.0) -> Tensor:
    """Unreduced per-pair losses ``(1 - eps) f(beta rho) + eps f(-beta rho)``. Shape (B,) -> (B,)."""
    x = beta * rho
    values = loss(x)
    if smoothing:
        values = (1.0 - smoothing) * values + smoothing * loss(-x)
    return values


def preference_loss(loss: Loss, rho: Tensor, *, beta: float, smoothing: float = 0.0,
                    weights: Tensor | None = None) -> Tensor:
    """Weighted mean of :func:`pair_losses` over the batch; a scalar.

    ``weights`` (B,) need not be normalised; None means equal weights.
    """
    values = pair_losses(loss, rho, beta=beta, smoothing=smoothing)
    if weights is None:
        return values.mean()
    weights = weights.to(values.dtype)
    return (weights * values).sum() / weights.sum()


def validate_hyperparameters(beta: float, smoothing: float = 0.0) -> None:
    """Raise a ValueError naming the field when beta or smoothing is out of range."""
    if not isinstance(beta, (int, float)) or isinstance(beta, bool) or not beta > 0 or beta != beta:
        raise ValueError(f"beta must be a number > 0 (e.g. beta=0.1), got {beta!r}")
    if not isinstance(smoothing, (int, float)) or not 0.0 <= smoothing < 0.5:
        raise ValueError(f"loss.smoothing must lie in [0, 0.5) (e.g. loss.smoothing=0.1), got {smoothing!r}")
