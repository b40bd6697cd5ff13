"""A length-skewed synthetic dataset of token pairs, shared by bench/throughput.py and bench/baseline_loop.py.

Invented data, generated from a seed with torch alone (no polopt import, so the
hand-written baseline stays independent of the project). Token ids follow
polopt's byte tokenizer: 0..255 are bytes, 256 pads; the vocabulary has 259 ids.

Lengths are drawn as in real preference files, most responses short and a few at
the maximum: each response has ``short_min..short_max`` tokens, or, with
probability ``long_share``, exactly ``max_length`` tokens. Prompts have
``prompt_min..prompt_max`` tokens. Rows are right-padded to the longest possible
length (prompt_max, max_length).
"""

from __future__ import annotations

import torch

PAD_ID = 256
VOCAB_SIZE = 259


def skewed_pairs(n_pairs: int, *, max_length: int = 128, long_share: float = 0.05, short_min: int = 2,
                 short_max: int = 24, prompt_min: int = 2, prompt_max: int = 8,
                 seed: int = 0) -> dict[str, torch.Tensor]:
    """``{"prompt": (N, P), "winner": (N, L), "loser": (N, L)}`` right-padded with PAD_ID."""
    g = torch.Generator().manual_seed(seed)

    def rows(n: int, width: int, n_tokens: torch.Tensor) -> torch.Tensor:
        tokens = torch.randint(0, 256, (n, width), generator=g)  # (N, W)
        real = torch.arange(width)[None, :] < n_tokens[:, None]  # (N, W)
        return torch.where(real, tokens, PAD_ID)

    def response_lengths(n: int) -> torch.Tensor:
        short = torch.randint(short_min, short_max + 1, (n,), generator=g)  # (N,)
        long = torch.rand(n, generator=g) < long_share  # (N,)
        return torch.where(long, max_length, short)

    prompt_len = torch.randint(prompt_min, prompt_max + 1, (n_pairs,), generator=g)  # (N,)
    return {"prompt": rows(n_pairs, prompt_max, prompt_len),
            "winner": rows(n_pairs, max_length, response_lengths(n_pairs)),
            "loser": rows(n_pairs, max_length, response_lengths(n_pairs))}


def real_token_count(data: dict[str, torch.Tensor]) -> torch.Tensor:
    """Real tokens per pair (N,): prompt with winner plus prompt with loser, padding excluded."""
    n = {k: (v != PAD_ID).sum(dim=1) for k, v in data.items()}
    return 2 * n["prompt"] + n["winner"] + n["loser"]
