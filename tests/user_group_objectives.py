"""Group objectives written the way a user writes them, named by dotted path in the tests
(``loss=user_group_objectives:<name>``; tests/ is on the path in the tests)."""

from __future__ import annotations

import torch
import torch.nn.functional as F

from polopt.losses.group_objective import GroupScores

Tensor = torch.Tensor


def best_of_group_logistic(group, beta: float, *, margin: float = 0.0) -> Tensor:
    """The logistic loss of the best-ranked member against the mean implicit reward of the rest:
    ``-log sigma(beta h_best - mean_{others} beta h - margin)``."""
    s = beta * group.logratio  # (B, G)
    best = group.ranks == 0  # (B, G)
    others = (s * (~best)).sum(1) / (~best).sum(1)  # (B,)
    return F.softplus(-((s * best).sum(1) - others - margin))


def labelled_squared(group: GroupScores, beta: float) -> Tensor:
    """Squared distance of each member's implicit reward to +-1 by its label, averaged over the group."""
    target = 2.0 * group.labels - 1.0  # (B, G)
    return ((beta * group.logratio - target) ** 2).mean(1)


def detached_centre(group, beta: float) -> Tensor:
    """Labels against a batch mean held without gradient: a stop-gradient it does not declare."""
    h = group.logratio
    centre = h.mean().detach()
    return F.softplus(-(2.0 * group.labels - 1.0) * beta * (h - centre)).mean(1)


def one_loss_per_member(group, beta: float) -> Tensor:
    """A mistake: forgets to reduce over the members, returning (B, G)."""
    return F.softplus(-beta * group.logratio)


def three_arguments(group, beta, extra):
    """A mistake: a third positional parameter."""
    return group.logp.sum(1)
