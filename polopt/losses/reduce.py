"""The one loss path: from four log-probabilities to per-pair losses, and their one reduction.

This module owns the only place where the margin is computed, and the only place where per-pair
losses are smoothed and reduced:

    h(x, y)  = log pi(y|x) - log pi_ref(y|x)                (log-ratio)
    rho      = h(x, y_w) - h(x, y_l)                          (margin)
    loss     = sum_k w_k [(1 - eps) ell(y_w, y_l)_k + eps ell(y_l, y_w)_k] / sum_k w_k

with optional per-pair weights ``w`` (exact mode passes the population win weights) and label
smoothing ``eps`` (the label is flipped with probability eps: winner and loser swap, lengths
included). ``ell`` is any loss of the registry: a pair loss as it is, a margin loss ``f`` as
``f(beta rho)`` (:func:`polopt.losses.pair.as_pair_loss`), so the swapped pair gives ``f(-beta rho)``.

Every caller goes through :func:`per_pair_losses` and :func:`weighted_mean`: the training step
(:mod:`polopt.training.step`), the streamed and in-memory summaries, the methods and the exact
solvers' population losses. Groups take the same reduction: :func:`group_losses` is a group
objective's per-group losses, checked (no label smoothing: a group's feedback is no label to flip).
"""

from __future__ import annotations

import torch

from polopt.groups import GroupSet
from polopt.losses.group_objective import GroupObjective, GroupScores
from polopt.losses.margin import MarginLoss
from polopt.losses.pair import PairLoss, PairScores, as_pair_loss, check_values

Tensor = torch.Tensor


def margins(policy_winner: Tensor, policy_loser: Tensor,
            reference_winner: Tensor, reference_loser: Tensor) -> Tensor:
    """Log-ratio margins ``rho = (log pi(y_w) - log pi_ref(y_w)) - (log pi(y_l) - log pi_ref(y_l))``.

    Shape: all four inputs (B,), output (B,).

    References:
        Rafailov et al., Direct Preference Optimization, 2023, eq. 7.
    """
    return (policy_winner - reference_winner) - (policy_loser - reference_loser)


def pair_scores(batch, logp_w: Tensor, logp_l: Tensor) -> PairScores:
    """The :class:`PairScores` of a batch (a :class:`polopt.pairs.PairSet`) given the policy's
    log-probs (B,) of its winners and losers; lengths of 1 where the batch has none."""
    def length(t: Tensor | None) -> Tensor:
        return torch.ones_like(logp_w) if t is None else t.to(device=logp_w.device, dtype=logp_w.dtype)

    return PairScores(logp_w, logp_l, batch.reference_winner, batch.reference_loser,
                      length(getattr(batch, "len_winner", None)), length(getattr(batch, "len_loser", None)))


def per_pair_losses(loss: MarginLoss | PairLoss, pair: PairScores, *, beta: float,
                    smoothing: float = 0.0) -> Tensor:
    """Per-pair losses ``(1 - eps) ell(pair) + eps ell(swapped pair)``, validated: a ValueError
    (one line) when ``ell`` does not return shape (B,). (B,) -> (B,).

    For a margin loss ``f`` this is ``(1 - eps) f(beta rho) + eps f(-beta rho)``.
    """
    ell = as_pair_loss(loss)
    values = ell(pair, beta)
    check_values(ell.name, values, pair.winner.shape[0])
    if smoothing:
        values = (1.0 - smoothing) * values + smoothing * ell(pair.swapped(), beta)
    return values


def weighted_mean(values: Tensor, weights: Tensor | None = None) -> Tensor:
    """``sum_k w_k v_k / sum_k w_k``, or the plain mean when ``weights`` is None. (B,) -> scalar.

    ``weights`` need not be normalised."""
    if weights is None:
        return values.mean()
    weights = weights.to(values.dtype)
    return (weights * values).sum() / weights.sum()


def group_scores(batch: GroupSet, logp: Tensor) -> GroupScores:
    """The :class:`GroupScores` of a batch of groups given the policy's log-probs (B, G) of its members;
    lengths of 1 where the batch has none."""
    lengths = torch.ones_like(logp) if batch.lengths is None else batch.lengths.to(logp.dtype)
    return GroupScores(logp, batch.reference, lengths, batch.mask, batch.labels, batch.ranks, batch.scores,
                       batch.weight)


def group_losses(objective: GroupObjective, logp: Tensor, batch: GroupSet, *, beta: float) -> Tensor:
    """A group objective's per-group losses (B,) on a batch of groups from the policy's log-probs of its
    members, (B, G); a ValueError (one line) for a wrong shape. Reduce with :func:`weighted_mean`."""
    values = objective(group_scores(batch, logp), beta)  # (B,)
    check_values(objective.name, values, len(batch), unit="group")
    return values


def group_statistics(logratio: Tensor, mask: Tensor, weight: Tensor | None) -> dict:
    """The weighted mean log-ratio of the batch's present members. ``logratio``, ``mask`` (B, G);
    ``weight`` (B,)."""
    w = torch.ones(logratio.shape[0], dtype=logratio.dtype) if weight is None else weight.to(logratio.dtype)
    m = mask.to(logratio.dtype) * w[:, None]  # (B, G)
    return {"logratio_mean": float((m * logratio).sum() / m.sum())}


def validate_hyperparameters(beta: float, smoothing: float = 0.0) -> None:
    """Raise a ValueError naming the field when beta or smoothing is out of range."""
    if not isinstance(beta, (int, float)) or isinstance(beta, bool) or not beta > 0 or beta != beta:
        raise ValueError(f"beta must be a number > 0 (e.g. beta=0.1), got {beta!r}")
    if not isinstance(smoothing, (int, float)) or not 0.0 <= smoothing < 0.5:
        raise ValueError(f"loss.smoothing must lie in [0, 0.5) (e.g. loss.smoothing=0.1), got {smoothing!r}")
