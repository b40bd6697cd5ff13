"""Margins through the one loss path: tests that start from margins rho (not four log-probabilities)
build the pairs whose margin is rho (winner log-ratio rho, loser log-ratio 0, every length 1) and
call :func:`polopt.losses.per_pair_losses` and :func:`polopt.losses.weighted_mean` as the trainer does."""

from __future__ import annotations

import torch

from polopt.losses import PairScores, per_pair_losses, weighted_mean


def pairs_with_margins(rho: torch.Tensor) -> PairScores:
    """Pairs whose margin is ``rho`` exactly: ``(rho - 0) - (0 - 0) = rho``. (B,) each."""
    zeros, ones = torch.zeros_like(rho), torch.ones_like(rho)
    return PairScores(rho, zeros, zeros, zeros, ones, ones)


def per_pair_of_margins(loss, rho: torch.Tensor, *, beta: float, smoothing: float = 0.0) -> torch.Tensor:
    """``(1 - eps) f(beta rho) + eps f(-beta rho)`` through the one loss path. (B,) -> (B,)."""
    return per_pair_losses(loss, pairs_with_margins(rho), beta=beta, smoothing=smoothing)


def loss_of_margins(loss, rho: torch.Tensor, *, beta: float, smoothing: float = 0.0,
                    weights: torch.Tensor | None = None) -> torch.Tensor:
    """The weighted mean of :func:`per_pair_of_margins`, a scalar."""
    return weighted_mean(per_pair_of_margins(loss, rho, beta=beta, smoothing=smoothing), weights)
