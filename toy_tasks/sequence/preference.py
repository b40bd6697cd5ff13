"""``polopt reward reward.kind=preference`` on the enumerable sequence task: an antisymmetric pair head.

The model is :class:`polopt.methods.preference_model.PairwisePreferenceModel` (the tiny causal
transformer encodes prompt + response, a two-input head compares two encodings, antisymmetric by
construction), fitted by maximum likelihood of the sampled labelled pairs with Adam
(``reward.steps``, ``reward.lr``, ``reward.l2`` as a weight penalty). The pairs and the held-out
split are those of the Bradley–Terry scalar head (:mod:`toy_tasks.sequence.reward`: the same
``task.n_pairs`` pairs drawn with ``train.seed``, the same permutation), which is fitted beside it so
that both held-out accuracies are measured on the same pairs. Since the task can enumerate its
responses, the fitted P over every pair of enumerated responses goes into the file, so that
``method=selfplay method.preference=PATH`` plays on it exactly as on a table.
"""

from __future__ import annotations

import numpy as np
import scipy.special
import torch

from polopt.methods.preference_model import PairwisePreferenceModel, fit_pairwise_preference
from polopt.methods.reward_model import CALIBRATION, pair_metrics
from toy_tasks.methods.preference_fit import format_preference_summary
from toy_tasks.sequence.reward import fit_sequence_reward, model_identity, sampled_token_pairs


def logit_table(net: PairwisePreferenceModel, task) -> np.ndarray:
    """f(x, y_i, y_j) over every pair of enumerated responses, (X, K, K) float64, antisymmetric exactly."""
    k = task.n_responses
    with torch.no_grad():
        prompt, response = task.all_rows()
        h = torch.cat([net.encode(prompt[i:i + 1024], response[i:i + 1024])
                       for i in range(0, len(prompt), 1024)]).reshape(task.n_prompts, k, -1)  # (X, K, D)
        first, second = torch.meshgrid(torch.arange(k), torch.arange(k), indexing="ij")  # (K, K) each
        rows = [net.head(h[x][first.flatten()], h[x][second.flatten()]).reshape(k, k) for x in range(task.n_prompts)]
    return torch.stack(rows).double().numpy()  # (X, K, K)


def fit_sequence_preference(task, *, mode: str, n_pairs: int, seed: int, model: dict, l2: float = 0.0,
                            heldout: float = 0.2, bins: int = 10, steps: int = 400, lr: float = 3e-3) -> dict:
    """Fit the pair head to ``n_pairs`` sampled pairs (a share ``heldout`` held out); see the module docstring."""
    if model.get("kind") != "transformer":
        raise ValueError(f"task=sequence fits a pair head on the tiny transformer; model={model.get('kind')} "
                         "cannot: give +experiment=sequence (or model=transformer)")
    identity = model_identity(task, model)
    finite = task.finite
    pairs, fit, out, prompt, winner, loser = sampled_token_pairs(task, mode=mode, n_pairs=n_pairs, seed=seed,
                                                                 heldout=heldout, head="pair head")
    net = PairwisePreferenceModel(task.vocab.size, pad_id=task.vocab.pad_id, context=identity["context"],
                                  width=identity["width"], layers=identity["layers"], heads=identity["heads"],
                                  seed=int(model.get("seed", 0)))
    history = fit_pairwise_preference(net, prompt, winner, loser, steps=int(steps), lr=float(lr), l2=float(l2),
                                      seed=seed)
    logits = logit_table(net, task)  # (X, K, K)
    table = scipy.special.expit(logits)
    x, w, lo = pairs.prompt[out], pairs.winner[out], pairs.loser[out]
    bt = fit_sequence_reward(task, mode=mode, n_pairs=n_pairs, seed=seed, model=model, l2=l2, heldout=heldout,
                             bins=bins, steps=steps, lr=lr)["summary"]
    truth = finite.preference
    pair_mass = np.einsum("x,xi,xj->xij", finite.prompt_weights, finite.sampling, finite.sampling)  # (X, K, K)
    summary = {"task": "sequence", "kind": "preference_transformer", "mode": mode, "n_pairs": int(n_pairs),
               "fitted_pairs": int(len(fit)), "l2": float(l2), "preference": None,
               **pair_metrics(logits[x, w, lo], bins=bins), "heldout_pairs": int(len(out)),
               "bradley_terry_heldout_accuracy": bt["heldout_accuracy"],
               "bradley_terry_calibration_error": bt["calibration_error"], "bradley_terry_note": None,
               "true_preference_heldout_accuracy": pair_metrics(scipy.special.logit(truth[x, w, lo]))[
                   "heldout_accuracy"],
               "preference_rms_error": float(np.sqrt((pair_mass * (table - truth) ** 2).sum())),
               "calibration": CALIBRATION.format(bins=bins), "fit_loss_first": history[0],
               "fit_loss_last": history[-1], "solver": f"Adam, {steps} steps, lr {lr:g}, batch 256, float32",
               "notes": ["the learned P over every pair of enumerated responses is in the file (state 'preference'); "
                         "preference_rms_error weighs each pair by mu(y) mu(y') and the prompt's weight"]}
    summary["accuracy_gap"] = summary["heldout_accuracy"] - summary["bradley_terry_heldout_accuracy"]
    state = {"model": net.state_dict(), "preference": torch.as_tensor(table)}
    return {"summary": summary, "screen": format_preference_summary(summary),
            "file": {"kind": "preference_transformer", "identity": identity, "state": state, "l2": float(l2)}}
