"""The loss vocabulary: the margin family f(beta * rho), pair losses, one registry, one reduction.

- :mod:`polopt.losses.margin`: the margin losses ``f(x)`` and :class:`MarginLoss` (the per-pair optimum).
- :mod:`polopt.losses.pair`: pair losses ``ell(pair, beta)``, their argument :class:`PairScores`,
  :class:`PairLoss` and the built-in members.
- :mod:`polopt.losses.group_objective`: group objectives ``ell(group, beta)``, their argument
  :class:`GroupScores`, :class:`GroupObjective`, the pair adapter; built-in members in
  :mod:`polopt.losses.group` and :mod:`polopt.losses.group_pairwise`.
- :mod:`polopt.losses.registry`: the one registry (:func:`register`, :func:`names`, :func:`resolve`).
- :mod:`polopt.losses.reduce`: the one loss path (:func:`margins`, :func:`per_pair_losses`,
  :func:`weighted_mean`).
"""

from polopt.losses.margin import MarginLoss, has_finite_pair_optimum_at_certainty
from polopt.losses.pair import PairLoss, PairScores, as_pair_loss
from polopt.losses.reduce import margins, pair_scores, per_pair_losses, weighted_mean
from polopt.losses.registry import builtin_names, is_builtin, names, register, resolve, resolve_margin, unregister

__all__ = [
    "MarginLoss", "PairLoss", "PairScores", "as_pair_loss", "builtin_names", "has_finite_pair_optimum_at_certainty",
    "is_builtin", "margins", "names", "pair_scores", "per_pair_losses", "register", "resolve", "resolve_margin",
    "unregister", "weighted_mean",
]
