"""Bench: where a bf16 training step's time goes, against fp32, on the prompt-heavy pair file.

    PYTHONPATH=. python bench/bf16_profile.py [--width 256] [--threads 1] [--steps 4]

Trains the tiny transformer (2 layers, 4 heads) on the invented pair file of bench/share_prompt.py
with ``train.share_prompt=true`` under torch.profiler, in fp32 and in bf16 autocast, and prints per
precision the step time and its shares: matrix products (aten::mm, addmm, bmm), the fused attention
kernel (forward and backward), and everything else (GELU, layer norms, bias sums, casts, Adam). Then,
outside the trainer: the attention kernel alone in fp32 and bf16 (forward and backward, the bench's
shape), and one forward plus backward of the whole model held in bf16 (weights, norms and attention
too, no autocast) against fp32. With the shares, Amdahl's law bounds what bf16 can give:
``1 / (m / s + (1 - m))`` for a matrix-product share m sped up s times. Figures only; nothing
passes or fails.
"""

from __future__ import annotations

import argparse
import copy
import dataclasses
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
from polopt import losses  # noqa: E402
from polopt.models.logprobs import shared_pair_logprobs  # noqa: E402
from polopt.training.loop import TrainSettings, train  # noqa: E402
from polopt.training.optim import OptimConfig  # noqa: E402

MATMUL = ("aten::mm", "aten::addmm", "aten::bmm")
ATTENTION = "scaled_dot_product"


def profiled_shares(session, policy, precision: str, steps: int) -> dict:
    """Seconds per step and the shares of matrix products, attention and the rest (self CPU time)."""
    from torch.profiler import ProfilerActivity, profile

    settings = TrainSettings(beta=0.5, steps=steps, seed=0, optim=OptimConfig("adam", 1e-4, schedule="constant"),
                             batch_size=16, progress=False, log_every=1, precision=precision, share_prompt=True)
    train(copy.deepcopy(policy), session.pairs, losses.resolve_margin("logistic"),
          dataclasses.replace(settings, steps=2))  # warm
    with profile(activities=[ProfilerActivity.CPU]) as prof:
        train(copy.deepcopy(policy), session.pairs, losses.resolve_margin("logistic"), settings)
    events = prof.key_averages()
    total = sum(e.self_cpu_time_total for e in events)
    matmul = sum(e.self_cpu_time_total for e in events if e.key in MATMUL)
    attention = sum(e.self_cpu_time_total for e in events if ATTENTION in e.key)
    return {"step_s": total / 1e6 / steps, "matmul": matmul / total, "attention": attention / total,
            "matmul_s": matmul / 1e6 / steps, "attention_s": attention / 1e6 / steps}


def best_of(f, repeat: int = 3, number: int = 3) -> float:
    f()
    out = float("inf")
    for _ in range(repeat):
        start = time.perf_counter()
        for _ in range(number):
            f()
        out = min(out, (time.perf_counter() - start) / number)
    return out


def attention_seconds(dtype: torch.dtype, positions: int, width: int, heads: int = 4, batch: int = 16) -> float:
    """Forward plus backward of torch's fused attention with a boolean causal mask, as the packed row runs it."""
    q, k, v = (torch.randn(batch, heads, positions, width // heads, dtype=dtype, requires_grad=True) for _ in range(3))
    mask = torch.ones(positions, positions, dtype=torch.bool).tril()[None, None].expand(batch, 1, -1, -1).contiguous()

    def step():
        F.scaled_dot_product_attention(q, k, v, attn_mask=mask).float().sum().backward()

    return best_of(step)


def whole_model_seconds(session, policy, dtype: torch.dtype) -> float:
    """One forward plus backward of a batch of 16 pairs with the whole model held in ``dtype``."""
    model = copy.deepcopy(policy.model).to(dtype)
    p, pad = session.pairs, session.ids.pad
    prompt, winner, loser = (t[:16] for t in (p.prompt, p.winner, p.loser))

    def step():
        w, lo = shared_pair_logprobs(model, prompt, winner, loser, pad_id=pad)
        (w.float() - lo.float()).sum().backward()

    return best_of(step)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--width", type=int, default=256)
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--steps", type=int, default=4)
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "pairs.jsonl"
        path.write_text("".join(json.dumps(r) + "\n" for r in invented_pairs(256)), encoding="utf-8")
        session, policy = prepare(path, args.width, 256)
    print(f"width {args.width}, {args.threads} thread(s), load {os.getloadavg()[0]:.2f}")
    rows = {precision: profiled_shares(session, policy, precision, args.steps) for precision in ("fp32", "bf16")}
    for precision, r in rows.items():
        print(f"{precision}: {r['step_s'] * 1000:.0f} ms/step; matrix products {r['matmul']:.0%} "
              f"({r['matmul_s'] * 1000:.0f} ms), attention {r['attention']:.0%} ({r['attention_s'] * 1000:.0f} ms), "
              f"the rest {1 - r['matmul'] - r['attention']:.0%}")
    fp32, bf16 = rows["fp32"], rows["bf16"]
    speed = fp32["matmul_s"] / bf16["matmul_s"]
    print(f"bf16/fp32 step: {fp32['step_s'] / bf16['step_s']:.2f}x; matrix products {speed:.2f}x faster; Amdahl bound "
          f"with that speed-up: {1 / (fp32['matmul'] / speed + 1 - fp32['matmul']):.2f}x, with an infinite one: "
          f"{1 / (1 - fp32['matmul']):.2f}x")
    positions = int((session.pairs.prompt != session.ids.pad).sum(1).max()) + 2 * 5
    a32, a16 = attention_seconds(torch.float32, positions, args.width), attention_seconds(torch.bfloat16, positions,
                                                                                           args.width)
    print(f"attention kernel alone (16 x 4 heads x {positions} positions, forward + backward): "
          f"fp32 {a32 * 1000:.0f} ms, bf16 {a16 * 1000:.0f} ms ({a32 / a16:.2f}x)")
    m32, m16 = whole_model_seconds(session, policy, torch.float32), whole_model_seconds(session, policy, torch.bfloat16)
    print(f"whole model held in bf16, one batch forward + backward: fp32 {m32 * 1000:.0f} ms, bf16 {m16 * 1000:.0f} ms "
          f"({m32 / m16:.2f}x)")
    print(f"load {os.getloadavg()[0]:.2f} at the end")


if __name__ == "__main__":
    main()
