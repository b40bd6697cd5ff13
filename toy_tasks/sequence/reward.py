"""``polopt reward`` on the enumerable sequence task: a scalar head on the tiny transformer.

The reward model is :class:`polopt.methods.reward_model.ScalarRewardModel` (the tiny causal
transformer over prompt and response tokens, one output read at the last real token),
fitted by maximum likelihood under Bradley–Terry with Adam on sampled token pairs
(``reward.steps``, ``reward.lr``, ``reward.l2`` as a weight penalty). Since the task can
enumerate its responses, the fitted model is also scored on every (prompt, response):
that table, in the reference-weighted mean-zero gauge of :mod:`toy_tasks.methods.reward_fit`,
goes into the file beside the weights, so that ``method.reward=PATH`` optimises it
exactly as it does a table, and the distance to the true rewards is measured on it.
The file's identity holds the task's and the model's shape (vocabulary, context, width,
layers, heads): a file for another task or shape is refused.
"""

from __future__ import annotations

import numpy as np
import torch

from polopt.methods.reward_model import (
    CALIBRATION,
    ScalarRewardModel,
    fit_scalar_reward,
    pair_metrics,
    score,
    split_heldout,
)
from polopt.models.transformer import CONTEXT_FLOOR
from toy_tasks.methods.reward_fit import GAUGE, format_summary, task_identity, to_gauge, true_reward_distance


def model_identity(task, model: dict) -> dict:
    """The task's identity (of its enumerated finite view) and the scalar model's shape."""
    if model.get("kind") != "transformer":
        raise ValueError(f"task=sequence fits a scalar head on the tiny transformer; model={model.get('kind')} "
                         "cannot: give +experiment=sequence (or model=transformer)")
    context = max(int(model.get("context") or CONTEXT_FLOOR), task.context_needed + 1)
    shape = {"vocab_size": task.vocab.size, "context": context,
             **{k: int(model[k]) for k in ("width", "layers", "heads")}}
    return {**task_identity(task.finite), **shape}


def sampled_token_pairs(task, *, mode: str, n_pairs: int, seed: int, heldout: float, head: str):
    """The ``n_pairs`` labelled pairs drawn with ``seed`` and their held-out split, shared by the scalar and
    the pair head so both are measured on the same pairs: (pairs, fit rows, held-out rows, and the fitted
    rows' prompt, winner and loser tokens)."""
    if mode != "sampled":
        raise ValueError(f"task=sequence: polopt reward fits the {head} to sampled token pairs; give "
                         "task.mode=sampled (and task.n_pairs)")
    pairs = task.finite.sample_pairs(n_pairs, seed)
    fit, out = split_heldout(len(pairs), heldout, seed)
    prompt, winner = task.rows(pairs.prompt[fit], pairs.winner[fit])
    _, loser = task.rows(pairs.prompt[fit], pairs.loser[fit])
    return pairs, fit, out, prompt, winner, loser


def fit_sequence_reward(task, *, mode: str, n_pairs: int, seed: int, model: dict, l2: float = 0.0,
                        heldout: float = 0.2, bins: int = 10, steps: int = 400, lr: float = 3e-3) -> dict:
    """Fit the scalar head to ``n_pairs`` sampled pairs (a share ``heldout`` held out); see the module docstring."""
    identity = model_identity(task, model)
    finite = task.finite
    pairs, fit, out, prompt, winner, loser = sampled_token_pairs(task, mode=mode, n_pairs=n_pairs, seed=seed,
                                                                 heldout=heldout, head="scalar head")
    net = ScalarRewardModel(task.vocab.size, pad_id=task.vocab.pad_id, context=identity["context"],
                            width=identity["width"], layers=identity["layers"], heads=identity["heads"],
                            seed=int(model.get("seed", 0)))
    history = fit_scalar_reward(net, prompt, winner, loser, steps=int(steps), lr=float(lr), l2=float(l2), seed=seed)
    all_prompts, all_responses = task.all_rows()
    table = score(net, all_prompts, all_responses).double().reshape(task.n_prompts, task.n_responses).numpy()
    table = to_gauge(table, finite.reference)  # (X, K)
    x, w, lo = pairs.prompt[out], pairs.winner[out], pairs.loser[out]
    counts = np.stack([pairs.prompt[fit], pairs.winner[fit], pairs.loser[fit]], axis=1)
    cells, number = np.unique(counts, axis=0, return_counts=True)
    summary = {"task": "sequence", "kind": "transformer", "mode": mode, "n_pairs": int(n_pairs),
               "fitted_pairs": int(len(fit)), "l2": float(l2), "gauge": GAUGE, "rewards": table.tolist(),
               "pair_counts": [[int(a), int(b), int(c), int(n)] for (a, b, c), n in zip(cells, number, strict=True)],
               "pair_counts_format": "[prompt, winner, loser, count] for every (prompt, winner, loser) sampled, "
                                     "indices into the enumerated responses (polopt export sequence lists them)",
               **pair_metrics(table[x, w] - table[x, lo], bins=bins), "heldout_pairs": int(len(out)),
               "calibration": CALIBRATION.format(bins=bins), "fit_loss_first": history[0], "fit_loss_last": history[-1],
               "solver": f"Adam, {steps} steps, lr {lr:g}, batch 256, float32", "notes": []}
    summary.update(true_reward_distance(table, finite))
    screen = format_summary({**summary, "rewards": None, "true_rewards": None})
    state = {"model": net.state_dict(), "rewards": torch.as_tensor(table)}
    return {"summary": summary, "screen": screen,
            "file": {"kind": "transformer", "identity": identity, "state": state, "gauge": GAUGE, "l2": float(l2)}}
