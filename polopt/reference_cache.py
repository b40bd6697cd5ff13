"""The reference model's log-probabilities over a dataset, computed once.

The reference does not change during training, so its log-probabilities of
every (prompt, response) row are computed once, kept in memory (the trainer's
:class:`polopt.pair_set.PairSet` holds them) and written to the run folder, by
default ``reference_logprobs.pt``. A later run in the same folder on the same
dataset with the same reference loads them instead of recomputing; a
fingerprint (SHA-256 of the tokens and of the reference's weights) tells when the
file no longer matches, and then it is recomputed and overwritten.

The file is a plain dict ``{"fingerprint": str, "logprobs": Tensor (N,)}``,
read back with ``torch.load(..., weights_only=True)``.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import torch
from torch import nn

from polopt.logprobs import batched_logprobs

Tensor = torch.Tensor

FILE_NAME = "reference_logprobs.pt"


def fingerprint(model: nn.Module, prompt: Tensor, response: Tensor) -> str:
    """SHA-256 over the token tensors and every tensor of the model's state."""
    digest = hashlib.sha256()
    for tensor in (prompt, response):
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
    if path is not None:
        path = Path(path)
        if path.is_file():
            stored = torch.load(path, weights_only=True)
            if isinstance(stored, dict) and stored.get("fingerprint") == key:
                return stored["logprobs"], True
    model.eval()
    values = batched_logprobs(model, prompt, response, pad_id=pad_id, batch_size=batch_size, progress=progress,
                              desc="reference log-probs")
    if path is not None:
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_suffix(path.suffix + ".tmp")
        torch.save({"fingerprint": key, "logprobs": values}, tmp)
        tmp.replace(path)
    return values, False
