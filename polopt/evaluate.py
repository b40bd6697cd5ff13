"""Comparing a trained policy with its reference: win-rates, their intervals, judged win-rates.

Owns:

- :func:`win_rate_interval`: the Wilson score interval of a binomial proportion
  (Wilson, Probable Inference, the Law of Succession, and Statistical Inference,
  1927), computed by ``scipy.stats.binomtest(...).proportion_ci(method="wilson")``;
- :func:`ground_truth_win_rate`: policy sample vs reference sample, one per prompt
  draw, decided by a reward; ties (equal rewards) are counted apart, and the rate
  and its interval are over the decided comparisons;
- :func:`judged_win_rates`: the same comparisons voted by a judge that may favour
  a position: ``raw`` shows the policy's response first every time (the naive
  protocol), ``swapped`` judges both orders and averages the two votes, so a
  bias toward either position cancels: with ``P(first wins) = b + (1 - b) s(d)``
  the swapped score is ``1/2 + (1 - b) (s(d) - 1/2)`` whatever b is.
"""

from __future__ import annotations

import random
from collections.abc import Callable

from scipy.stats import binomtest


def win_rate_interval(wins: int, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval [low, high] for ``wins`` successes in ``n`` trials."""
    if n <= 0:
        return (0.0, 1.0)
    ci = binomtest(int(wins), int(n)).proportion_ci(confidence_level=confidence, method="wilson")
    return (float(ci.low), float(ci.high))


def ground_truth_win_rate(reward: Callable[[str, str], float], prompts: list[str], policy: list[str],
                          reference: list[str], confidence: float = 0.95) -> dict:
    """Wins, losses and ties of ``policy[i]`` over ``reference[i]`` for ``prompts[i]`` by ``reward``."""
    wins = losses = ties = 0
    for x, a, b in zip(prompts, policy, reference, strict=True):
        ra, rb = reward(x, a), reward(x, b)
        wins += ra > rb
        losses += ra < rb
        ties += ra == rb
    decided = wins + losses
    return {"win_rate": wins / decided if decided else 0.5, "win_rate_ci": list(win_rate_interval(wins, decided,
                                                                                                   confidence)),
            "wins": wins, "losses": losses, "ties": ties, "comparisons": len(prompts),
            "win_rate_ties_half": (wins + ties / 2) / len(prompts) if prompts else 0.5}


def judged_win_rates(prefers_first: Callable[[str, str, str], float], prompts: list[str], policy: list[str],
                     reference: list[str], *, rng: random.Random | None = None) -> dict:
    """Judge win-rates of ``policy`` over ``reference``: ``raw`` (policy shown first) and ``swapped``
    (both orders, votes averaged). ``rng`` None uses the judge's probabilities (the expected votes)
    instead of drawing votes."""
    def vote(p: float) -> float:
        return p if rng is None else float(rng.random() < p)

    raw = swapped = 0.0
    for x, a, b in zip(prompts, policy, reference, strict=True):
        first = vote(prefers_first(x, a, b))
        second = vote(prefers_first(x, b, a))  # the reference shown first: a wins when the judge picks second
        raw += first
        swapped += (first + (1.0 - second)) / 2
    n = max(len(prompts), 1)
    return {"judge_win_rate_raw": raw / n, "judge_win_rate_swapped": swapped / n}
