"""Preference models: P(y > y' | x) fitted directly, without the Bradley–Terry assumption.

A Bradley–Terry reward model (:mod:`polopt.methods.reward_model`) writes every preference as
``sigmoid(r(x, y) - r(x, y'))``, so it cannot represent a cycle (y1 > y2 > y3 > y1, each with
probability above 1/2): a real-valued r orders the responses. A preference model scores the pair
itself. Ours are antisymmetric by construction, so that ``P(y > y') + P(y' > y) = 1`` and
``P(y > y) = 1/2`` hold for any weights (the general preference model of Munos et al., Nash Learning
from Human Feedback, 2023, section 3):

    f(x, y, y') = g(h(x, y), h(x, y')) - g(h(x, y'), h(x, y)),   P(y > y' | x) = sigmoid(f),

where ``h`` is an encoding of prompt and response and ``g`` a small two-input network
(:class:`AntisymmetricHead`). ``f(x, y, y') = -f(x, y', y)`` holds exactly in floating point (a
difference and its negation round alike), hence ``f(x, y, y) = 0``. A scalar reward is the special
case ``g(a, b) = r(a)``, so the family contains Bradley–Terry.

This module owns what every kind of preference model shares: the file kinds and the loader that
refuses a reward model where a preference is needed (:func:`load_preference_model`); the head; the
tiny-transformer pair model (:class:`PairwisePreferenceModel`) and its maximum-likelihood fit by
Adam on labelled pairs (:func:`fit_pairwise_preference`). The finite-task table fit lives with the
tasks (``toy_tasks/methods/preference_fit.py``); the file helpers are those of reward models
(:func:`polopt.methods.reward_model.save_reward_model`).
"""

from __future__ import annotations

import torch
from torch import nn

from polopt.methods.reward_model import adam_on_pairs, load_reward_model
from polopt.models.logprobs import pack
from polopt.models.transformer import TinyTransformer

Tensor = torch.Tensor

PREFERENCE_KINDS = ("preference_table", "preference_transformer", "preference_local_lm")
FIT_KINDS = ("bradley_terry", "preference")  # reward.kind
REFIT = ("fit one for this task with polopt reward reward.kind=preference (the same task keys) and give its "
         "preference.pt")


def check_fit_kind(kind) -> str:
    """``reward.kind``: what ``polopt reward`` fits."""
    if kind not in FIT_KINDS:
        raise ValueError(f"reward.kind must be one of {', '.join(FIT_KINDS)}, got {kind!r}")
    return kind


def load_preference_model(path, identity: dict, *, key: str = "method.preference") -> dict:
    """Read a preference model file (weights only); refuse a reward model or a file fitted for another task.

    A ValueError of one line names the field, the file and what to do.
    """
    data = load_reward_model(path, {}, key=key, what="preference model")
    if data["kind"] not in PREFERENCE_KINDS:
        raise ValueError(f"{key}: {path} holds a Bradley–Terry reward model (kind {data['kind']!r}), not a preference "
                         f"model; {REFIT} (a reward model goes to method.reward=PATH)")
    return load_reward_model(path, identity, key=key, what="preference model")


class AntisymmetricHead(nn.Module):
    """``f(a, b) = g(a, b) - g(b, a)``, a logit antisymmetric by construction (module docstring), with

        g(a, b) = a^T M b + v . tanh(U [a; b] + c),

    so ``f = a^T (M - M^T) b + ...``: the bilinear part's skew-symmetric matrix holds a cycle from the
    start (a near-linear g alone would begin as a Bradley–Terry difference ``v' . (a - b)``; the skew
    bilinear form is the general preference model's, Zhang et al., General preference modeling with
    preference representations, 2024, from memory), the small network the rest.
    ``forward(a (B, D), b (B, D)) -> (B,)``."""

    def __init__(self, width: int, *, hidden: int | None = None, seed: int = 0):
        super().__init__()
        with torch.random.fork_rng(devices=[]):  # seeded weights without touching the global stream
            torch.manual_seed(seed)
            self.bilinear = nn.Parameter(torch.randn(width, width) / width)  # M, (D, D)
            self.g = nn.Sequential(nn.Linear(2 * width, hidden or width), nn.Tanh(), nn.Linear(hidden or width, 1))

    def forward(self, a: Tensor, b: Tensor) -> Tensor:
        first, second = torch.cat([a, b]), torch.cat([b, a])  # (2B, D) each: both orders in one pass
        g = ((first @ self.bilinear) * second).sum(-1) + self.g(torch.cat([first, second], -1)).squeeze(-1)  # (2B,)
        return g[: len(a)] - g[len(a):]  # (B,) g(a, b) - g(b, a)


class PairwisePreferenceModel(nn.Module):
    """logit P(y > y' | x) on token rows: the tiny causal transformer encodes prompt + response into a
    ``width`` vector read at the last real token (common practice for sequence scorers), and
    :class:`AntisymmetricHead` compares two encodings.

    ``forward(prompt (B, T_p), first (B, T_r), second (B, T_r)) -> (B,)`` on right-padded tokens.
    """

    def __init__(self, vocab_size: int, *, pad_id: int, context: int, width: int = 32, layers: int = 2,
                 heads: int = 2, seed: int = 0):
        super().__init__()
        self.pad_id = pad_id
        self.body = TinyTransformer(vocab_size, output_size=width, context=context, width=width, layers=layers,
                                    heads=heads, seed=seed)
        self.head = AntisymmetricHead(width, seed=seed + 1)

    def encode(self, prompt: Tensor, response: Tensor) -> Tensor:
        """h(x, y): (B, T_p), (B, T_r) -> (B, width)."""
        tokens, _ = pack(prompt, response, pad_id=self.pad_id)  # (B, T)
        last = (tokens != self.pad_id).sum(dim=1) - 1  # (B,) index of the last real token
        safe = torch.where(tokens == self.pad_id, 0, tokens)  # pad ids may lie outside the embedding
        hidden = self.body(safe)  # (B, T, width)
        return hidden[torch.arange(len(tokens)), last]  # (B, width)

    def forward(self, prompt: Tensor, first: Tensor, second: Tensor) -> Tensor:
        n = len(prompt)
        h = self.encode(prompt.repeat(2, 1), torch.cat([first, second]))  # (2B, width) one pass
        return self.head(h[:n], h[n:])  # (B,)


def fit_pairwise_preference(model: PairwisePreferenceModel, prompt: Tensor, winner: Tensor, loser: Tensor, *,
                            steps: int, lr: float = 3e-3, batch_size: int | None = 256, l2: float = 0.0,
                            seed: int = 0) -> list[float]:
    """Maximum likelihood of labelled pairs, ``-mean log sigmoid(f(x, y_w, y_l))``, by Adam (an L2 penalty
    ``l2/2 ||theta||^2`` if given). ``prompt`` (N, T_p), ``winner`` and ``loser`` (N, T_r); the loss per step."""
    return adam_on_pairs(lambda index: model(prompt[index], winner[index], loser[index]), model.parameters(),
                         len(prompt), steps=steps, lr=lr, batch_size=batch_size, l2=l2, seed=seed)


def fit_feature_head(head: AntisymmetricHead, winner: Tensor, loser: Tensor, *, steps: int, lr: float,
                     l2: float = 0.0, batch_size: int | None = 256, seed: int = 0) -> list[float]:
    """The same likelihood on fixed features (a frozen model's hidden states), ``winner``, ``loser`` (N, H)."""
    return adam_on_pairs(lambda index: head(winner[index], loser[index]), head.parameters(), len(winner),
                         steps=steps, lr=lr, batch_size=batch_size, l2=l2, seed=seed)


def logits_of(model: PairwisePreferenceModel, prompt: Tensor, first: Tensor, second: Tensor, *,
              batch: int = 1024) -> Tensor:
    """f(x, y, y') of many rows without gradient, in chunks: (N, T_p), (N, T_r), (N, T_r) -> (N,)."""
    with torch.no_grad():
        return torch.cat([model(prompt[i:i + batch], first[i:i + batch], second[i:i + batch])
                          for i in range(0, len(prompt), batch)])
