"""From four log-probabilities to one scalar objective.

This module owns the only place where the margin is computed, and the only
place where per-pair losses are smoothed and reduced:

    h(x, y)  = log pi(y|x) - log pi_ref(y|x)                (log-ratio)
    rho      = h(x, y_w) - h(x, y_l)                          (margin)
    loss     = sum_k w_k [(1 - eps) ell(y_w, y_l)_k + eps ell(y_l, y_w)_k] / sum_k w_k

with optional per-pair weights ``w`` (exact mode passes the population win
weights) and label smoothing ``eps`` (the label is flipped with probability eps:
winner and loser swap, lengths included). ``ell`` is a pair objective
(:mod:`polopt.losses.registry`); for a margin loss ``f`` it is ``f(beta rho)`` (through
:func:`polopt.losses.registry.from_margin`), so the swapped pair gives ``f(-beta rho)``, bit for
bit the margin path of :func:`pair_losses`.

:func:`batch_loss` is the one call the training loop makes for a batch's loss (one process
or a rank's share under torchrun); :func:`batch_statistics` the margins' logged summary.
"""

from __future__ import annotations

from typing import NamedTuple

import torch

from polopt.losses.margin import Loss
from polopt.losses.registry import PairObjective, as_objective, check_values
from polopt.losses.scores import PairScores
from polopt.pairs import PairSet
from polopt.parallel import distributed

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
    return reduce(pair_losses(loss, rho, beta=beta, smoothing=smoothing), weights)


def reduce(values: Tensor, weights: Tensor | None = None) -> Tensor:
    """``sum_k w_k v_k / sum_k w_k``, or the plain mean when ``weights`` is None. (B,) -> scalar."""
    if weights is None:
        return values.mean()
    weights = weights.to(values.dtype)
    return (weights * values).sum() / weights.sum()


def scores(batch, logp_w: Tensor, logp_l: Tensor) -> PairScores:
    """The :class:`PairScores` of a batch (a PairSet) given the policy's log-probs (B,) of its
    winners and losers; lengths of 1 where the batch has none."""
    def length(t: Tensor | None) -> Tensor:
        return torch.ones_like(logp_w) if t is None else t.to(device=logp_w.device, dtype=logp_w.dtype)

    return PairScores(logp_w, logp_l, batch.reference_winner, batch.reference_loser,
                      length(getattr(batch, "len_winner", None)), length(getattr(batch, "len_loser", None)))


def swapped(pair: PairScores) -> PairScores:
    """The pair with winner and loser exchanged (the flipped label of smoothing)."""
    return PairScores(pair.loser, pair.winner, pair.ref_loser, pair.ref_winner, pair.len_loser, pair.len_winner)


def objective_values(loss: Loss | PairObjective, pair: PairScores, *, beta: float,
                     smoothing: float = 0.0) -> Tensor:
    """Per-pair losses ``(1 - eps) ell(pair) + eps ell(swapped pair)``, validated: a ValueError
    (one line) when ``ell`` does not return shape (B,). (B,) -> (B,).

    For a margin loss this is :func:`pair_losses` of the same margins, bit for bit."""
    objective = as_objective(loss)
    values = objective(pair, beta)
    check_values(objective.name, values, pair.winner.shape[0])
    if smoothing:
        flipped = objective(swapped(pair), beta)
        values = (1.0 - smoothing) * values + smoothing * flipped
    return values


def batch_losses(loss: Loss | PairObjective, batch, logp_w: Tensor, logp_l: Tensor, *, beta: float,
                 smoothing: float = 0.0) -> Tensor:
    """Per-pair losses (B,) of a batch (a PairSet) from the policy's log-probs of its winners and
    losers (B,), for a margin loss or a pair objective alike."""
    return objective_values(loss, scores(batch, logp_w, logp_l), beta=beta, smoothing=smoothing)


class BatchLoss(NamedTuple):
    """The loss of one batch: what to backpropagate, the loss to report and guard, the margins
    and the per-pair losses (for the non-finite report)."""

    objective: Tensor  # scalar: this rank's share under torchrun, else the loss itself
    value: Tensor  # scalar: the loss of the (global) batch
    rho: Tensor  # (B,) margins
    per_pair: Tensor  # (B,) unreduced losses


def batch_loss(loss: Loss | PairObjective, policy_winner: Tensor, policy_loser: Tensor, batch: PairSet, *,
               beta: float, smoothing: float = 0.0, total_weight=None,
               context: distributed.Context = distributed.SINGLE) -> BatchLoss:
    """The loss of ``batch`` from the policy's log-probs of its winners and losers, shape (B,) each.

    A margin loss or any pair objective (:func:`batch_losses`). One process: the weighted mean
    (:func:`reduce`). Several (``context.active``): this rank's share
    ``N S_r / W`` of the global weighted mean (derivation in :func:`polopt.parallel.distributed.sharded_mean`),
    ``total_weight`` being W, the global batch's weight sum.
    """
    rho = margins(policy_winner, policy_loser, batch.reference_winner, batch.reference_loser)  # (B,)
    values = batch_losses(loss, batch, policy_winner, policy_loser, beta=beta, smoothing=smoothing)  # (B,)
    if context.active:
        objective, value = distributed.sharded_mean(values, weight=batch.weight, total_weight=total_weight,
                                                    context=context)
        return BatchLoss(objective, value, rho, values)
    value = reduce(values, batch.weight)
    return BatchLoss(value, value, rho, values)


def batch_statistics(rho: Tensor, logratio_w: Tensor, logratio_l: Tensor, weight: Tensor | None,
                     context: distributed.Context | None = None) -> dict:
    """Weighted means of the margin, the share of pairs with a positive margin (ties count half), and
    the two log-ratios (both falling together is likelihood displacement); over the global
    batch of all ranks when ``context`` is given and active. Shapes: all (B,)."""
    if context is not None and context.active:
        return distributed.batch_statistics(rho, logratio_w, logratio_l, weight, context)
    w = torch.ones_like(rho) if weight is None else weight.to(rho.dtype)
    w = w / w.sum()
    return {
        "margin_mean": float((w * rho).sum()),
        "pair_accuracy": float((w * (torch.sign(rho) + 1) / 2).sum()),  # a tie (rho = 0) counts half
        "logratio_winner": float((w * logratio_w).sum()),
        "logratio_loser": float((w * logratio_l).sum()),
    }


def validate_hyperparameters(beta: float, smoothing: float = 0.0) -> None:
    """Raise a ValueError naming the field when beta or smoothing is out of range."""
    if not isinstance(beta, (int, float)) or isinstance(beta, bool) or not beta > 0 or beta != beta:
        raise ValueError(f"beta must be a number > 0 (e.g. beta=0.1), got {beta!r}")
    if not isinstance(smoothing, (int, float)) or not 0.0 <= smoothing < 0.5:
        raise ValueError(f"loss.smoothing must lie in [0, 0.5) (e.g. loss.smoothing=0.1), got {smoothing!r}")
