"""Texts to the token tensors a sequence model reads: prompts with a start id, responses with an end id.

Owns :class:`SequenceIds` (which ids pad, start and end a sequence for a given
tokenizer, and how large the model's vocabulary must be) and :func:`encode`
(texts -> right-padded ``(N, T)`` id tensors). A prompt is ``bos + tokens``
(so even a plain-text example with no prompt has one token for the first
response token to be scored from); a response is ``tokens + eos`` (so the model
learns where to stop, and a sampled response ends by itself).

Padding must be an id no real token uses, because :func:`polopt.models.logprobs.pack`
finds the real tokens by comparing with it: a tokenizer whose pad id falls
back to its eos id (common practice for causal models) would hide every end
token. Such ids, and missing bos/eos ids, get fresh ids past the tokenizer's
vocabulary.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch

Tensor = torch.Tensor


@dataclass(frozen=True)
class SequenceIds:
    """pad, bos and eos ids (pairwise distinct) and the model vocabulary that holds them."""

    pad: int
    bos: int
    eos: int
    vocab_size: int

    @classmethod
    def for_tokenizer(cls, tokenizer) -> SequenceIds:
        size = int(tokenizer.vocab_size)
        taken: set[int] = set()
        ids = {}
        for name in ("eos", "bos", "pad"):  # eos first: it is the one a tokenizer is likeliest to have
            value = getattr(tokenizer, f"{name}_id", None)
            if value is None or value in taken:
                value = size
                size += 1
            ids[name] = int(value)
            taken.add(int(value))
        return cls(ids["pad"], ids["bos"], ids["eos"], max(size, max(taken) + 1))


def _pad(rows: list[list[int]], pad: int) -> Tensor:
    width = max((len(r) for r in rows), default=0)
    out = torch.full((len(rows), width), pad, dtype=torch.long)  # (N, T)
    for i, r in enumerate(rows):
        out[i, :len(r)] = torch.as_tensor(r, dtype=torch.long)
    return out


def encode_prompts(tokenizer, texts: list[str], ids: SequenceIds) -> Tensor:
    """``bos + tokens`` of each text, right-padded: (N, T_p)."""
    return _pad([[ids.bos, *tokenizer.encode(t)] for t in texts], ids.pad)


def encode_responses(tokenizer, texts: list[str], ids: SequenceIds) -> Tensor:
    """``tokens + eos`` of each text, right-padded: (N, T_r)."""
    return _pad([[*tokenizer.encode(t), ids.eos] for t in texts], ids.pad)


def pad_rows(rows: list[list[int]], ids: SequenceIds) -> Tensor:
    """Lists of ids (e.g. sampled responses) as a right-padded (N, T) tensor."""
    return _pad(rows, ids.pad)
