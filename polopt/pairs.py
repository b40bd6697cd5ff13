"""The pair batch type: labelled preference pairs as tensors, the trainer's input.

A task hands the training loop a :class:`PairSet`; batches are :meth:`PairSet.select`-ed
from it and moved with :meth:`PairSet.to`. This module imports nothing but torch, so any
module (a task, a model wrapper, the data streamer) can build pairs without importing the
training loop. :func:`score_pairs` is the one way to score winners and losers.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import torch

Tensor = torch.Tensor


@dataclass
class PairSet:
    """Labelled pairs as tensors with a leading dimension N.

    ``winner``/``loser`` are whatever the policy's ``logprobs`` takes (response
    indices for finite tasks). ``reference_winner``/``reference_loser`` (N,) are
    the cached reference log-probabilities; ``weight`` (N,) or None; ``tokens`` (N,)
    the real tokens of each pair (prompt with winner plus prompt with loser, no
    padding) for the ``tokens_per_s`` metric, or None; ``len_winner``/``len_loser`` (N,)
    the responses' lengths in tokens, read by pair objectives (None: 1 each; see
    :mod:`polopt.losses.pair`).
    """

    prompt: Tensor
    winner: Tensor
    loser: Tensor
    reference_winner: Tensor
    reference_loser: Tensor
    weight: Tensor | None = None
    tokens: Tensor | None = None
    len_winner: Tensor | None = None
    len_loser: Tensor | None = None

    def __len__(self) -> int:
        return len(self.prompt)

    def _optional(self) -> tuple:
        return self.weight, self.tokens, self.len_winner, self.len_loser

    def select(self, index: Tensor) -> PairSet:
        return PairSet(self.prompt[index], self.winner[index], self.loser[index],
                       self.reference_winner[index], self.reference_loser[index],
                       *(None if t is None else t[index] for t in self._optional()))

    def to(self, device: torch.device, dtype: torch.dtype | None = None) -> PairSet:
        """The same pairs with every tensor on ``device`` (no copy when they are there already) and,
        given ``dtype``, every floating-point tensor in it (reference log-probs, weights, lengths)."""
        def move(t: Tensor | None) -> Tensor | None:
            if t is None:
                return None
            return t.to(device, dtype=dtype if dtype is not None and t.is_floating_point() else t.dtype,
                        non_blocking=True)

        return PairSet(*(move(t) for t in (self.prompt, self.winner, self.loser, self.reference_winner,
                                           self.reference_loser, *self._optional())))


def score_pairs(score: Callable[..., Tensor], prompt: Tensor, winner: Tensor, loser: Tensor, *,
                shared: bool = False) -> tuple[Tensor, Tensor]:
    """Log-probs of winners and losers in one pass: ``score(prompt, response)`` over the prompts
    twice and the winners then the losers, split in two. ``prompt`` (B, ...), ``winner`` and
    ``loser`` (B, ...) of one width (index tensors (B,) or token tensors (B, T)); returns two (B,).
    ``shared``: ``score(prompt, winner, loser)`` computes each prompt once for both responses
    (``train.share_prompt``; :func:`polopt.models.logprobs.shared_pair_logprobs`), same layout (2B,)."""
    if shared:
        both = score(prompt, winner, loser)  # (2B,): winners then losers
    else:
        both = score(torch.cat([prompt, prompt]), torch.cat([winner, loser]))  # (2B,)
    return both.chunk(2)
