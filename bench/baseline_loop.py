"""An independent, hand-written pairwise training loop: the side-by-side reference for bench/throughput.py.

    PYTHONPATH=. python bench/baseline_loop.py [--width 256] [--steps 30] [--batch 32]

Plain PyTorch, no polopt import: a pre-norm causal transformer of the same shape
as polopt's tiny transformer (attention written out as softmax(QK^T/sqrt(d)) with
a mask), every batch padded to the dataset's longest prompt + response, the
reference model's log-probabilities computed once before training, the logistic
loss -log sigmoid(beta * margin) (Rafailov et al., Direct Preference
Optimization, 2023) and Adam. It is what a careful person writes first, with no
length handling. Prints real tokens per second (padding excluded).
"""

from __future__ import annotations

import argparse
import math
import time

import torch
import torch.nn.functional as F
from torch import nn

if __package__ in (None, ""):
    from skewed_data import PAD_ID, VOCAB_SIZE, real_token_count, skewed_pairs
else:
    from bench.skewed_data import PAD_ID, VOCAB_SIZE, real_token_count, skewed_pairs


class Layer(nn.Module):
    def __init__(self, d: int, n_head: int):
        super().__init__()
        self.n_head = n_head
        self.ln1, self.ln2 = nn.LayerNorm(d), nn.LayerNorm(d)
        self.q, self.k, self.v, self.o = (nn.Linear(d, d) for _ in range(4))
        self.fc1, self.fc2 = nn.Linear(d, 4 * d), nn.Linear(4 * d, d)

    def forward(self, x: torch.Tensor, causal: torch.Tensor) -> torch.Tensor:
        n, t, d = x.shape  # (B, T, C)
        h = self.ln1(x)
        split = [f(h).reshape(n, t, self.n_head, d // self.n_head).transpose(1, 2) for f in (self.q, self.k, self.v)]
        scores = split[0] @ split[1].transpose(-1, -2) / math.sqrt(d // self.n_head)  # (B, H, T, T)
        weights = scores.masked_fill(~causal, float("-inf")).softmax(dim=-1)  # (B, H, T, T)
        x = x + self.o((weights @ split[2]).transpose(1, 2).reshape(n, t, d))  # (B, T, C)
        return x + self.fc2(F.gelu(self.fc1(self.ln2(x))))  # (B, T, C)


class Net(nn.Module):
    def __init__(self, d: int, n_layer: int, n_head: int, ctx: int, seed: int):
        super().__init__()
        torch.manual_seed(seed)
        self.tok, self.pos = nn.Embedding(VOCAB_SIZE, d), nn.Embedding(ctx, d)
        self.layers = nn.ModuleList(Layer(d, n_head) for _ in range(n_layer))
        self.ln, self.out = nn.LayerNorm(d), nn.Linear(d, VOCAB_SIZE, bias=False)

    def forward(self, ids: torch.Tensor) -> torch.Tensor:
        t = ids.shape[1]
        causal = torch.ones(t, t, dtype=torch.bool).tril()  # (T, T)
        x = self.tok(ids) + self.pos(torch.arange(t))  # (B, T, C)
        for layer in self.layers:
            x = layer(x, causal)
        return self.out(self.ln(x))  # (B, T, V)


def join(prompt: torch.Tensor, response: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Each prompt followed by its response, all rows padded to the same full width; mask of response tokens."""
    rows, masks = [], []
    width = prompt.shape[1] + response.shape[1]
    for p, r in zip(prompt.tolist(), response.tolist(), strict=True):
        p = [t for t in p if t != PAD_ID]
        r = [t for t in r if t != PAD_ID]
        rows.append(p + r + [PAD_ID] * (width - len(p) - len(r)))
        masks.append([False] * len(p) + [True] * len(r) + [False] * (width - len(p) - len(r)))
    return torch.tensor(rows), torch.tensor(masks)


def sequence_logp(net: nn.Module, ids: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    logits = net(ids[:, :-1])  # (B, T-1, V)
    target = ids[:, 1:].clamp(max=VOCAB_SIZE - 1)  # (B, T-1)
    logp = logits.log_softmax(-1).gather(-1, target[..., None])[..., 0]  # (B, T-1)
    return (logp * mask[:, 1:]).sum(1)  # (B,)


def run(*, width: int = 256, layers: int = 2, heads: int = 4, n_pairs: int = 512, batch: int = 32, steps: int = 30,
        warmup: int = 3, max_length: int = 128, beta: float = 0.5, lr: float = 1e-4, seed: int = 0) -> dict:
    data = skewed_pairs(n_pairs, max_length=max_length, seed=seed)
    tokens = real_token_count(data)  # (N,)
    w_ids, w_mask = join(data["prompt"], data["winner"])
    l_ids, l_mask = join(data["prompt"], data["loser"])
    ctx = w_ids.shape[1]
    policy, ref = Net(width, layers, heads, ctx, seed), Net(width, layers, heads, ctx, seed)
    with torch.no_grad():
        ref_w = torch.cat([sequence_logp(ref, w_ids[i:i + 256], w_mask[i:i + 256]) for i in range(0, n_pairs, 256)])
        ref_l = torch.cat([sequence_logp(ref, l_ids[i:i + 256], l_mask[i:i + 256]) for i in range(0, n_pairs, 256)])
    opt = torch.optim.Adam(policy.parameters(), lr=lr)
    gen = torch.Generator().manual_seed(seed)
    perm, pos = torch.randperm(n_pairs, generator=gen), 0
    seen, start = 0, time.perf_counter()
    for step in range(warmup + steps):
        if step == warmup:
            seen, start = 0, time.perf_counter()
        if pos + batch > n_pairs:
            perm, pos = torch.randperm(n_pairs, generator=gen), 0
        idx = perm[pos:pos + batch]
        pos += batch
        both = sequence_logp(policy, torch.cat([w_ids[idx], l_ids[idx]]), torch.cat([w_mask[idx], l_mask[idx]]))
        lw, ll = both.chunk(2)
        margin = (lw - ref_w[idx]) - (ll - ref_l[idx])
        loss = -F.logsigmoid(beta * margin).mean()
        opt.zero_grad()
        loss.backward()
        opt.step()
        seen += int(tokens[idx].sum())
    seconds = time.perf_counter() - start
    return {"tokens_per_s": seen / seconds, "step_s": seconds / steps, "loss": float(loss.detach())}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--width", type=int, default=256)
    parser.add_argument("--steps", type=int, default=30)
    parser.add_argument("--batch", type=int, default=32)
    parser.add_argument("--threads", type=int, default=2)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    r = run(width=args.width, steps=args.steps, batch=args.batch)
    print(f"baseline loop: {r['tokens_per_s']:,.0f} real tokens/s, {r['step_s'] * 1000:.1f} ms/step")


if __name__ == "__main__":
    main()
