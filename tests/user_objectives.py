"""Pair objectives written the way a user writes them, for the exact-optimum tests.

Each is a plain function ``name(pair, beta) -> Tensor`` of per-pair losses (shape (B,)), with
``pair`` a :class:`polopt.losses.pair.PairScores`. Named by dotted path as
``loss=user_objectives:<name>`` (tests/ is on the path in the tests). The divergence members carry
their ``f'`` as ``ratio_link`` so that the solver can use the closed form of Wang et al. 2023.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from polopt.losses.pair import PairScores

Tensor = torch.Tensor

SIMPO_GAMMA = 0.5  # target reward margin; the SimPO authors' released runs use 0.25 to 1.6 (their README)
ANCHOR_WEIGHT = 2.0
SUPERVISED_WEIGHT = 0.3
ALPHA = 0.5


def length_normalised_reference_free(pair: PairScores, beta: float) -> Tensor:
    """SimPO-style: ``-log sigmoid(beta (log pi_w / n_w - log pi_l / n_l) - gamma)``.

    References:
        Meng et al., SimPO: Simple Preference Optimization with a Reference-Free Reward, 2024.
    """
    reward_gap = beta * (pair.winner / pair.len_winner - pair.loser / pair.len_loser)  # (B,)
    return F.softplus(-(reward_gap - SIMPO_GAMMA))  # softplus(-x) = -log sigmoid(x), stable


def winner_anchored(pair: PairScores, beta: float) -> Tensor:
    """DPO's logistic margin loss plus an anchor that keeps the winner's log-ratio from falling:
    ``-log sigmoid(beta rho) - lambda log sigmoid(beta h_w)`` (a smooth stand-in for the hinge
    anchor of DPO-Positive; Pal et al., Smaug: Fixing Failure Modes of Preference Optimisation
    with DPO-Positive, 2024)."""
    rho = pair.logratio_winner - pair.logratio_loser  # (B,)
    return F.softplus(-beta * rho) + ANCHOR_WEIGHT * F.softplus(-beta * pair.logratio_winner)


def logistic_with_winner_likelihood(pair: PairScores, beta: float) -> Tensor:
    """The logistic margin loss plus a length-normalised negative log-likelihood of the winner
    (the supervised term of CPO, Xu et al. 2024; ORPO, Hong et al. 2024, adds one too)."""
    rho = pair.logratio_winner - pair.logratio_loser
    return F.softplus(-beta * rho) - SUPERVISED_WEIGHT * pair.winner / pair.len_winner


def _divergence(link):
    """The f-divergence DPO loss ``-log sigmoid(beta f'(pi_w / ref_w) - beta f'(pi_l / ref_l))`` for
    ``link = f'`` (Wang et al., Beyond Reverse KL, 2023; checked against the
    authors' code, see polopt.losses.pair)."""

    def objective(pair: PairScores, beta: float) -> Tensor:
        u_w, u_l = pair.logratio_winner.exp(), pair.logratio_loser.exp()  # (B,) probability ratios
        return F.softplus(-beta * (link(u_w) - link(u_l)))

    objective.ratio_link = link
    return objective


reverse_kl = _divergence(lambda u: torch.log(u) + 1.0)  # f(u) = u log u: DPO
forward_kl = _divergence(lambda u: -1.0 / u)  # f(u) = -log u
jensen_shannon = _divergence(lambda u: torch.log(2.0 * u / (1.0 + u)))  # f(u) = u log u - (1+u) log((1+u)/2)
alpha_divergence = _divergence(lambda u: (1.0 - u ** (-ALPHA)) / ALPHA)  # f(u) = (u^{1-a} - (1-a) u - a)/(a(a-1))


def wrong_shape(pair: PairScores, beta: float) -> Tensor:
    """A mistake: reduces over the batch itself."""
    return F.softplus(-beta * (pair.logratio_winner - pair.logratio_loser)).mean()
