"""The measurements of a finite task's policy: distances, KL, loss gaps, training diagnostics.

Pure functions of numpy arrays and logged records; they import nothing of ``toy_tasks``, so
every module of the toy tasks (the task type, the session, the method views, the sequence
task) can use them without an import cycle. Distributions are arrays (X, K): one row per
prompt, prompt-weighted by ``prompt_weights`` (X,).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.special


def total_variation(p: np.ndarray, q: np.ndarray, prompt_weights: np.ndarray) -> float:
    """Prompt-weighted total variation distance ``sum_x w_x * 0.5 * sum_i |p_xi - q_xi|``."""
    return float(prompt_weights @ (0.5 * np.abs(p - q).sum(axis=1)))


def kl_divergence(p: np.ndarray, q: np.ndarray, prompt_weights: np.ndarray) -> float:
    """Prompt-weighted ``KL(p || q) = sum_x w_x sum_i p_xi log(p_xi / q_xi)`` (scipy's rel_entr)."""
    per_prompt = scipy.special.rel_entr(p, q).sum(axis=1)
    return float(prompt_weights @ per_prompt)


def loss_gaps(value: float, optimum: float) -> tuple[float, float | None]:
    """(loss - optimum, (loss - optimum) / |optimum|; None when the optimum is 0)."""
    return value - optimum, (value - optimum) / abs(optimum) if optimum else None


def per_prompt(p: np.ndarray) -> list[list[float]]:
    """An (X, K) array as nested lists of floats (for summary.json)."""
    return [[float(v) for v in row] for row in p]


def margin_growth(history: list[dict]) -> dict:
    """margin_mean at the middle and at the end of training, and whether it was still rising."""
    if not history:
        return {"from": math.nan, "to": math.nan, "growing": False}
    first, last = history[len(history) // 2]["margin_mean"], history[-1]["margin_mean"]
    return {"from": first, "to": last, "growing": bool(last > first + 1e-3 * max(1.0, abs(first)))}


def displacement_warning(history: list[dict]) -> str | None:
    """A note when the winners' and the losers' log-ratios both ended below zero and
    fell over training: probability leaves both responses of the pairs."""
    if len(history) < 2:
        return None
    start, end = history[0], history[-1]
    if (end["logratio_winner"] < 0 and end["logratio_loser"] < 0
            and end["logratio_winner"] < start["logratio_winner"]):
        return (f"likelihood displacement: the mean log-ratio of winners fell to {end['logratio_winner']:.4g} "
                f"(losers: {end['logratio_loser']:.4g}); training lowered the probability of preferred "
                "responses too, on average")
    return None
