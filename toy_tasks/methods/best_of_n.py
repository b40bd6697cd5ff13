"""Best-of-n from the reference on finite tasks: its exact distribution and its KL.

Best-of-n draws n responses i.i.d. from pi_ref and keeps one with the largest
reward; among tied maxima it keeps any one by a rule that does not look at which
response it is (the first drawn, or one at random).

Exact distribution. Group the responses by reward level v; let
``F(v) = pi_ref{r <= v}`` and ``F(v^-) = pi_ref{r < v}``. The maximum reward of n
draws is v with probability ``F(v)^n - F(v^-)^n``. Given that, each draw that
reached level v is, by exchangeability of i.i.d. draws, distributed as pi_ref
restricted to the level set G_v, and so is the kept one. Hence::

    P_n(y) = pi_ref(y) / pi_ref(G_v) * (F(v)^n - F(v^-)^n),   v = r(y).

With no ties this is docs/maths.md's ``F(y)^n - F(y^-)^n``. n = 1 gives pi_ref.

KL to the reference. For continuous rewards F(Y) ~ Beta(n, 1) under best-of-n,
so ``KL = E log(n F^{n-1}) = log n - (n-1)/n`` (the widely quoted formula).
Beirami et al., Theoretical guarantees on the best-of-n alignment policy, 2024,
show that on a finite set it is only an upper bound; :func:`kl_to_reference`
gives the exact value, and the tests show it approaches the formula from below
as the rewards become fine-grained (every response's reference mass small).
"""

from __future__ import annotations

import numpy as np
import scipy.special


def _check_n(n) -> int:
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise ValueError(f"method.n (the number of draws of best-of-n) must be an integer >= 1, got {n!r}")
    return int(n)


def best_of_n_distribution(reference: np.ndarray, rewards: np.ndarray, n: int) -> np.ndarray:
    """The exact best-of-n distribution (module docstring). (X, K) or (K,) in, same shape out."""
    n = _check_n(n)
    reference = np.asarray(reference, dtype=np.float64)
    rewards = np.asarray(rewards, dtype=np.float64)
    single = reference.ndim == 1
    ref, r = np.atleast_2d(reference), np.atleast_2d(rewards)
    out = np.empty_like(ref)
    for x in range(ref.shape[0]):
        levels, group = np.unique(r[x], return_inverse=True)  # ties share a level
        level_mass = np.bincount(group, weights=ref[x], minlength=len(levels))  # pi_ref(G_v)
        upper = np.minimum(np.cumsum(level_mass), 1.0)  # F(v)
        lower = upper - level_mass  # F(v^-)
        max_prob = upper**n - np.clip(lower, 0.0, 1.0) ** n  # P(max reward = v)
        out[x] = ref[x] / level_mass[group] * max_prob[group]
    out /= out.sum(axis=1, keepdims=True)  # removes rounding of order 1e-16
    return out[0] if single else out


def kl_to_reference(reference: np.ndarray, rewards: np.ndarray, n: int) -> np.ndarray:
    """Exact KL(best-of-n || pi_ref) per prompt: (X,), or a scalar for (K,) inputs."""
    p = best_of_n_distribution(reference, rewards, n)
    return scipy.special.rel_entr(p, np.asarray(reference, dtype=np.float64)).sum(axis=-1)


def kl_formula(n: int) -> float:
    """``log n - (n - 1) / n``: the KL of best-of-n for continuous rewards (an upper bound
    on finite sets, Beirami et al. 2024)."""
    n = _check_n(n)
    return float(np.log(n) - (n - 1) / n)
