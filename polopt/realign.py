"""Decoding-time realignment: emulate a different beta from one trained policy, without retraining.

Mix the reference's and the trained policy's log-probabilities with a weight
lambda and renormalise::

    log pi_lambda = log_softmax((1 - lambda) log pi_ref + lambda log pi_beta),
    i.e. pi_lambda ∝ pi_ref^{1 - lambda} pi_beta^lambda ∝ pi_ref e^{lambda h}.

On a finite task the population loss depends on h only through beta h, so its
minimiser is h*(beta) = u* / beta for a u* that does not depend on beta; hence
lambda h*(beta) = h*(beta / lambda) and pi_lambda is *exactly* the optimum at
beta / lambda, for every loss of the family with a unique optimum (for the
logistic loss on Bradley–Terry: pi_ref e^{lambda r / beta}; Liu et al.,
Decoding-time Realignment of Language Models, 2024). lambda = 0 is the
reference, lambda = 1 the trained policy, lambda > 1 extrapolates (less
regularised). For autoregressive models the same mixing is applied to each
token's logits; it is then an approximation, whose error against retraining is
measured on the sequence task.
"""

from __future__ import annotations

import torch

Tensor = torch.Tensor


def realign(reference_logprobs: Tensor, trained_logprobs: Tensor, lam: float) -> Tensor:
    """log pi_lambda over the last dimension: (..., K) x 2 -> (..., K).

    Raises:
        ValueError: lambda not a finite number >= 0.
    """
    if isinstance(lam, bool) or not isinstance(lam, (int, float)) or not 0.0 <= lam < float("inf"):
        raise ValueError(f"realign lambda must be a finite number >= 0 (0: the reference, 1: the trained "
                         f"policy), got {lam!r}")
    mixed = (1.0 - lam) * reference_logprobs + lam * trained_logprobs  # (..., K)
    return torch.log_softmax(mixed, dim=-1)


def equivalent_beta(beta: float, lam: float) -> float:
    """The regularisation that realignment by ``lam`` emulates: beta / lambda (inf at lambda = 0)."""
    return beta / lam if lam > 0 else float("inf")
