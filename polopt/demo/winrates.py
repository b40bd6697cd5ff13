"""Comparing a trained policy with its reference: win-rates, their intervals, judged win-rates.

Owns:

- :func:`win_rate_interval`: the Wilson score interval of a binomial proportion
  (Wilson, Probable Inference, the Law of Succession, and Statistical Inference,
  1927), computed by ``scipy.stats.binomtest(...).proportion_ci(method="wilson")``;
- :func:`ground_truth_win_rate`: policy sample vs reference sample, one per prompt
  draw, decided by a reward; ties (equal rewards) are counted apart, and the rate
  and its interval are over the decided comparisons;
- :func:`judged_win_rates`: the same comparisons voted by a judge that may favour
  a position: ``judge_win_rate_policy_first`` shows the policy's response first
  every time (the naive protocol), ``judge_win_rate_both_orders`` judges both orders
  and averages the two votes, so a bias toward either position cancels: with
  ``P(first wins) = b + (1 - b) s(d)`` the both-orders score is
  ``1/2 + (1 - b) (s(d) - 1/2)`` whatever b is.
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
    """Wins, defeats and ties of ``policy[i]`` over ``reference[i]`` for ``prompts[i]`` by ``reward``
    (``defeats``: comparisons the reference won; not to be confused with a training loss)."""
    wins = defeats = ties = 0
    for x, a, b in zip(prompts, policy, reference, strict=True):
        ra, rb = reward(x, a), reward(x, b)
        wins += ra > rb
        defeats += ra < rb
        ties += ra == rb
    decided = wins + defeats
    return {"win_rate": wins / decided if decided else 0.5, "win_rate_ci": list(win_rate_interval(wins, decided,
                                                                                                   confidence)),
            "wins": wins, "defeats": defeats, "ties": ties, "comparisons": len(prompts),
            "win_rate_ties_half": (wins + ties / 2) / len(prompts) if prompts else 0.5}


def judged_win_rates(prefers_first: Callable[[str, str, str], float], prompts: list[str], policy: list[str],
                     reference: list[str], *, rng: random.Random | None = None) -> dict:
    """Judge win-rates of ``policy`` over ``reference``: ``judge_win_rate_policy_first`` (the policy's
    reply always shown first: inflated by the judge's position bias) and ``judge_win_rate_both_orders``
    (each pair judged in both orders, the votes averaged: the bias cancels). ``rng`` None uses the
    judge's probabilities (the expected votes) instead of drawing votes."""
    def vote(p: float) -> float:
        return p if rng is None else float(rng.random() < p)

    policy_first = both_orders = 0.0
    for x, a, b in zip(prompts, policy, reference, strict=True):
        first = vote(prefers_first(x, a, b))
        second = vote(prefers_first(x, b, a))  # the reference shown first: a wins when the judge picks second
        policy_first += first
        both_orders += (first + (1.0 - second)) / 2
    n = max(len(prompts), 1)
    return {"judge_win_rate_policy_first": policy_first / n, "judge_win_rate_both_orders": both_orders / n}
