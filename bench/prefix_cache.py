"""Bench: the two ways of computing a pair's prompt once, measured against each other.

    PYTHONPATH=. python bench/prefix_cache.py [--width 256] [--batch 16] [--rounds 5] [--threads N]

``train.share_prompt=true`` packs each pair as one row ``[prompt, winner, loser]`` with an attention
mask (:func:`polopt.models.logprobs.shared_pair_logprobs`). The other way the issue names is a cached
prefix: run the prompt once, keep every layer's keys and values, then run the winner and the loser
as two short passes whose queries attend to the cached prompt keys and to their own earlier
tokens. This file writes that second way for :class:`polopt.models.transformer.TinyTransformer` (the library
does not need it), checks that it gives the same log-probabilities as separate scoring, and times
forward plus backward of the three ways on the prompt-heavy pair file of bench/share_prompt.py
(prompts of 30-40 words, responses of 1-5), fastest of ``--rounds`` interleaved rounds, with the
load average beside the figures. Figures only; nothing passes or fails.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import torch
import torch.nn.functional as F

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench.share_prompt import invented_pairs, prepare  # noqa: E402
from polopt.models.logprobs import lengths, picked_logprobs, sequence_logprobs, shared_pair_logprobs  # noqa: E402
from polopt.models.transformer import TinyTransformer  # noqa: E402

Tensor = torch.Tensor


def _heads(z: Tensor, heads: int) -> Tensor:
    b, t, c = z.shape
    return z.view(b, t, heads, c // heads).transpose(1, 2)  # (B, H, T, D)


def _attend(block, x: Tensor, past: tuple[Tensor, Tensor] | None, mask: Tensor) -> tuple[Tensor, tuple]:
    """One block over ``x`` (B, T, C) whose queries also see ``past`` keys and values; returns the
    block's output and this pass's keys and values (the prompt pass keeps them)."""
    attn = block.attn
    h = block.norm_attn(x)
    q, k, v = attn.qkv(h).split(h.shape[-1], dim=2)
    q, k, v = (_heads(z, attn.heads) for z in (q, k, v))  # (B, H, T, D)
    keys, values = (k, v) if past is None else (torch.cat([past[0], k], 2), torch.cat([past[1], v], 2))
    y = F.scaled_dot_product_attention(q, keys, values, attn_mask=mask)  # (B, H, T, D)
    b, _, t, d = y.shape
    x = x + attn.proj(y.transpose(1, 2).reshape(b, t, attn.heads * d))
    return x + block.mlp(block.norm_mlp(x)), (k, v)


def prefix_pair_logprobs(model: TinyTransformer, prompt: Tensor, winner: Tensor, loser: Tensor, *,
                         pad_id: int) -> tuple[Tensor, Tensor]:
    """log pi(winner | prompt), log pi(loser | prompt) (B,) each: the prompt once, its keys and values
    cached per layer, then each response as its own pass attending to them."""
    n_p = lengths(prompt, pad_id=pad_id)  # (B,)
    tp = prompt.shape[1]
    s = torch.arange(tp)
    x = model.token_embedding(prompt) + model.position_embedding(s)  # (B, T_p, C)
    causal = (s[:, None] >= s[None, :])[None, None] & (s < n_p[:, None])[:, None, None, :]  # (B, 1, T_p, T_p)
    causal = causal | torch.eye(tp, dtype=torch.bool)[None, None]  # padding queries see themselves (unused)
    cache = []
    for block in model.blocks:
        x, kv = _attend(block, x, None, causal)
        cache.append(kv)
    last = model.head(model.norm(x.gather(1, (n_p - 1)[:, None, None].expand(-1, 1, x.shape[-1]))))  # (B, 1, V)

    def response(tokens: Tensor) -> Tensor:
        inputs = tokens[:, :-1]  # the last token is scored, never read
        t = torch.arange(inputs.shape[1])
        pos = (n_p[:, None] + t[None, :]).clamp(max=model.context - 1)  # (B, T_r - 1)
        y = model.token_embedding(inputs) + model.position_embedding(pos)
        see_prompt = (s < n_p[:, None])[:, None, None, :].expand(-1, 1, len(t), -1)  # (B, 1, T_r-1, T_p)
        see_self = (t[:, None] >= t[None, :])[None, None].expand(len(tokens), 1, -1, -1)
        mask = torch.cat([see_prompt, see_self], dim=-1)  # (B, 1, T_r - 1, T_p + T_r - 1)
        for block, kv in zip(model.blocks, cache, strict=True):
            y, _ = _attend(block, y, kv, mask)
        logits = torch.cat([last, model.head(model.norm(y))], dim=1)  # (B, T_r, V)
        rows = torch.arange(tokens.shape[1]).expand(len(tokens), -1)
        return picked_logprobs(logits, rows, tokens, pad_id=pad_id)

    return response(winner), response(loser)


def separate_pair_logprobs(model, prompt, winner, loser, *, pad_id):
    """Winners and losers scored as separate rows, each computing its prompt (the layout of ``share_prompt=false``)."""
    width = max(winner.shape[1], loser.shape[1])
    responses = [F.pad(r, (0, width - r.shape[1]), value=pad_id) for r in (winner, loser)]
    both = sequence_logprobs(model, torch.cat([prompt, prompt]), torch.cat(responses), pad_id=pad_id)
    return both.chunk(2)


WAYS = {"separate (prompt twice)": separate_pair_logprobs, "packed row (share_prompt=true)": shared_pair_logprobs,
        "cached prefix": prefix_pair_logprobs}


def timed(way, model, batch, pad_id) -> float:
    start = time.perf_counter()
    w, lo = way(model, *batch, pad_id=pad_id)
    (w - lo).sum().backward()
    model.zero_grad(set_to_none=True)
    return time.perf_counter() - start


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--width", type=int, default=256)
    parser.add_argument("--batch", type=int, default=16)
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--threads", type=int, default=torch.get_num_threads())
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "pairs.jsonl"
        path.write_text("".join(json.dumps(r) + "\n" for r in invented_pairs(4 * args.batch)), encoding="utf-8")
        session, policy = prepare(path, args.width, 4 * args.batch)
    model, pad = policy.model, session.ids.pad
    p = session.pairs
    batches = [tuple(t[i:i + args.batch] for t in (p.prompt, p.winner, p.loser)) for i in range(0, len(p), args.batch)]
    batches = [tuple(t[:, :int((t != pad).sum(1).max())] for t in b) for b in batches]  # trimmed to the longest
    with torch.no_grad():
        reference = torch.cat([torch.stack(separate_pair_logprobs(model, *b, pad_id=pad)) for b in batches], 1)
        gaps = {name: float((torch.cat([torch.stack(way(model, *b, pad_id=pad)) for b in batches], 1)
                             - reference).abs().max()) for name, way in WAYS.items()}
    best = {name: float("inf") for name in WAYS}
    for _ in range(args.rounds):
        for name, way in WAYS.items():
            best[name] = min(best[name], sum(timed(way, model, b, pad) for b in batches))
    print(f"width {args.width}, {args.threads} thread(s), {len(batches)} batches of {args.batch} pairs, fastest of "
          f"{args.rounds} interleaved rounds; load {os.getloadavg()[0]:.2f}")
    print(f"{'way':<32}{'s (fwd+bwd)':>12}{'vs separate':>13}{'max |diff| vs separate':>24}")
    for name in WAYS:
        print(f"{name:<32}{best[name]:>12.3f}{best['separate (prompt twice)'] / best[name]:>12.2f}x"
              f"{gaps[name]:>24.1e}")


if __name__ == "__main__":
    main()
