"""What a policy does beyond its distance to the optimum: the winners' log-ratio and the mean length.

Two figures that show what the choice of objective does, for ``polopt compare`` and summary.json:

- the winners' mean log-ratio ``sum_{x,i,j} W[x,i,j] h_xi / sum W`` with ``h = log pi - log pi_ref``:
  negative means the preferred responses lost probability on average ("likelihood displacement";
  Razin et al., Unintentional Unalignment: Likelihood Displacement in Direct Preference Optimization,
  2024, study it; title from memory);
- the mean response length ``sum_x rho_x sum_i pi_xi n_xi`` in tokens, beside the reference's: a
  length-normalised or reference-free objective can move mass to long or short responses.
"""

from __future__ import annotations

import numpy as np


def winner_logratio(weights: np.ndarray, h: np.ndarray) -> float:
    """W-weighted mean log-ratio of the winners: weights (X, K, K) (winner i, loser j), h (X, K)."""
    total = weights.sum()
    return float((weights.sum(axis=2) * h).sum() / total) if total > 0 else float("nan")


def mean_length(policy: np.ndarray, lengths: np.ndarray, prompt_weights: np.ndarray) -> float:
    """Expected response length in tokens: policy and lengths (X, K), prompt weights (X,)."""
    return float(prompt_weights @ (policy * lengths).sum(axis=1))


def traits(task, weights: np.ndarray, h_optimum: np.ndarray | None) -> dict:
    """summary.json's ``optimum_logratio_winner``, ``optimum_mean_length`` (None where no finite optimum)
    and ``reference_mean_length`` of ``task`` under the win weights ``weights``."""
    out = {"optimum_logratio_winner": None, "optimum_mean_length": None,
           "reference_mean_length": mean_length(task.reference, task.lengths, task.prompt_weights)}
    if h_optimum is not None:
        pi = task.policy_from_logratios(h_optimum)
        h = np.log(pi) - np.log(task.reference)  # the optimum's own log-ratios (normalised)
        out["optimum_logratio_winner"] = winner_logratio(weights, h)
        out["optimum_mean_length"] = mean_length(pi, task.lengths, task.prompt_weights)
    return out
