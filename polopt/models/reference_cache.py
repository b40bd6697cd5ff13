"""The reference model's log-probabilities over a dataset, computed once.

The reference does not change during training, so its log-probabilities of
every (prompt, response) row are computed once, kept in memory (the trainer's
:class:`polopt.pairs.PairSet` holds them) and written to the run folder, by
default ``reference_logprobs.pt``. A later run in the same folder on the same
dataset with the same reference loads them instead of recomputing; a
fingerprint (SHA-256 of the tokens and of the reference's weights) tells when the
file no longer matches, and then it is recomputed and overwritten.

:func:`reference_pair_logprobs` does the same for labelled pairs, each pair's
winner and loser scored in one pass over their prompt where the model allows it
(:func:`polopt.models.logprobs.batched_pair_logprobs`); the fingerprint then records it.

The file is a plain dict ``{"fingerprint": str, "logprobs": Tensor (N,)}``,
read back with ``torch.load(..., weights_only=True)``.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import torch
from torch import nn

from polopt.models.logprobs import batched_logprobs, batched_pair_logprobs

Tensor = torch.Tensor

FILE_NAME = "reference_logprobs.pt"


def fingerprint(model: nn.Module, *tokens: Tensor, method: str = "") -> str:
    """SHA-256 over the token tensors, every tensor of the model's state and the ``method`` of scoring."""
    digest = hashlib.sha256(method.encode())
    for tensor in tokens:
        digest.update(str(tuple(tensor.shape)).encode())
        digest.update(tensor.contiguous().numpy().tobytes())
    for name, value in sorted(model.state_dict().items()):
        digest.update(name.encode())
        digest.update(value.detach().contiguous().cpu().numpy().tobytes())
    return digest.hexdigest()


def reference_logprobs(model: nn.Module, prompt: Tensor, response: Tensor, *, pad_id: int,
                       path: str | Path | None = None, batch_size: int = 4096,
                       progress: bool = False) -> tuple[Tensor, bool]:
    """``log pi_ref(response | prompt)`` for every row (N,), from ``path`` when it matches.

    Returns the log-probabilities and whether they were read from ``path``
    (False: computed now). ``path`` None keeps them in memory only. The model
    runs in eval mode and without gradients.
    """
    key = fingerprint(model, prompt, response)
    stored = _stored(path, key)
    if stored is not None:
        return stored, True
    model.eval()
    values = batched_logprobs(model, prompt, response, pad_id=pad_id, batch_size=batch_size, progress=progress,
                              desc="reference log-probs")
    _store(path, key, values)
    return values, False


def reference_pair_logprobs(model: nn.Module, prompt: Tensor, winner: Tensor, loser: Tensor, *, pad_id: int,
                            path: str | Path | None = None, batch_size: int = 4096, progress: bool = False,
                            share_prompt: bool = True) -> tuple[Tensor, bool]:
    """Winners' then losers' reference log-probs (2N,), as :func:`reference_logprobs` of the two
    concatenated along the batch; with ``share_prompt`` and a model that takes the shared-prompt
    layout, each pair in one pass over its prompt. Returns them and whether they came from ``path``."""
    shared = share_prompt and bool(getattr(model, "takes_layout", False))
    if not shared:
        return reference_logprobs(model, torch.cat([prompt, prompt]), torch.cat([winner, loser]), pad_id=pad_id,
                                  path=path, batch_size=batch_size, progress=progress)
    key = fingerprint(model, prompt, winner, loser, method="shared prompt")
    stored = _stored(path, key)
    if stored is not None:
        return stored, True
    model.eval()
    values = batched_pair_logprobs(model, prompt, winner, loser, pad_id=pad_id, batch_size=batch_size,
                                   progress=progress, desc="reference log-probs")  # (2N,)
    _store(path, key, values)
    return values, False


def _stored(path: str | Path | None, key: str) -> Tensor | None:
    """The log-probs kept at ``path`` when its fingerprint is ``key``, else None."""
    if path is not None and Path(path).is_file():
        stored = torch.load(path, weights_only=True)
        if isinstance(stored, dict) and stored.get("fingerprint") == key:
            return stored["logprobs"]
    return None


def _store(path: str | Path | None, key: str, values: Tensor) -> None:
    """Write ``values`` with their fingerprint to ``path`` atomically (None: keep them in memory only)."""
    if path is not None:
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_suffix(path.suffix + ".tmp")
        torch.save({"fingerprint": key, "logprobs": values}, tmp)
        tmp.replace(path)
