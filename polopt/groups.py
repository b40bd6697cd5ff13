"""The group batch type: groups of responses with their feedback as tensors, the trainer's input
for group objectives (as :class:`polopt.pairs.PairSet` is for pairs).

A task hands the training loop a :class:`GroupSet`; batches are :meth:`GroupSet.select`-ed from it
and moved with :meth:`GroupSet.to`. This module imports nothing but torch.
"""

from __future__ import annotations

from dataclasses import dataclass, fields, replace

import torch

Tensor = torch.Tensor


@dataclass
class GroupSet:
    """Groups as tensors with a leading dimension N.

    ``prompt`` (N, ...) and ``members`` (N, G, ...) are whatever the policy's ``logprobs`` takes per
    member: prompt and response indices for finite tasks, (N,) and (N, G); right-padded token ids for
    sequence models, (N, T_p) and (N, G, T_r). ``reference`` (N, G) the cached reference log-probabilities
    (0 where a member is absent); ``mask`` (N, G) True
    where a member is present; ``lengths`` (N, G) or None (1 each); exactly one of ``labels`` (N, G),
    ``ranks`` (N, G) and ``scores`` (N, G) is set; ``weight`` (N,) or None (equal weights).
    """

    prompt: Tensor
    members: Tensor
    reference: Tensor
    mask: Tensor
    lengths: Tensor | None = None
    labels: Tensor | None = None
    ranks: Tensor | None = None
    scores: Tensor | None = None
    weight: Tensor | None = None

    def __len__(self) -> int:
        return len(self.prompt)

    @property
    def size(self) -> int:
        """G, the member slots per group."""
        return self.members.shape[1]

    def select(self, index: Tensor) -> GroupSet:
        return GroupSet(*(None if (t := getattr(self, f.name)) is None else t[index] for f in fields(self)))

    def to(self, device: torch.device, dtype: torch.dtype | None = None) -> GroupSet:
        """The same groups on ``device`` and, given ``dtype``, every floating-point tensor in it."""
        def move(t: Tensor | None) -> Tensor | None:
            if t is None:
                return None
            return t.to(device, dtype=dtype if dtype is not None and t.is_floating_point() else t.dtype)

        return replace(self, **{f.name: move(getattr(self, f.name)) for f in fields(self)})

    def identity(self) -> tuple:
        """The tensors that define these groups, for a run's checkpoint fingerprint."""
        return tuple(t for f in fields(self) if (t := getattr(self, f.name)) is not None)


def score_groups(score, prompt: Tensor, members: Tensor) -> Tensor:
    """Log-probs (N, G) of every member: ``score(prompt, response)`` over the prompts repeated per
    member and the members flattened, in one pass. ``prompt`` (N, ...), ``members`` (N, G, ...)."""
    n, g = members.shape[:2]
    flat = members.reshape(n * g, *members.shape[2:])  # (N G, ...)
    return score(prompt.repeat_interleave(g, dim=0), flat).reshape(n, g)  # (N G,) -> (N, G)
