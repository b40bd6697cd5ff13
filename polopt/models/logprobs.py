"""Log-probabilities of responses under an autoregressive model, with masks.

For a prompt x and a response y = (y_1, ..., y_n) the chain rule gives

    log pi(y | x) = sum_{t=1..n} log pi(y_t | x, y_<t)

Prompts and responses arrive as separate right-padded token tensors
``(B, T_p)`` and ``(B, T_r)``. :func:`pack` lays each prompt and its response
side by side with no gap, padding at the end only, and marks which positions are
response tokens; the model reads ``tokens[:, :-1]`` and each response token is
scored by the logits one position earlier. Prompt tokens and padding are masked
out of the sum. With a causal model and right padding, real tokens never see a
pad token, so neither the amount of padding nor the order of the batch can
change a log-probability.

:class:`SequencePolicy` is the trainer's view of a sequence model
(``logprobs(prompt, response) -> (B,)``); winners and losers go through it in
one forward pass, concatenated along the batch.

A pair's winner and loser share their prompt. :func:`pack_pairs` lays a pair out
as one row ``[prompt, winner, loser]`` in which the prompt is computed once: the
loser's positions restart after the prompt, and an attention mask lets each
response see the prompt and its own earlier tokens but never the other response.
Every response token then sees exactly the tokens and positions it sees when
scored on its own, so :func:`shared_pair_logprobs` gives the log-probabilities of
two separate passes (up to floating-point rounding) while the prompt's positions
are computed once instead of twice. A model opts in with ``takes_layout = True``
(its forward takes ``positions`` and ``mask``; :mod:`polopt.models.transformer`).
"""

from __future__ import annotations

from typing import NamedTuple

import torch
from torch import nn
from tqdm.auto import tqdm

Tensor = torch.Tensor


def lengths(tokens: Tensor, *, pad_id: int) -> Tensor:
    """Real (non-pad) tokens per row of a right-padded (B, T) tensor: (B,)."""
    return (tokens != pad_id).sum(dim=1)


def pack(prompt: Tensor, response: Tensor, *, pad_id: int) -> tuple[Tensor, Tensor]:
    """Prompt then response with no gap, right-padded, trimmed to the longest row.

    Args:
        prompt: (B, T_p) right-padded prompt tokens; every prompt has >= 1 token.
        response: (B, T_r) right-padded response tokens (may be empty rows).

    Returns:
        tokens (B, T) and a boolean mask (B, T) that is True on response tokens.
    """
    if prompt.shape[0] != response.shape[0]:
        raise ValueError(f"prompt and response batches differ: {prompt.shape[0]} and {response.shape[0]} rows")
    n_prompt = lengths(prompt, pad_id=pad_id)  # (B,)
    n_response = lengths(response, pad_id=pad_id)  # (B,)
    if bool((n_prompt < 1).any()):
        raise ValueError("every prompt needs at least one token (the first response token is scored "
                         "by the logits at the prompt's last token)")
    total = int((n_prompt + n_response).max())
    t = torch.arange(total, device=prompt.device)[None, :]  # (1, T)
    in_prompt = t < n_prompt[:, None]  # (B, T)
    offset = t - n_prompt[:, None]  # (B, T): index into the response
    in_response = (offset >= 0) & (offset < n_response[:, None])  # (B, T)
    from_prompt = prompt.gather(1, t.clamp(max=prompt.shape[1] - 1).expand(len(prompt), -1))  # (B, T)
    from_response = response.gather(1, offset.clamp(0, max(response.shape[1] - 1, 0)).expand(len(prompt), -1))
    tokens = torch.where(in_prompt, from_prompt, torch.where(in_response, from_response, pad_id))  # (B, T)
    return tokens, in_response


def token_logprobs(model: nn.Module, tokens: Tensor, response_mask: Tensor) -> Tensor:
    """Per-token ``log pi(y_t | x, y_<t)`` (B, T - 1), 0 off the response.

    Entry t scores ``tokens[:, t + 1]``. The log-softmax runs in at least float32,
    even under bfloat16 autocast: its sums over the vocabulary need the precision.
    """
    logits = model(tokens[:, :-1])  # (B, T-1, V)
    logp = torch.log_softmax(logits.to(torch.promote_types(logits.dtype, torch.float32)), dim=-1)  # (B, T-1, V)
    return pick_tokens(logp, tokens, response_mask)


def pick_tokens(logp: Tensor, tokens: Tensor, response_mask: Tensor) -> Tensor:
    """The log-probability of each next token from per-position log-distributions, 0 off the response.

    ``logp`` (B, T-1, V) scores ``tokens[:, 1:]``; returns (B, T-1).
    """
    targets = tokens[:, 1:]  # (B, T-1)
    mask = response_mask[:, 1:]  # (B, T-1)
    safe = torch.where(mask, targets, 0)  # padding ids may lie outside the output vocabulary
    picked = logp.gather(-1, safe[..., None]).squeeze(-1)  # (B, T-1)
    return torch.where(mask, picked, 0.0)


def sequence_logprobs(model: nn.Module, prompt: Tensor, response: Tensor, *, pad_id: int) -> Tensor:
    """``log pi(response | prompt)`` summed over response tokens: (B, T_p), (B, T_r) -> (B,)."""
    tokens, mask = pack(prompt, response, pad_id=pad_id)
    return token_logprobs(model, tokens, mask).sum(dim=1)


class PairLayout(NamedTuple):
    """A batch of pairs packed one pair per row (see :func:`pack_pairs`)."""

    tokens: Tensor  # (B, T) prompt, winner but its last token, loser but its last token, padding
    positions: Tensor  # (B, T) each token's position in its own sequence (the loser restarts after the prompt)
    mask: Tensor  # (B, 1, T, T) True where query t may attend to key s
    score_winner: Tensor  # (B, T_w) the row index whose logits score each winner token
    score_loser: Tensor  # (B, T_l) the same for the loser


def pack_pairs(prompt: Tensor, winner: Tensor, loser: Tensor, *, pad_id: int) -> PairLayout:
    """One row per pair, ``[x, y_w[:-1], y_l[:-1]]``, and the layout that keeps the two responses apart.

    A response's last token is only scored, never read, so it is left out of the input. With
    n_p, n_w, n_l real tokens and a_w = max(n_w - 1, 0), a_l = max(n_l - 1, 0), the row holds the
    prompt at positions 0..n_p-1, the winner's inputs at n_p..n_p+a_w-1 and the loser's inputs
    after them, at positions n_p..n_p+a_l-1 again. A query may attend to a key at or before it,
    except that a loser token never attends to a winner token. Winner token k is scored by the
    logits at row index n_p-1 (k = 0) or n_p+k-1; loser token k by n_p-1 (k = 0) or n_p+a_w+k-1.

    Args:
        prompt: (B, T_p), winner: (B, T_w), loser: (B, T_l), right-padded; every prompt has >= 1 token.
    """
    n_p = lengths(prompt, pad_id=pad_id)[:, None]  # (B, 1)
    if bool((n_p < 1).any()):
        raise ValueError("every prompt needs at least one token (the first response token is scored "
                         "by the logits at the prompt's last token)")
    n_w, n_l = lengths(winner, pad_id=pad_id)[:, None], lengths(loser, pad_id=pad_id)[:, None]  # (B, 1)
    a_w, a_l = (n_w - 1).clamp(min=0), (n_l - 1).clamp(min=0)  # (B, 1)
    total = max(int((n_p + a_w + a_l).max()), 1)
    t = torch.arange(total, device=prompt.device)[None, :]  # (1, T)
    in_prompt = t < n_p  # (B, T)
    in_winner = (t >= n_p) & (t < n_p + a_w)  # (B, T)
    in_loser = (t >= n_p + a_w) & (t < n_p + a_w + a_l)  # (B, T)

    def take(source: Tensor, index: Tensor) -> Tensor:  # source[b, index[b, t]], index clamped into range
        return source.gather(1, index.clamp(0, max(source.shape[1] - 1, 0)).expand(len(source), -1))  # (B, T)

    tokens = torch.where(in_prompt, take(prompt, t), pad_id)  # (B, T)
    tokens = torch.where(in_winner, take(winner, t - n_p), tokens)
    tokens = torch.where(in_loser, take(loser, t - n_p - a_w), tokens)
    positions = torch.where(in_loser, t - a_w, torch.where(in_prompt | in_winner, t, 0))  # (B, T)
    causal = t[:, :, None] >= t[:, None, :]  # (1, T, T): query t, key s
    crossing = in_loser[:, :, None] & in_winner[:, None, :]  # (B, T, T)
    mask = (causal & ~crossing)[:, None]  # (B, 1, T, T)

    def scorers(width: int, start: Tensor) -> Tensor:  # row index of the logits scoring token k
        k = torch.arange(width, device=prompt.device)[None, :]  # (1, T_r)
        return torch.where(k == 0, n_p - 1, start + k - 1).clamp(max=total - 1)  # (B, T_r)

    return PairLayout(tokens, positions, mask, scorers(winner.shape[1], n_p), scorers(loser.shape[1], n_p + a_w))


def picked_logprobs(logits: Tensor, rows: Tensor, response: Tensor, *, pad_id: int) -> Tensor:
    """``sum_k log softmax(logits[b, rows[b, k]])[response[b, k]]`` over the real tokens: (B,).

    ``logits`` (B, T, V), ``rows`` and ``response`` (B, T_r). The log-softmax runs in at least
    float32, on the scoring rows only.
    """
    chosen = logits.gather(1, rows[..., None].expand(-1, -1, logits.shape[-1]))  # (B, T_r, V)
    logp = torch.log_softmax(chosen.to(torch.promote_types(chosen.dtype, torch.float32)), dim=-1)  # (B, T_r, V)
    real = response != pad_id  # (B, T_r)
    picked = logp.gather(-1, torch.where(real, response, 0)[..., None]).squeeze(-1)  # (B, T_r)
    return torch.where(real, picked, 0.0).sum(dim=1)  # (B,)


def shared_pair_logprobs(model: nn.Module, prompt: Tensor, winner: Tensor, loser: Tensor, *,
                         pad_id: int) -> tuple[Tensor, Tensor]:
    """``log pi(winner | prompt)`` and ``log pi(loser | prompt)`` (B,) each, from one pass per pair
    that computes the prompt once (:func:`pack_pairs`); the model must take ``positions`` and ``mask``."""
    layout = pack_pairs(prompt, winner, loser, pad_id=pad_id)
    logits = model(layout.tokens, positions=layout.positions, mask=layout.mask)  # (B, T, V)
    return (picked_logprobs(logits, layout.score_winner, winner, pad_id=pad_id),
            picked_logprobs(logits, layout.score_loser, loser, pad_id=pad_id))


def real_tokens(prompt: Tensor, response: Tensor, *, pad_id: int) -> Tensor:
    """Prompt plus response tokens per row, padding excluded: (B,)."""
    return lengths(prompt, pad_id=pad_id) + lengths(response, pad_id=pad_id)


SPLIT_SAVING = 0.3  # split a batch in two only when that computes at least this share fewer positions


def length_split(n_tokens: Tensor) -> tuple[Tensor, int]:
    """Rows sorted by length (B,) and the cut k that minimises the positions computed when
    rows ``[:k]`` run at their own longest and ``[k:]`` at the batch's longest; k = 0: no cut.

    The positions of a cut at k are ``k n_(k) + (B - k) n_(B)`` over the sorted lengths n;
    a cut is kept only when it saves at least :data:`SPLIT_SAVING` of ``B n_(B)``.
    """
    sorted_n, order = torch.sort(n_tokens, stable=True)  # (B,)
    b = len(sorted_n)
    k = torch.arange(1, b + 1, device=sorted_n.device)  # (B,)
    cost = k * sorted_n + (b - k) * sorted_n[-1]  # (B,): a cut after the k-th shortest row
    best = int(torch.argmin(cost))
    whole = b * int(sorted_n[-1])
    if whole == 0 or int(cost[best]) > (1 - SPLIT_SAVING) * whole:
        return order, 0
    return order, best + 1


class SequencePolicy(nn.Module):
    """A sequence model seen as a policy: ``logprobs(prompt, response)`` of token tensors.

    A batch whose rows differ much in length (winners and losers of one pair often
    do) runs as two forward passes, the short rows trimmed to their own longest
    (:func:`length_split`); rows are independent, so the values are those of one pass.
    ``split_lengths=False`` keeps one pass (the bench's padding baseline).
    ``logprobs(prompt, winner, loser)`` scores a pair's two responses with one pass over
    their prompt when the model allows it (``shares_prompt``): :func:`shared_pair_logprobs` for a model
    that takes the one-row layout (``takes_layout``), or the model's own ``pair_logprobs`` where it
    scores pairs itself (``scores_pairs``: a transformers model through its key/value cache,
    :class:`polopt.models.local_lm.CausalLM`).
    """

    def __init__(self, model: nn.Module, *, pad_id: int, split_lengths: bool = True):
        super().__init__()
        self.model = model
        self.pad_id = pad_id
        self.split_lengths = split_lengths

    @property
    def shares_prompt(self) -> bool:
        """Whether the model takes the shared-prompt layout (positions and an attention mask) or scores a
        pair over one prompt pass itself."""
        return bool(getattr(self.model, "takes_layout", False) or getattr(self.model, "scores_pairs", False))

    def logprobs(self, prompt: Tensor, response: Tensor, loser: Tensor | None = None) -> Tensor:
        """(B, T_p), (B, T_r) right-padded -> (B,). With ``loser`` (B, T_l): ``response`` holds the
        winners, both are scored in one pass over their prompt, and the result (2B,) is the winners'
        log-probs then the losers' (the layout of scoring the two concatenated along the batch)."""
        pad = self.pad_id
        if loser is None:
            n = real_tokens(prompt, response, pad_id=pad)  # (B,)

            def run(rows: Tensor | slice) -> Tensor:  # (b,)
                return sequence_logprobs(self.model, prompt[rows], response[rows], pad_id=pad)
        else:
            if not self.shares_prompt:
                raise ValueError(f"train.share_prompt=true needs a model that takes positions and an attention "
                                 f"mask; {type(self.model).__name__} does not: set train.share_prompt=false")
            n = lengths(prompt, pad_id=pad) + lengths(response, pad_id=pad) + lengths(loser, pad_id=pad)  # (B,)

            def run(rows: Tensor | slice) -> Tensor:  # (2, b)
                if getattr(self.model, "scores_pairs", False):
                    return torch.stack(self.model.pair_logprobs(prompt[rows], response[rows], loser[rows]))
                return torch.stack(shared_pair_logprobs(self.model, prompt[rows], response[rows], loser[rows],
                                                        pad_id=pad))
        order, k = length_split(n) if self.split_lengths else (None, 0)
        if k == 0:
            return run(slice(None)).flatten()  # (B,) or (2B,)
        values = torch.cat([run(rows) for rows in (order[:k], order[k:])], dim=-1)  # (..., B) in the sorted order
        return values[..., torch.argsort(order)].flatten()  # (B,) or (2B,) back in the batch's order


@torch.no_grad()
def batched_logprobs(model: nn.Module, prompt: Tensor, response: Tensor, *, pad_id: int,
                     batch_size: int = 4096, progress: bool = False, desc: str = "log-probs") -> Tensor:
    """:func:`sequence_logprobs` over a whole dataset in chunks, without gradients: (N,).

    Rows go shortest first, so that each chunk is trimmed to lengths close to its own, and a
    chunk whose rows still differ much in length runs as two passes (:class:`SequencePolicy`;
    rows are independent: neither the order nor the split changes a value).
    """
    policy = SequencePolicy(model, pad_id=pad_id)
    n = real_tokens(prompt, response, pad_id=pad_id)  # (N,)
    return _in_chunks(n, lambda rows: policy.logprobs(prompt[rows], response[rows]), batch_size, progress, desc)


@torch.no_grad()
def batched_pair_logprobs(model: nn.Module, prompt: Tensor, winner: Tensor, loser: Tensor, *, pad_id: int,
                          batch_size: int = 4096, progress: bool = False, desc: str = "log-probs") -> Tensor:
    """Winners' then losers' log-probs over a whole dataset (2N,), as :func:`batched_logprobs` of the
    two concatenated along the batch, each pair in one pass over its prompt (:func:`shared_pair_logprobs`)."""
    policy = SequencePolicy(model, pad_id=pad_id)
    n = lengths(prompt, pad_id=pad_id) + lengths(winner, pad_id=pad_id) + lengths(loser, pad_id=pad_id)  # (N,)
    both = _in_chunks(n, lambda rows: policy.logprobs(prompt[rows], winner[rows], loser[rows]).view(2, -1),
                      batch_size, progress, desc)  # (2, N)
    return both.flatten()  # (2N,)


def _in_chunks(n: Tensor, score, batch_size: int, progress: bool, desc: str) -> Tensor:
    """``score(rows)`` (..., b) over chunks of rows taken shortest first by ``n`` (N,), back in order (..., N)."""
    order = torch.sort(n, stable=True).indices  # (N,)
    starts = range(0, len(n), batch_size)
    out = [score(order[start:start + batch_size]) for start in tqdm(starts, desc=desc, disable=not progress,
                                                                    leave=False)]
    return torch.cat(out, dim=-1)[..., torch.argsort(order)] if out else torch.zeros(0)
