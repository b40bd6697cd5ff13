"""One batch's loss and statistics: on one process, or a rank's share under torchrun.

:func:`batch_loss` is the one call the training loop makes for a batch's loss; it goes through
the one loss path (:func:`polopt.losses.reduce.per_pair_losses`, then
:func:`polopt.losses.reduce.weighted_mean` or, with several processes, the rank's share of the
global weighted mean). :func:`batch_statistics` is the margins' logged summary.
"""

from __future__ import annotations

from typing import NamedTuple

import torch

from polopt.losses.margin import MarginLoss
from polopt.losses.pair import PairLoss
from polopt.losses.reduce import margins, pair_scores, per_pair_losses, weighted_mean
from polopt.pairs import PairSet
from polopt.parallel import distributed

Tensor = torch.Tensor


class BatchLoss(NamedTuple):
    """The loss of one batch: what to backpropagate, the loss to report and guard, the margins
    and the per-pair losses (for the non-finite report)."""

    share: Tensor  # scalar to backpropagate: this rank's share under torchrun, else the loss itself
    value: Tensor  # scalar: the loss of the (global) batch
    rho: Tensor  # (B,) margins
    per_pair: Tensor  # (B,) unreduced losses


def batch_loss(loss: MarginLoss | PairLoss, policy_winner: Tensor, policy_loser: Tensor, batch: PairSet, *,
               beta: float, smoothing: float = 0.0, total_weight=None,
               context: distributed.Context = distributed.SINGLE) -> BatchLoss:
    """The loss of ``batch`` from the policy's log-probs of its winners and losers, shape (B,) each.

    One process: the weighted mean. Several (``context.active``): this rank's share
    ``N S_r / W`` of the global weighted mean (derivation in :func:`polopt.parallel.distributed.sharded_mean`),
    ``total_weight`` being W, the global batch's weight sum.
    """
    rho = margins(policy_winner, policy_loser, batch.reference_winner, batch.reference_loser)  # (B,)
    values = per_pair_losses(loss, pair_scores(batch, policy_winner, policy_loser), beta=beta,
                             smoothing=smoothing)  # (B,)
    if context.active:
        share, value = distributed.sharded_mean(values, weight=batch.weight, total_weight=total_weight,
                                                context=context)
        return BatchLoss(share, value, rho, values)
    value = weighted_mean(values, batch.weight)
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
