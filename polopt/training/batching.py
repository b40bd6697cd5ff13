"""Mini-batches of token pairs: the epoch's order, length bucketing, and trimming.

This module owns how the trainer turns its seeded ``torch.Generator`` into the
order in which the pairs of an epoch are visited, and how a slice of that order
becomes a :class:`polopt.pairs.PairSet` batch.

Token pairs arrive right-padded to the dataset's longest row. A batch drawn at
random from a length-skewed dataset (most responses short, a few at the maximum,
as in real preference files) almost always holds one long pair, and the whole
batch is then computed at that length. Bucketing (``train.bucketing=true``)
draws the epoch's permutation as before, cuts it into spans of
:data:`SPAN_BATCHES` batches, sorts each span by length, cuts the sorted span
into batches and shuffles the batches of the epoch (common practice, often
called "sortish" sampling): every batch is still a random draw, but of pairs of
similar length. A pair's length is prompt + winner + loser tokens, the width of
its row when the two responses share one pass over the prompt
(``train.share_prompt``, the default; :func:`polopt.models.logprobs.pack_pairs`).
:meth:`Batcher.take` then slices the padded tensors to the batch's own longest
prompt and response (it copies the B rows only, never the whole set). Trimming
alone changes no log-probability (see :mod:`polopt.models.logprobs`: padding is
never seen by real tokens); bucketing changes which pairs meet in a batch, so a
run with it is a different, equally valid, stochastic run.

Everything comes from the trainer's generator, so a seed gives one order; the
order is a permutation of the pairs stored in checkpoints as it is, so a
resumed run continues bit-identical. The last ``N mod B`` pairs of each
permutation are left out of that epoch (the trainer's rule); with bucketing they
are drawn before sorting, so they are random pairs, not the longest ones.
Finite tasks (index tensors, one number per response) have nothing to trim and
keep the plain permutation.
"""

from __future__ import annotations

import torch

from polopt.models.logprobs import lengths

Tensor = torch.Tensor

SPAN_BATCHES = 64  # batches sorted together: long enough to group lengths, short enough to stay random


def pair_lengths(prompt: Tensor, winner: Tensor, loser: Tensor, *, pad_id: int) -> tuple[Tensor, Tensor, Tensor]:
    """Real prompt tokens (N,), the longer real response of winner and loser (N,) (the widths a batch
    is trimmed to), and the pair's length prompt + winner + loser (N,), which orders the buckets: a
    shared-prompt row holds all three (less the responses' last tokens), so pairs of one length fill
    a batch's rows evenly. (Scoring winners and losers apart computes rows as wide as the prompt with
    the longer response; the sum orders those nearly as well.)"""
    n_prompt, n_winner, n_loser = (lengths(t, pad_id=pad_id) for t in (prompt, winner, loser))  # (N,) each
    return n_prompt, torch.maximum(n_winner, n_loser), n_prompt + n_winner + n_loser


def bucketed_order(permutation: Tensor, size: Tensor, batch_size: int, generator: torch.Generator) -> Tensor:
    """Reorder ``permutation`` (N,) so that each run of ``batch_size`` entries holds pairs of
    similar ``size`` (N,), the batches in a random order drawn from ``generator``.

    The last ``N mod batch_size`` entries of ``permutation`` stay last (the pairs the
    epoch leaves out). Returns a permutation of the same entries (N,).
    """
    n_full = len(permutation) // batch_size * batch_size
    body, rest = permutation[:n_full], permutation[n_full:]
    span = SPAN_BATCHES * batch_size
    pieces = []
    for start in range(0, n_full, span):
        chunk = body[start:start + span]  # (S,)
        chunk = chunk[torch.sort(size[chunk], stable=True).indices]  # (S,) shortest first
        pieces.append(chunk)
    batches = torch.cat(pieces).reshape(-1, batch_size) if pieces else body.reshape(0, batch_size)  # (N_b, B)
    batches = batches[torch.randperm(len(batches), generator=generator)]  # (N_b, B)
    return torch.cat([batches.flatten(), rest])  # (N,)


class Batcher:
    """The trainer's batches of ``pairs``: ``epoch_order(generator)`` and ``take(index)``.

    ``pad_id`` None (or pairs that are not token tensors, or pairs streamed from disk,
    which have no whole-set tensors to measure) means nothing to trim or bucket: ``take``
    is ``pairs.select`` and the order is a plain permutation.
    """

    def __init__(self, pairs, *, batch_size: int | None, pad_id: int | None, bucketing: bool = True):
        if not isinstance(bucketing, bool):
            raise ValueError(f"train.bucketing must be true or false, got {bucketing!r}")
        self.pairs = pairs
        self.batch_size = batch_size
        streamed = getattr(pairs, "streamed", False)
        self.tokens = pad_id is not None and not streamed and pairs.winner.dim() == 2
        self.bucketing = bucketing and self.tokens and batch_size is not None and batch_size < len(pairs)
        if self.tokens:
            self.prompt_len, self.response_len, self.pair_len = pair_lengths(
                pairs.prompt, pairs.winner, pairs.loser, pad_id=pad_id)  # (N,) each

    def epoch_order(self, generator: torch.Generator) -> Tensor:
        """The order of the next epoch (N,), drawn from ``generator``."""
        order = torch.randperm(len(self.pairs), generator=generator)  # (N,)
        if not self.bucketing:
            return order
        return bucketed_order(order, self.pair_len, self.batch_size, generator)

    def take(self, index: Tensor):
        """The pairs at ``index`` (B,), token tensors trimmed to the batch's longest row."""
        p = self.pairs
        if not self.tokens:
            return p.select(index)
        t_p = int(self.prompt_len[index].max())
        t_r = max(int(self.response_len[index].max()), 1)  # keep one column so empty responses stay 2-D
        return type(p)(p.prompt[index, :t_p], p.winner[index, :t_r], p.loser[index, :t_r],  # (B, T_p), (B, T_r)
                       p.reference_winner[index], p.reference_loser[index],
                       *(None if t is None else t[index] for t in p._optional()))
