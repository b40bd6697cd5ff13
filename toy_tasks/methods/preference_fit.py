"""Preference models of finite tasks: the maximum-likelihood table of pairwise win probabilities.

Given counts ``C[x, i, j]`` of pairs in which response i beat response j for prompt x, each
unordered pair {i, j} is a binomial experiment: ``n_ij = C_ij + C_ji`` comparisons, ``C_ij``
won by i. With one free parameter per unordered pair (no Bradley–Terry assumption), the
log-likelihood separates into one term per pair, and its maximiser is the binomial proportion::

    P[x, i, j] = C_ij / (C_ij + C_ji),   P[x, j, i] = 1 - P[x, i, j],   P[x, i, i] = 1/2,

antisymmetric by construction. Writing ``P = sigmoid(f_ij)`` with ``f_ji = -f_ij``, the penalised
fit (``reward.l2 > 0``, an N(0, 1/l2) prior on each logit, the same meaning the penalty has for
a Bradley–Terry reward) maximises ``C_ij log sigmoid(f) + C_ji log sigmoid(-f) - (l2 / 2) f^2``
per pair: one concave equation ``C_ij sigmoid(-f) - C_ji sigmoid(f) = l2 f``, solved by scipy's
brentq in the bracket [-C_ji / l2, C_ij / l2].

A pair never compared (n_ij = 0) has a flat likelihood: every P fits it equally. It gets
P = 1/2, the value antisymmetry forces when nothing tells the two orders apart (P(i > j) =
P(j > i)), the limit of the penalised fit as l2 -> 0, and the model's "no opinion" (its held-out
prediction on such a pair counts as a tie). The summary counts these pairs (``unseen_pairs``).
A pair only ever won by one side gets P = 1 (its maximum-likelihood estimate lies on the
boundary); give ``reward.l2`` for finite logits.

``polopt reward reward.kind=preference`` also fits the Bradley–Terry table
(:mod:`toy_tasks.methods.reward_fit`) to the same counts, with the same penalty, and measures
both on the same held-out pairs, beside the task's own P (the Bayes rule: no model predicts the
held-out labels better in expectation). On a cyclic P the reward's accuracy falls short.
"""

from __future__ import annotations

import numpy as np
import scipy.optimize
import scipy.special
import torch

from polopt.methods.preference_model import load_preference_model
from polopt.methods.reward_model import CALIBRATION, pair_metrics, split_heldout
from toy_tasks.methods.reward_fit import fit_table, mle_problems, pair_counts, task_identity

KIND = "preference_table"


def preference_table(counts: np.ndarray, *, l2: float = 0.0) -> np.ndarray:
    """The (penalised) maximum-likelihood P (X, K, K) of ``counts`` (X, K, K); see the module docstring."""
    if not (isinstance(l2, (int, float)) and not isinstance(l2, bool) and l2 >= 0):
        raise ValueError(f"reward.l2 (the L2 penalty of the fit) must be a number >= 0, got {l2!r}")
    won, lost = counts, np.swapaxes(counts, 1, 2)  # C_ij, C_ji
    total = won + lost  # (X, K, K) n_ij
    with np.errstate(invalid="ignore", divide="ignore"):
        table = np.where(total > 0, won / total, 0.5)  # the binomial proportion; 1/2 where never compared
    lower = np.tril(np.ones(counts.shape[1:], dtype=bool), -1)
    table = np.where(lower, 1.0 - np.swapaxes(table, 1, 2), table)  # P_ji = 1 - P_ij, by construction
    if l2 > 0:
        for x, i, j in zip(*np.nonzero(np.triu(total > 0, 1)), strict=True):
            a, b = won[x, i, j], lost[x, i, j]
            f = scipy.optimize.brentq(lambda f, a=a, b=b: a * scipy.special.expit(-f) - b * scipy.special.expit(f)
                                      - l2 * f, -b / l2 - 1e-12, a / l2 + 1e-12, xtol=1e-14)
            table[x, i, j], table[x, j, i] = scipy.special.expit(f), scipy.special.expit(-f)
    idx = np.arange(counts.shape[1])
    table[:, idx, idx] = 0.5
    return table


def heldout_logits(table: np.ndarray, held: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """logit P of each held-out (prompt, winner, loser) cell with a count, and its count (the weight)."""
    x, w, lo = np.nonzero(held)
    with np.errstate(divide="ignore"):
        return scipy.special.logit(table[x, w, lo]), held[x, w, lo]


def learned_preference(task, path, *, key: str = "method.preference") -> np.ndarray:
    """The (X, K, K) learned P of a preference model file fitted for ``task`` (a table, or a pair head on the
    sequence task, whose file carries its P over every enumerated pair)."""
    data = load_preference_model(path, task_identity(task), key=key)
    table = data["state"].get("preference")
    shape = (task.n_prompts, task.n_responses, task.n_responses)
    if table is None or tuple(table.shape) != shape:
        raise ValueError(f"{key}: {path} holds no preference table of shape {shape}; fit one for this task with "
                         "polopt reward reward.kind=preference")
    return table.double().numpy()


def _split_counts(task, mode: str, n_pairs: int, seed: int, heldout: float):
    """(fit counts, held-out counts, notes) as :func:`toy_tasks.methods.reward_fit.fit_task_reward` splits them."""
    if mode == "exact":
        counts = task.win_weights()
        return counts, counts, ["task.mode=exact: fitted to the population win weights (as if infinitely many "
                                "pairs); the held-out measures are population values"]
    if mode != "sampled":
        raise ValueError(f"task.mode must be one of exact, sampled, got {mode!r}")
    pairs = task.sample_pairs(n_pairs, seed)
    fit, out = split_heldout(len(pairs), heldout, seed)
    return pair_counts(task, pairs, fit), pair_counts(task, pairs, out), []


def bradley_terry_beside(counts: np.ndarray, held: np.ndarray, task, *, l2: float, bins: int) -> dict:
    """The Bradley–Terry table fitted to the same counts with the same penalty, measured on the same held-out
    pairs; null fields (and the reason) where its maximum-likelihood fit does not exist (Ford 1957)."""
    problems = mle_problems(counts) if l2 == 0 else []
    if problems:
        return {"bradley_terry_heldout_accuracy": None, "bradley_terry_calibration_error": None,
                "bradley_terry_rewards": None,
                "bradley_terry_note": "the Bradley–Terry maximum-likelihood fit does not exist on these pairs "
                                      f"(Ford 1957: {'; '.join(problems)}); give reward.l2 > 0 to compare"}
    rewards, _ = fit_table(counts, task.reference, l2=l2)
    x, w, lo = np.nonzero(held)
    measured = pair_metrics(rewards[x, w] - rewards[x, lo], held[x, w, lo], bins=bins)
    return {"bradley_terry_heldout_accuracy": measured["heldout_accuracy"],
            "bradley_terry_calibration_error": measured["calibration_error"], "bradley_terry_rewards": rewards.tolist(),
            "bradley_terry_note": None}


def fit_task_preference(task, *, mode: str, n_pairs: int, seed: int, l2: float = 0.0, heldout: float = 0.2,
                        bins: int = 10) -> dict:
    """Fit the preference table to ``task``'s pairs; return ``summary`` (summary.json), ``screen`` and ``file``.

    The split is :func:`toy_tasks.methods.reward_fit.fit_task_reward`'s (the same pairs, the same permutation),
    so ``reward.kind=bradley_terry`` with the same keys fits its reward on the same pairs.
    """
    counts, held, notes = _split_counts(task, mode, n_pairs, seed, heldout)
    table = preference_table(counts, l2=l2)
    measures = pair_metrics(*heldout_logits(table, held), bins=bins)
    bayes = pair_metrics(*heldout_logits(task.preference, held), bins=bins)["heldout_accuracy"]
    compared = (counts + np.swapaxes(counts, 1, 2)) > 0
    off = ~np.eye(task.n_responses, dtype=bool)[None]
    summary = {"task": task.name, "kind": KIND, "mode": mode, "n_pairs": int(n_pairs) if mode == "sampled" else None,
               "fitted_pairs": float(counts.sum()), "l2": float(l2), "preference": table.tolist(),
               "pair_counts": counts.tolist(), "heldout_pair_counts": held.tolist(), **measures,
               "heldout_pairs": int(held.sum()) if mode == "sampled" else None,
               "unseen_pairs": int((~compared & off).sum() // 2), "calibration": CALIBRATION.format(bins=bins),
               **bradley_terry_beside(counts, held, task, l2=l2, bins=bins), "true_preference_heldout_accuracy": bayes,
               "preference_max_error": float(np.abs(table - task.preference)[compared & off].max(initial=0.0)),
               "solver": "closed form (the binomial proportion per pair)" if l2 == 0 else
               "scipy brentq per compared pair on the penalised logit equation", "notes": notes}
    bt = summary["bradley_terry_heldout_accuracy"]
    summary["accuracy_gap"] = None if bt is None or measures["heldout_accuracy"] is None else \
        measures["heldout_accuracy"] - bt
    state = {"preference": torch.as_tensor(table)}  # (X, K, K) float64
    return {"summary": summary, "screen": format_preference_summary(summary),
            "file": {"kind": KIND, "identity": task_identity(task), "state": state, "l2": float(l2)}}


def _figure(value) -> str:
    return "-" if value is None else f"{value:.4f}"


def format_preference_summary(summary: dict) -> str:
    """The command's screen output: per prompt the learned P (small tasks), then both models' held-out measures."""
    lines = []
    table = summary.get("preference") or []
    for x, rows in enumerate(table if len(table) and len(table[0]) <= 8 else []):
        lines += [f"prompt {x}: P(row > column)"] + ["  " + " ".join(f"{v:.3f}" for v in row) for row in rows]
    lines.append(f"heldout_accuracy {_figure(summary.get('heldout_accuracy'))} (preference)  "
                 f"{_figure(summary.get('bradley_terry_heldout_accuracy'))} (Bradley–Terry, the same split)  "
                 f"{_figure(summary.get('true_preference_heldout_accuracy'))} (the task's own P)")
    lines.append(f"calibration_error {_figure(summary.get('calibration_error'))} (preference)  "
                 f"{_figure(summary.get('bradley_terry_calibration_error'))} (Bradley–Terry)  heldout_pairs "
                 f"{summary.get('heldout_pairs') or '-'}")
    if summary.get("unseen_pairs"):
        lines.append(f"note: {summary['unseen_pairs']} pair(s) never compared get P = 1/2")
    if summary.get("bradley_terry_note"):
        lines.append(f"note: {summary['bradley_terry_note']}")
    lines += [f"note: {n}" for n in summary.get("notes", [])]
    return "\n".join(lines)
