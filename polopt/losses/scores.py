"""The argument every pair objective reads: the six per-pair tensors of a batch.

A *pair objective* is a plain function ``name(pair, beta) -> Tensor`` returning one loss per
pair, shape (B,). ``pair`` is a :class:`PairScores`; every field has shape (B,):

    winner, loser          policy log-probabilities of the whole responses, log pi(y|x)
    ref_winner, ref_loser  reference log-probabilities, log pi_ref(y|x)
    len_winner, len_loser  response lengths in tokens (1 for every response of a finite task
                           whose file gives no lengths)

A margin loss ``f`` is the special case ``f(beta * ((winner - ref_winner) - (loser - ref_loser)))``.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch

Tensor = torch.Tensor


@dataclass(frozen=True)
class PairScores:
    """Log-probabilities and lengths of a batch of labelled pairs; each field (B,)."""

    winner: Tensor
    loser: Tensor
    ref_winner: Tensor
    ref_loser: Tensor
    len_winner: Tensor
    len_loser: Tensor

    @property
    def logratio_winner(self) -> Tensor:
        """``h(x, y_w) = log pi(y_w|x) - log pi_ref(y_w|x)``, (B,)."""
        return self.winner - self.ref_winner

    @property
    def logratio_loser(self) -> Tensor:
        """``h(x, y_l) = log pi(y_l|x) - log pi_ref(y_l|x)``, (B,)."""
        return self.loser - self.ref_loser
