"""Autoregressive sequence models: next-token logits from a token prefix.

Every model here maps right-padded tokens ``(B, T)`` to next-token logits
``(B, T, V_out)``: the logits at position t score the token at t + 1 given the
tokens 0..t. The input vocabulary (``vocab_size``: response symbols, prompt
tokens, padding) may be larger than the output one (``output_size``: the tokens a
response can contain), so that the model's sequence distribution lives exactly on
the responses a task can enumerate.

- :class:`TinyTransformer`: a small causal transformer (pre-norm blocks of causal
  self-attention and an MLP, learned absolute positions), written top to bottom
  in the order of the maths: attention, MLP, block, the whole model.
- :class:`BigramTable`: the simpler model, one free logit vector per
  (position, previous token); it cannot see further back than one token.

Both are deterministic functions of their ``seed``. Log-probabilities of whole
responses (masking, padding) live in :mod:`polopt.models.logprobs`.
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F
from torch import nn

Tensor = torch.Tensor

KINDS = ("transformer", "bigram")
CONTEXT_FLOOR = 16  # model.context=null gives at least this many positions (the earlier fixed default)
CONTEXT_CAP = 4096  # ... and at most this many; a task needing more names model.context in an error


def default_context(need: int, *, floor: int = CONTEXT_FLOOR) -> int:
    """``model.context=null``: the ``need`` input positions of a task's longest row, at least ``floor``; a
    ValueError beyond :data:`CONTEXT_CAP` (the position table and attention grow with it: ask for it openly)."""
    if need > CONTEXT_CAP:
        raise ValueError(f"the longest row needs {need} input positions, more than model.context=null gives "
                         f"(at most {CONTEXT_CAP}); give model.context={need}, or cut rows with task.max_length")
    return max(need, floor)


def check_positions(tokens: Tensor, positions: Tensor | None, context: int) -> Tensor:
    """The position of every input token: 0..T-1 (T,) when ``positions`` is None, else ``positions``
    (B, T); a ValueError naming ``model.context`` when a position lies beyond it."""
    if positions is None:
        t = tokens.shape[1]
        if t > context:
            raise ValueError(f"model.context is {context} but a sequence has {t} input tokens; "
                             f"set model.context={t} or more")
        return torch.arange(t, device=tokens.device)  # (T,)
    if torch.compiler.is_compiling():  # a data-dependent check would break the compiled graph; eager runs check
        return positions
    longest = int(positions.max()) + 1 if positions.numel() else 0
    if longest > context:
        raise ValueError(f"model.context is {context} but a sequence has {longest} input tokens; "
                         f"set model.context={longest} or more")
    return positions  # (B, T)


class CausalSelfAttention(nn.Module):
    """Multi-head self-attention in which position t attends to positions <= t only.

    ``softmax(Q K^T / sqrt(d) + causal mask) V`` per head (Vaswani et al., Attention
    Is All You Need, 2017), computed by torch's scaled_dot_product_attention.
    """

    def __init__(self, width: int, heads: int):
        super().__init__()
        self.heads = heads
        self.qkv = nn.Linear(width, 3 * width)
        self.proj = nn.Linear(width, width)

    def forward(self, x: Tensor, mask: Tensor | None = None) -> Tensor:
        """``mask`` (B, 1, T, T) boolean, True where query t may attend to key s, replaces the causal
        mask (a shared-prompt row, :func:`polopt.models.logprobs.pack_pairs`); None: causal."""
        b, t, c = x.shape  # (B, T, C)
        q, k, v = self.qkv(x).split(c, dim=2)  # 3 x (B, T, C)
        q, k, v = (z.view(b, t, self.heads, c // self.heads).transpose(1, 2) for z in (q, k, v))  # (B, H, T, D)
        if torch.is_autocast_enabled("cpu") and x.device.type == "cpu":
            # the CPU's bf16 attention backward runs several times slower than its fp32 one (bench/throughput.py),
            # and attention is a small share of the FLOPs: compute it in fp32, the matrix products stay in bf16
            with torch.autocast("cpu", enabled=False):
                y = F.scaled_dot_product_attention(q.float(), k.float(), v.float(), attn_mask=mask,
                                                   is_causal=mask is None).to(q.dtype)
        else:
            y = F.scaled_dot_product_attention(q, k, v, attn_mask=mask, is_causal=mask is None)  # (B, H, T, D)
        return self.proj(y.transpose(1, 2).reshape(b, t, c))  # (B, T, C)


class MLP(nn.Module):
    """Position-wise ``W_2 GELU(W_1 x)`` with a hidden width of 4 C."""

    def __init__(self, width: int):
        super().__init__()
        self.up = nn.Linear(width, 4 * width)
        self.down = nn.Linear(4 * width, width)

    def forward(self, x: Tensor) -> Tensor:
        return self.down(F.gelu(self.up(x)))  # (B, T, C)


class Block(nn.Module):
    """Pre-norm residual block: ``x + attn(LN(x))``, then ``x + mlp(LN(x))``."""

    def __init__(self, width: int, heads: int):
        super().__init__()
        self.norm_attn = nn.LayerNorm(width)
        self.attn = CausalSelfAttention(width, heads)
        self.norm_mlp = nn.LayerNorm(width)
        self.mlp = MLP(width)

    def forward(self, x: Tensor, mask: Tensor | None = None) -> Tensor:
        x = x + self.attn(self.norm_attn(x), mask)  # (B, T, C)
        return x + self.mlp(self.norm_mlp(x))  # (B, T, C)


class TinyTransformer(nn.Module):
    """Token and position embeddings, ``layers`` blocks, a final norm, a linear head.

    Weights start as N(0, 0.02^2), the residual projections scaled by
    1 / sqrt(2 layers) so the residual stream keeps its scale with depth (Radford
    et al., Language Models are Unsupervised Multitask Learners, 2019).
    """

    def __init__(self, vocab_size: int, *, output_size: int | None = None, context: int = 16, width: int = 32,
                 layers: int = 2, heads: int = 2, seed: int = 0):
        super().__init__()
        for name, value in (("vocab_size", vocab_size), ("model.context", context), ("model.width", width),
                            ("model.layers", layers), ("model.heads", heads)):
            if not isinstance(value, int) or isinstance(value, bool) or value < 1:
                raise ValueError(f"{name} must be a positive integer, got {value!r}")
        if width % heads:
            raise ValueError(f"model.width must be a multiple of model.heads, got width={width}, heads={heads}")
        self.context = context
        with torch.random.fork_rng(devices=[]):  # seeded weights without touching the global stream
            torch.manual_seed(seed)
            self.token_embedding = nn.Embedding(vocab_size, width)
            self.position_embedding = nn.Embedding(context, width)
            self.blocks = nn.ModuleList(Block(width, heads) for _ in range(layers))
            self.norm = nn.LayerNorm(width)
            self.head = nn.Linear(width, output_size or vocab_size, bias=False)
            for name, p in self.named_parameters():
                if p.dim() < 2:
                    continue  # biases stay 0 and norms 1, as nn initialised them
                std = 0.02 / math.sqrt(2 * layers) if name.endswith(("proj.weight", "down.weight")) else 0.02
                nn.init.normal_(p, 0.0, std)
            for module in self.modules():
                if isinstance(module, nn.Linear) and module.bias is not None:
                    nn.init.zeros_(module.bias)

    takes_layout = True  # forward accepts positions and an attention mask (a shared-prompt row)

    def forward(self, tokens: Tensor, positions: Tensor | None = None, mask: Tensor | None = None) -> Tensor:
        """Next-token logits: tokens (B, T) -> (B, T, V_out).

        ``positions`` (B, T) and ``mask`` (B, 1, T, T) lay out several sequences in one row (see
        :func:`polopt.models.logprobs.pack_pairs`); None: one causal sequence at positions 0..T-1.
        """
        positions = check_positions(tokens, positions, self.context)  # (T,) or (B, T)
        x = self.token_embedding(tokens) + self.position_embedding(positions)  # (B, T, C)
        for block in self.blocks:
            x = block(x, mask)  # (B, T, C)
        return self.head(self.norm(x))  # (B, T, V_out)


class BigramTable(nn.Module):
    """Logits ``table[t, token_t]`` (B, T, V_out): one free vector per (position, previous token).

    It starts at zero (uniform next tokens). A sequence distribution that depends on
    more than the previous token and the position is out of its reach, so on most
    tasks it stops short of the optimum: a baseline for the transformer.
    """

    def __init__(self, vocab_size: int, *, output_size: int | None = None, context: int = 16, seed: int = 0):
        super().__init__()
        del seed  # zero start: nothing random
        self.context = context
        self.table = nn.Parameter(torch.zeros(context, vocab_size, output_size or vocab_size))

    takes_layout = True  # it reads one token: positions suffice, the mask changes nothing

    def forward(self, tokens: Tensor, positions: Tensor | None = None, mask: Tensor | None = None) -> Tensor:
        del mask  # each position sees its own token only
        positions = check_positions(tokens, positions, self.context)  # (T,) or (B, T)
        return self.table[positions, tokens]  # (B, T, V_out)


def build_model(kind: str, *, vocab_size: int, output_size: int | None = None, context: int = 16, width: int = 32,
                layers: int = 2, heads: int = 2, seed: int = 0) -> nn.Module:
    """The sequence model named by ``model.kind``: ``transformer`` or ``bigram``."""
    if kind == "transformer":
        return TinyTransformer(vocab_size, output_size=output_size, context=context, width=width, layers=layers,
                               heads=heads, seed=seed)
    if kind == "bigram":
        return BigramTable(vocab_size, output_size=output_size, context=context, seed=seed)
    raise ValueError(f"model.kind {kind!r} is not a sequence model; choose one of {', '.join(KINDS)}")


def copy_weights(target: nn.Module, source: nn.Module) -> None:
    """Start ``target`` at ``source``'s weights (a policy initialised from its reference).

    Every tensor must have the same shape, except position tables, whose
    overlapping rows are copied (the target may have a longer context).
    """
    target_state = target.state_dict()
    source_state = source.state_dict()
    if set(target_state) != set(source_state):
        raise ValueError("model.init=reference needs the model to have the reference's architecture "
                         f"({type(source).__name__}); use model.init=random for another one")
    with torch.no_grad():
        for name, value in source_state.items():
            dest = target_state[name]
            if dest.shape == value.shape:
                dest.copy_(value)
            elif name.endswith("position_embedding.weight") and dest.shape[1:] == value.shape[1:] \
                    and dest.shape[0] >= value.shape[0]:
                dest[: value.shape[0]].copy_(value)
            else:
                raise ValueError(f"model.init=reference: the model's {name} has shape {tuple(dest.shape)} but "
                                 f"the reference's has {tuple(value.shape)}; give the model the reference's "
                                 "width/layers/heads, or use model.init=random")
