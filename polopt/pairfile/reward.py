"""``polopt reward task=pairs``: a scalar-head reward model fitted to a preference-pair file.

The file is read and checked by :mod:`polopt.data` as ``polopt train task=pairs`` reads it
(every row accepted or rejected), prompts and responses are encoded as there
(:mod:`polopt.data.encoding`), a share ``reward.heldout`` of the accepted pairs is held out
by a permutation seeded with ``train.seed``, and
:class:`polopt.methods.reward_model.ScalarRewardModel` is fitted to the rest by Adam under
Bradley–Terry (:func:`polopt.methods.reward_model.fit_scalar_reward`). The pairs are the file's
rows, so ``summary.json`` lists the held-out rows (by their place in the file) instead
of counts; there is no table and no true reward to compare with.
"""

from __future__ import annotations

import numpy as np
import torch

from polopt.data import PairFileSpec, read_pair_file
from polopt.data.encoding import SequenceIds, encode_prompts, encode_responses
from polopt.data.kinds import require_pairs
from polopt.data.tokenizer import load_tokenizer
from polopt.methods.reward_model import (
    CALIBRATION,
    ScalarRewardModel,
    fit_scalar_reward,
    pair_metrics,
    score,
    split_heldout,
)
from polopt.models.logprobs import real_tokens
from polopt.models.transformer import CONTEXT_FLOOR


def pair_identity(file: PairFileSpec, ids: SequenceIds, shape: dict) -> dict:
    """What a pair-file reward model must match: the file, its tokenizer's ids, the model's shape."""
    return {"task": "pairs", "path": str(file.path), "tokenizer": str(file.tokenizer or "byte"),
            "vocab_size": ids.vocab_size, "pad": ids.pad, **shape}


def heldout_summary(data, n: int, fit, out, margin: np.ndarray, *, l2: float, bins: int, steps: int, lr: float,
                    history: list[float]) -> dict:
    """The summary fields every reward model fitted to a pair file shares: the file's accounting, the split
    (``fit``, ``out``: row indices), the held-out metrics of ``margin`` (the held-out score differences,
    weighted by the file's weights where it has them) and the fit."""
    weight = np.asarray(data.weight[:n], dtype=np.float64)[out.numpy()] if data.accounting["weighted"] else None
    return {"rows_in": data.accounting["rows_in"], "rows_accepted": data.accounting["rows_accepted"],
            "rows_rejected": data.accounting["rows_rejected"], "fitted_pairs": int(len(fit)),
            "heldout_pairs": int(len(out)), "l2": float(l2), "rewards": None, "pair_counts": None,
            "heldout_rows": [int(data.location[i]) for i in out.tolist()], "row_unit": data.accounting.get("row_unit"),
            **pair_metrics(margin, weight, bins=bins), "calibration": CALIBRATION.format(bins=bins),
            "fit_loss_first": history[0], "fit_loss_last": history[-1],
            "solver": f"Adam, {steps} steps, lr {lr:g}, batch 256, float32"}


def encode_pair_file(file: PairFileSpec, *, mode: str, n_pairs: int | None, model: dict) -> tuple:
    """The file's first ``n_pairs`` accepted pairs as tokens for a head on the tiny transformer: ``(data, n, ids,
    prompt (N, T_p), winner (N, T_r), loser (N, T_r), shape)``, ``shape`` the model's context, width, layers
    and heads (the context stretched to the longest pair)."""
    if mode != "sampled":
        raise ValueError(f"task.mode must be sampled for task=pairs (a file holds sampled pairs), got {mode!r}")
    if model.get("kind") != "transformer":
        raise ValueError(f"task=pairs fits a scalar head on the tiny transformer or on model=local_lm; "
                         f"model={model.get('kind')} cannot: give +experiment=pairs (or model=transformer)")
    tokenizer = load_tokenizer(file.tokenizer or "byte")
    data = read_pair_file(file, tokenizer=tokenizer)
    require_pairs(data.kind, "polopt reward (a reward or preference head fitted to pairs)")
    n = len(data) if n_pairs is None else min(int(n_pairs), len(data))
    if n < 2:
        raise ValueError(f"task.path {str(file.path)!r}: {n} pair(s) accepted; a reward model needs at least 2")
    ids = SequenceIds.for_tokenizer(tokenizer)
    prompt = encode_prompts(tokenizer, data.prompt[:n], ids)  # (N, T_p)
    both = encode_responses(tokenizer, data.winner[:n] + data.loser[:n], ids)  # (2N, T_r)
    winner, loser = both[:n], both[n:]  # (N, T_r) each
    longest = int(torch.maximum(real_tokens(prompt, winner, pad_id=ids.pad),
                                real_tokens(prompt, loser, pad_id=ids.pad)).max())
    shape = {"context": max(int(model.get("context") or CONTEXT_FLOOR), longest),
             **{k: int(model.get(k, d)) for k, d in (("width", 32), ("layers", 2), ("heads", 2))}}
    return data, n, ids, prompt, winner, loser, shape


def fit_pair_reward(file: PairFileSpec, *, mode: str, n_pairs: int | None, seed: int, model: dict, l2: float = 0.0,
                    heldout: float = 0.2, bins: int = 10, steps: int = 300, lr: float = 3e-3,
                    encoded: tuple | None = None) -> dict:
    """Fit the scalar head to the file's accepted pairs; return ``summary``, ``screen`` and ``file``.
    ``encoded``: :func:`encode_pair_file`'s result where the caller has it already."""
    data, n, ids, prompt, winner, loser, shape = encoded or encode_pair_file(file, mode=mode, n_pairs=n_pairs,
                                                                             model=model)
    net = ScalarRewardModel(ids.vocab_size, pad_id=ids.pad, seed=int(model.get("seed", 0)), **shape)
    fit, out = (torch.as_tensor(i) for i in split_heldout(n, heldout, seed))
    history = fit_scalar_reward(net, prompt[fit], winner[fit], loser[fit], steps=int(steps), lr=float(lr),
                                l2=float(l2), seed=seed)
    margin = (score(net, prompt[out], winner[out]) - score(net, prompt[out], loser[out])).double().numpy()
    summary = {"task": "pairs", "kind": "transformer", "path": str(file.path),
               **heldout_summary(data, n, fit, out, margin, l2=l2, bins=bins, steps=steps, lr=lr, history=history),
               "notes": ["the pairs are the file's rows: refit from task.path; heldout_rows lists the held-out ones"]}
    acc, ece = summary["heldout_accuracy"], summary["calibration_error"]
    screen = (f"pairs: {file.path}: fitted on {len(fit)}, held out {len(out)}\nheldout_accuracy "
              f"{'-' if acc is None else f'{acc:.4f}'}  calibration_error {'-' if ece is None else f'{ece:.4f}'}")
    return {"summary": summary, "screen": screen,
            "file": {"kind": "transformer", "identity": pair_identity(file, ids, shape),
                     "state": {"model": net.state_dict()}, "l2": float(l2)}}
