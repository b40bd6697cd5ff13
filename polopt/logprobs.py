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
"""

from __future__ import annotations

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
    """

    def __init__(self, model: nn.Module, *, pad_id: int, split_lengths: bool = True):
        super().__init__()
        self.model = model
        self.pad_id = pad_id
        self.split_lengths = split_lengths

    def logprobs(self, prompt: Tensor, response: Tensor) -> Tensor:
        """(B, T_p), (B, T_r) right-padded -> (B,)."""
        n = real_tokens(prompt, response, pad_id=self.pad_id)  # (B,)
        order, k = length_split(n) if self.split_lengths else (None, 0)
        if k == 0:
            return sequence_logprobs(self.model, prompt, response, pad_id=self.pad_id)
        short, long = order[:k], order[k:]
        values = torch.cat([sequence_logprobs(self.model, prompt[rows], response[rows], pad_id=self.pad_id)
                            for rows in (short, long)])  # (B,) in the sorted order
        return values[torch.argsort(order)]  # (B,) back in the batch's order


@torch.no_grad()
def batched_logprobs(model: nn.Module, prompt: Tensor, response: Tensor, *, pad_id: int,
                     batch_size: int = 4096, progress: bool = False, desc: str = "log-probs") -> Tensor:
    """:func:`sequence_logprobs` over a whole dataset in chunks, without gradients: (N,).

    Rows go shortest first, so that each chunk is trimmed to lengths close to its own, and a
    chunk whose rows still differ much in length runs as two passes (:class:`SequencePolicy`;
    rows are independent: neither the order nor the split changes a value).
    """
    out = []
    policy = SequencePolicy(model, pad_id=pad_id)
    order = torch.sort(real_tokens(prompt, response, pad_id=pad_id), stable=True).indices  # (N,)
    starts = range(0, len(prompt), batch_size)
    for start in tqdm(starts, desc=desc, disable=not progress, leave=False):
        rows = order[start:start + batch_size]
        out.append(policy.logprobs(prompt[rows], response[rows]))
    return torch.cat(out)[torch.argsort(order)] if out else torch.zeros(0)
