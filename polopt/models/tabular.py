"""Policies over a finite response set, parameterised through log-ratios.

Both start at the reference: ``log pi(y|x) = log_softmax(log pi_ref(.|x) + s(x, .))[y]``
with a score ``s`` that is 0 at initialisation, so the log-ratio
``h(x, y) = s(x, y) - logsumexp_y' (log pi_ref(y'|x) + s(x, y'))`` matches
docs/maths.md's ``pi ∝ pi_ref e^h``.

- :class:`TabularPolicy`: one free score per (prompt, response); can represent
  every policy, so it reaches any finite optimum.

Both store their parameters in units of ``score_scale`` (the run passes
``1 / beta``): the loss depends on ``beta * h`` only, so parameters of order 1
at the optimum let one learning rate serve every beta.
- :class:`LogLinearPolicy`: ``s(x, y) = phi(x, y) . w`` with fixed random
  features of dimension ``width``; it represents every policy when
  ``width >= K`` (the features then span each prompt's score space).
"""

from __future__ import annotations

import torch
from torch import nn

Tensor = torch.Tensor


class TabularPolicy(nn.Module):
    """A table of scores (X, K) added to the reference's log-probabilities."""

    def __init__(self, reference_logprobs: Tensor, *, score_scale: float = 1.0):
        super().__init__()
        self.register_buffer("reference_logprobs", reference_logprobs.clone())  # (X, K)
        self.score_scale = float(score_scale)
        self.scores = nn.Parameter(torch.zeros_like(reference_logprobs))

    def scores_table(self) -> Tensor:
        return self.score_scale * self.scores

    def log_distribution(self) -> Tensor:
        """log pi(.|x) for every prompt: (X, K)."""
        return torch.log_softmax(self.reference_logprobs + self.scores_table(), dim=-1)

    def logprobs(self, prompt: Tensor, response: Tensor) -> Tensor:
        """log pi(response | prompt) for index tensors of shape (B,) -> (B,)."""
        return self.log_distribution()[prompt, response]


class LogLinearPolicy(TabularPolicy):
    """Scores ``phi(x, y) . w`` with fixed Gaussian features phi (X, K, width)."""

    def __init__(self, reference_logprobs: Tensor, *, width: int = 16, seed: int = 0, score_scale: float = 1.0):
        if width < 1:
            raise ValueError(f"model.width must be >= 1 for the log-linear policy, got {width}")
        super().__init__(reference_logprobs, score_scale=score_scale)
        del self.scores
        generator = torch.Generator().manual_seed(seed)
        features = torch.randn(*reference_logprobs.shape, width, generator=generator,
                               dtype=reference_logprobs.dtype)  # (X, K, D)
        self.register_buffer("features", features / width**0.5)
        self.weight = nn.Parameter(torch.zeros(width, dtype=reference_logprobs.dtype))

    def scores_table(self) -> Tensor:
        return self.score_scale * (self.features @ self.weight)  # (X, K, D) @ (D,) -> (X, K)


def build_policy(kind: str, reference_logprobs: Tensor, *, width: int = 16, seed: int = 0,
                 score_scale: float = 1.0) -> TabularPolicy:
    """The finite-task policy named by ``model.kind``: ``tabular`` or ``loglinear``."""
    if kind == "tabular":
        return TabularPolicy(reference_logprobs, score_scale=score_scale)
    if kind == "loglinear":
        return LogLinearPolicy(reference_logprobs, width=width, seed=seed, score_scale=score_scale)
    raise ValueError(f"model.kind {kind!r} is not a finite-task policy; choose tabular or loglinear")
