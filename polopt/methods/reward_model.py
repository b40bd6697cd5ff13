"""Bradley–Terry reward models: the file, the held-out measures, and a scalar head on the tiny transformer.

A reward model scores a (prompt, response) pair with a real number r(x, y); under
Bradley–Terry the probability that y_w is preferred to y_l is
``sigmoid(r(x, y_w) - r(x, y_l))`` (Bradley & Terry, Rank analysis of incomplete
block designs, 1952). Only differences of r within a prompt are identified.

This module owns what every kind of reward model shares:

- the file: ``torch.save`` of a plain dict (loaded back with
  ``torch.load(weights_only=True)``) holding ``kind`` (``table``, ``transformer`` or ``local_lm``; the
  preference models of :mod:`polopt.methods.preference_model` share the file as ``preference_*``),
  the weights, and ``identity``, a dict describing the task and the model shape
  it was fitted for, so that a file for another task or shape is refused in one
  line (:func:`load_reward_model`);
- the held-out measures of a fitted model (:func:`pair_metrics`): pair accuracy
  and the expected calibration error;
- :class:`ScalarRewardModel`, the tiny causal transformer with a one-output head
  read at the last real token, and :func:`fit_scalar_reward`, its maximum-likelihood
  fit by Adam on token pairs. The finite-task table fit lives with the tasks
  (``toy_tasks/methods/reward_fit.py``).
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from polopt.models.logprobs import pack
from polopt.models.transformer import TinyTransformer

FORMAT = "polopt reward model"
VERSION = 1
KINDS = ("table", "transformer", "local_lm",  # local_lm: polopt.methods.lm_reward
         "preference_table", "preference_transformer", "preference_local_lm")  # polopt.methods.preference_model
CALIBRATION = ("expected calibration error over {bins} equal-width bins of the predicted probability that the "
               "model's favourite of a held-out pair wins, in [0.5, 1] (Naeini et al. 2015; Guo et al. 2017)")

Tensor = torch.Tensor


# ------------------------------------------------------------------ held-out measures


def pair_metrics(margin: np.ndarray, weight: np.ndarray | None = None, *, bins: int = 10) -> dict:
    """Held-out pair accuracy and expected calibration error of a reward model.

    ``margin[n] = r(x_n, y_w) - r(x_n, y_l)`` of each held-out labelled pair (N,),
    ``weight`` (N,) its weight (default 1). Accuracy: the weighted share of pairs with
    a positive margin, ties counted half. Calibration: the model's favourite of the
    pair wins with predicted probability ``c = sigmoid(|margin|)``;
    ``ECE = sum_b (W_b / W) |acc_b - conf_b|`` over ``bins`` equal-width bins of c on
    [0.5, 1] (Naeini et al., Obtaining well calibrated probabilities using Bayesian
    binning, 2015; Guo et al., On calibration of modern neural networks, 2017).
    """
    margin = np.asarray(margin, dtype=np.float64)
    weight = np.ones_like(margin) if weight is None else np.asarray(weight, dtype=np.float64)
    if margin.size == 0 or weight.sum() <= 0:
        return {"heldout_accuracy": None, "calibration_error": None}
    correct = np.where(margin > 0, 1.0, np.where(margin < 0, 0.0, 0.5))  # (N,) did the favourite win
    confidence = 1.0 / (1.0 + np.exp(-np.abs(margin)))  # (N,) in [0.5, 1]
    which = np.minimum(((confidence - 0.5) * 2 * bins).astype(int), bins - 1)  # (N,) bin index
    total = weight.sum()
    ece = 0.0
    for b in range(bins):
        w = weight[which == b]
        if w.sum() > 0:
            gap = abs(np.average(correct[which == b], weights=w) - np.average(confidence[which == b], weights=w))
            ece += w.sum() / total * gap
    return {"heldout_accuracy": float(np.average(correct, weights=weight)), "calibration_error": float(ece)}


def split_heldout(n: int, share: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Indices (fit, held out) of ``n`` pairs: a seeded permutation, ``round(share n)`` held out."""
    if not 0.0 <= share < 1.0:
        raise ValueError(f"reward.heldout (the share of pairs held out) must lie in [0, 1), got {share!r}")
    order = np.random.default_rng(seed).permutation(n)
    k = int(round(share * n))
    return np.sort(order[k:]), np.sort(order[:k])


# ------------------------------------------------------------------ the file


def save_reward_model(path: Path, kind: str, identity: dict, state: dict, **extra) -> Path:
    """Write a reward model atomically (temporary file, fsync, rename); see the module docstring."""
    from polopt.checkpoints.store import atomic_write

    if kind not in KINDS:
        raise ValueError(f"reward model kind must be one of {', '.join(KINDS)}, got {kind!r}")
    buffer = io.BytesIO()
    torch.save({"format": FORMAT, "version": VERSION, "kind": kind, "identity": identity, "state": state, **extra},
               buffer)
    path = Path(path)
    atomic_write(path, buffer.getvalue())
    return path


def load_reward_model(path, identity: dict, *, key: str = "method.reward", what: str = "reward model") -> dict:
    """Read a reward model file (weights only) and refuse one fitted for another task or model shape.

    ``identity``: what the caller's task and model are (the same keys the file was written
    with). A ValueError of one line names the file, the field that differs, both values,
    and what to do.
    """
    path = Path(path)
    redo = ("fit one for this task with polopt reward (the same task keys) and give its reward.pt"
            if what == "reward model" else
            "fit one for this task with polopt reward reward.kind=preference (the same task keys) and give its "
            "preference.pt")
    if not path.is_file():
        raise ValueError(f"{key}: {what} file {str(path)!r} does not exist; {redo}")
    try:
        data = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as err:  # any unreadable or unsafe file: one line
        raise ValueError(f"{key}: {path} is not a readable {what} ({type(err).__name__}); {redo}") from err
    if not isinstance(data, dict) or data.get("format") != FORMAT:
        raise ValueError(f"{key}: {path} is not a polopt {what} (no '{FORMAT}' header); {redo}")
    if data.get("kind") not in KINDS:
        raise ValueError(f"{key}: {path} holds a {what} of unknown kind {data.get('kind')!r}; {redo}")
    theirs = data.get("identity", {})
    for field, mine in identity.items():
        if theirs.get(field) != mine:
            raise ValueError(f"{key}: {path} was fitted for {field} {theirs.get(field)!r}, but this run has "
                             f"{mine!r}; {redo}")
    return data


# ------------------------------------------------------------------ the scalar head on the tiny transformer


class ScalarRewardModel(nn.Module):
    """r(x, y): the tiny causal transformer over prompt and response, its one-output head read
    at the last real token (common practice for sequence reward models).

    ``forward(prompt (B, T_p), response (B, T_r)) -> (B,)`` on right-padded tokens.
    """

    def __init__(self, vocab_size: int, *, pad_id: int, context: int, width: int = 32, layers: int = 2,
                 heads: int = 2, seed: int = 0):
        super().__init__()
        self.pad_id = pad_id
        self.body = TinyTransformer(vocab_size, output_size=1, context=context, width=width, layers=layers,
                                    heads=heads, seed=seed)

    def forward(self, prompt: Tensor, response: Tensor) -> Tensor:
        tokens, mask = pack(prompt, response, pad_id=self.pad_id)  # (B, T), (B, T)
        last = (tokens != self.pad_id).sum(dim=1) - 1  # (B,) index of the last real token
        safe = torch.where(tokens == self.pad_id, 0, tokens)  # pad ids may lie outside the embedding
        scores = self.body(safe).squeeze(-1)  # (B, T)
        return scores.gather(1, last[:, None]).squeeze(1)  # (B,)


def bradley_terry_nll(margin: Tensor, weight: Tensor | None = None) -> Tensor:
    """Mean negative log-likelihood of labelled pairs, ``-log sigmoid(r_w - r_l)`` (Bradley & Terry 1952);
    logsigmoid keeps it finite for large negative margins. (B,) -> scalar."""
    nll = -F.logsigmoid(margin)  # (B,)
    return nll.mean() if weight is None else (weight * nll).sum() / weight.sum()


def fit_scalar_reward(model: ScalarRewardModel, prompt: Tensor, winner: Tensor, loser: Tensor, *,
                      steps: int, lr: float = 3e-3, batch_size: int | None = 256, l2: float = 0.0,
                      seed: int = 0) -> list[float]:
    """Maximum likelihood (L2 penalty ``l2/2 ||theta||^2`` per pair if given) by Adam on token pairs.

    ``prompt`` (N, T_p), ``winner`` and ``loser`` (N, T_r). Returns the loss per step.
    """
    def margin(index: Tensor) -> Tensor:
        both = model(prompt[index].repeat(2, 1), torch.cat([winner[index], loser[index]]))  # (2B,) one pass
        return both[: len(index)] - both[len(index):]  # (B,) r_w - r_l

    return adam_on_pairs(margin, model.parameters(), prompt.shape[0], steps=steps, lr=lr, batch_size=batch_size,
                         l2=l2, seed=seed)


def adam_on_pairs(margin, parameters, n: int, *, steps: int, lr: float, batch_size: int | None = 256,
                  l2: float = 0.0, seed: int = 0) -> list[float]:
    """Minimise ``-mean log sigmoid(margin(index))`` (+ ``l2/2 ||theta||^2``) by Adam over seeded minibatches
    of ``n`` labelled pairs; ``margin`` maps a (B,) index tensor to the (B,) logit that the winner wins (a
    reward difference, or a preference model's logit). Returns the loss per step."""
    parameters = list(parameters)
    optimiser = torch.optim.Adam(parameters, lr=lr)
    generator = torch.Generator().manual_seed(seed)
    history = []
    for _ in range(steps):
        index = torch.randperm(n, generator=generator)[: batch_size or n]  # (B,)
        loss = bradley_terry_nll(margin(index))
        if l2 > 0:
            loss = loss + 0.5 * l2 * sum((p**2).sum() for p in parameters)
        optimiser.zero_grad()
        loss.backward()
        optimiser.step()
        history.append(float(loss.detach()))
    return history


def score(model: ScalarRewardModel, prompt: Tensor, response: Tensor, *, batch: int = 1024) -> Tensor:
    """r(x, y) of many rows without gradient, in chunks: (N, T_p), (N, T_r) -> (N,)."""
    with torch.no_grad():
        return torch.cat([model(prompt[i:i + batch], response[i:i + batch]) for i in range(0, len(prompt), batch)])
