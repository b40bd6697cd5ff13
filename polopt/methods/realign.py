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
token's logits (:func:`realigned_sequence_logprobs`, and :func:`realign` itself
at decoding time)::

    log pi_lambda(y_t | x, y_<t) = log_softmax((1 - lambda) l_ref + lambda l_beta)

with l the next-token logits. It is then an approximation: the chain-rule
product of the per-token mixtures is not the sequence-level mixture
``pi_ref^{1 - lambda} pi_beta^lambda / Z``, because each token's mixture is
renormalised on its own (only at lambda = 0 and 1 do the two agree). Its
error against the exact optimum and against retraining at beta / lambda is
measured on the enumerable sequence task (``polopt realign``).
"""

from __future__ import annotations

import torch
from torch import nn

from polopt.models.logprobs import pack, pick_tokens

Tensor = torch.Tensor


def realign(reference_logprobs: Tensor, trained_logprobs: Tensor, lam: float) -> Tensor:
    """log pi_lambda over the last dimension: (..., K) x 2 -> (..., K).

    The inputs may be log-probabilities or raw logits: the log-softmax removes
    any per-row constant, so both give the same result. Over a finite response
    set it is the sequence-level mixture; over a vocabulary, one token's.

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


def realigned_sequence_logprobs(reference: nn.Module, model: nn.Module, prompt: Tensor, response: Tensor,
                                lam: float, *, pad_id: int) -> Tensor:
    """log pi_lambda(response | prompt) under per-token mixing: (B, T_p), (B, T_r) -> (B,).

    Both models read the same packed tokens (:func:`polopt.models.logprobs.pack`); at
    each position their next-token logits are mixed by :func:`realign` and the
    response tokens' log-probabilities summed (the chain rule). Computed in the
    wider of the two models' dtypes, at least float32.
    """
    tokens, mask = pack(prompt, response, pad_id=pad_id)
    ref_logits = reference(tokens[:, :-1])  # (B, T-1, V)
    logits = model(tokens[:, :-1])  # (B, T-1, V)
    dtype = torch.promote_types(torch.promote_types(ref_logits.dtype, logits.dtype), torch.float32)
    mixed = realign(ref_logits.to(dtype), logits.to(dtype), lam)  # (B, T-1, V)
    return pick_tokens(mixed, tokens, mask).sum(dim=1)  # (B,)
