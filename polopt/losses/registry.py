"""Naming a training objective: the registry of pair objectives, dotted paths, and the margin adapter.

``loss=NAME`` (or ``loss=pkg.module:name``) names either

- a *margin loss* ``f(x)`` of :mod:`polopt.losses.margin` (a function of one tensor, the scaled margin
  ``x = beta * rho``), returned as a :class:`polopt.losses.margin.Loss` so that every analysis of the
  family (closed forms, the per-pair optimum x*(p), ``polopt check``) keeps working; or
- a *pair objective* ``ell(pair, beta)`` (a function of a :class:`polopt.losses.scores.PairScores`
  and beta, returning one loss per pair), returned as a :class:`PairObjective`.

A dotted path is told apart by its signature: one positional parameter is a margin loss, two
(``pair, beta``) a pair objective; keyword-only parameters are the ``loss.<key>=`` settings (as
Huber's ``delta``). Anything else is a one-line TypeError. Every margin loss is also a pair
objective through :func:`from_margin` (``f(beta * ((w - ref_w) - (l - ref_l)))``), so the trainer
has one objective code path (:func:`polopt.losses.reduce.batch_losses`).

Usage::

    from polopt.losses import registry as objectives
    objectives.resolve("divergence_alpha", alpha=0.3)      # a PairObjective
    objectives.resolve("logistic")                          # a Loss (margin)
    objectives.resolve("team_objectives:my_objective")      # by signature
"""

from __future__ import annotations

import functools
import inspect
from collections.abc import Callable
from dataclasses import dataclass, field

import torch

from polopt.losses import margin as losses
from polopt.losses import pair as pair_objectives
from polopt.losses.margin import Loss
from polopt.losses.scores import PairScores

Tensor = torch.Tensor


@dataclass(frozen=True)
class PairObjective:
    """A loss of the whole pair: ``ell(pair, beta, **params) -> (B,)``.

    Attributes:
        name: registry name or dotted path.
        fn: the callable ``fn(pair, beta, **params)``.
        params: keyword parameters bound into ``fn`` (from ``loss.<key>=``).
        source: the paper (built-ins) or "user-supplied".
        margin: the margin loss this objective wraps (:func:`from_margin`), else None.
    """

    name: str
    fn: Callable[..., Tensor]
    params: dict = field(default_factory=dict)
    source: str = ""
    margin: Loss | None = None

    def __call__(self, pair: PairScores, beta: float) -> Tensor:
        return self.fn(pair, beta, **self.params)

    def __repr__(self) -> str:
        extra = "".join(f", {k}={v}" for k, v in self.params.items() if k != "loss")
        return f"PairObjective({self.name!r}{extra})"


def _margin_objective(pair: PairScores, beta: float, *, loss: Loss) -> Tensor:
    """``f(beta * rho)`` with ``rho = (w - ref_w) - (l - ref_l)``, the same expression (and so the
    same floating-point result) as :func:`polopt.losses.reduce.margins`. (B,) -> (B,)."""
    return loss(beta * (pair.logratio_winner - pair.logratio_loser))


def from_margin(loss: Loss) -> PairObjective:
    """The margin loss ``loss`` as a pair objective (the adapter of the one objective path)."""
    return PairObjective(loss.name, _margin_objective, {"loss": loss}, loss.source, margin=loss)


def as_objective(loss: Loss | PairObjective) -> PairObjective:
    """A :class:`PairObjective` for either kind (margin losses through :func:`from_margin`)."""
    if isinstance(loss, PairObjective):
        return loss
    if isinstance(loss, Loss):
        return from_margin(loss)
    raise TypeError(f"expected a polopt Loss or PairObjective, got {type(loss).__name__}")


# ----------------------------------------------------------------------------
# The registry of pair objectives
# ----------------------------------------------------------------------------

_REGISTRY: dict[str, PairObjective] = {}


def register(name: str | None = None, *, source: str = ""):
    """Decorator adding a pair objective ``fn(pair, beta, *, params...)`` to the registry.

    Example::

        @polopt.losses.registry.register("anchored_squared", source="ours")
        def anchored_squared(pair, beta, *, weight=1.0):
            rho = pair.logratio_winner - pair.logratio_loser
            return (beta * rho - 1) ** 2 + weight * torch.relu(-pair.logratio_winner)
    """

    def decorate(fn: Callable[..., Tensor]) -> Callable[..., Tensor]:
        key = name or fn.__name__
        if kind_of(fn, key) != "pair":
            raise TypeError(f"register: pair objective {key!r} must take (pair, beta) and keyword-only "
                            "parameters; an elementwise f(x) goes in polopt.losses.margin.register")
        if key in losses.names():
            raise ValueError(f"register: {key!r} is already a margin loss; choose another name")
        _REGISTRY[key] = PairObjective(key, fn, {}, source)
        return fn

    return decorate


def names() -> list[str]:
    """The registered pair objectives, in registration order."""
    return list(_REGISTRY)


def all_names() -> list[str]:
    """Every name ``loss=`` takes: the margin losses, then the pair objectives."""
    return losses.names() + names()


def kind_of(fn: Callable, label: str) -> str:
    """``"margin"`` for ``f(x)``, ``"pair"`` for ``ell(pair, beta)``, decided by the positional
    parameters without defaults; a TypeError naming ``label`` for any other signature."""
    try:
        parameters = list(inspect.signature(fn).parameters.values())
    except (TypeError, ValueError):  # a builtin without a signature (torch.exp): one tensor in
        return "margin"
    if any(p.kind is p.VAR_POSITIONAL for p in parameters):
        raise TypeError(f"loss {label!r} takes *args: write f(x) for a margin loss or f(pair, beta) for a pair "
                        "objective (extra parameters keyword-only, after *)")
    positional = [p.name for p in parameters if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)
                  and p.default is p.empty]
    if len(positional) == 1:
        return "margin"
    if len(positional) == 2:
        return "pair"
    raise TypeError(f"loss {label!r} takes ({', '.join(positional)}): a loss takes one tensor, f(x) (a margin "
                    "loss of x = beta * margin), or two arguments, f(pair, beta) (a pair objective returning one "
                    "loss per pair); extra parameters go after * as keyword-only")


def resolve(name: str, **params) -> Loss | PairObjective:
    """The margin loss or pair objective ``name`` (registered, or a dotted path
    ``pkg.module:name`` told apart by its signature), with ``params`` bound.

    Raises:
        ValueError: unknown name (the message lists them all), an unknown parameter, or a pair
            objective that does not return finite losses of shape (B,) on a probe batch.
        TypeError: a function of neither signature.
    """
    if not isinstance(name, str) or not name:
        raise ValueError(f"loss name must be a non-empty string, got {name!r}")
    if name in _REGISTRY:
        objective = _bind(_REGISTRY[name], params)
    elif ":" in name:
        fn = losses._import_dotted(name)
        if kind_of(fn, name) == "margin":
            return losses.get(name, **params)
        registered = _REGISTRY.get(getattr(fn, "__name__", ""))
        base = registered if registered is not None and registered.fn is fn else PairObjective(
            name, fn, {}, "user-supplied")
        objective = _bind(base, params)
    elif name in losses.names():
        return losses.get(name, **params)
    else:
        raise ValueError(f"unknown loss {name!r}; known losses: {', '.join(all_names())}; or give a dotted path "
                         "'pkg.module:name' to f(x) or f(pair, beta)")
    validate(objective)
    return objective


@functools.lru_cache(maxsize=64)
def resolve_cached(name: str) -> Loss | PairObjective:
    """:func:`resolve` at default parameters, once per name (for objectives built on others)."""
    return resolve(name)


def _bind(objective: PairObjective, params: dict) -> PairObjective:
    if not params:
        return objective
    accepted = inspect.signature(objective.fn).parameters
    unknown = [k for k in params if k not in accepted or accepted[k].kind is not inspect.Parameter.KEYWORD_ONLY]
    if unknown:
        takes = [k for k, p in accepted.items() if p.kind is p.KEYWORD_ONLY] or ["no parameters"]
        raise ValueError(f"loss {objective.name!r} got unknown parameter(s) {', '.join(unknown)}; "
                         f"it takes: {', '.join(takes)}")
    return PairObjective(objective.name, objective.fn, {**objective.params, **params}, objective.source,
                         objective.margin)


# ----------------------------------------------------------------------------
# Validation: one line for an objective that cannot work
# ----------------------------------------------------------------------------


def probe_pair(dtype: torch.dtype = torch.float64) -> PairScores:
    """Four ordinary pairs (log-probabilities of probabilities 0.1..0.8, lengths 1..5) on which
    every sound objective returns finite losses."""
    t = functools.partial(torch.tensor, dtype=dtype)
    return PairScores(winner=t([-1.2, -0.7, -2.0, -0.3]), loser=t([-1.5, -1.1, -0.9, -2.2]),
                      ref_winner=t([-1.0, -1.0, -1.6, -0.5]), ref_loser=t([-1.4, -0.8, -1.2, -2.0]),
                      len_winner=t([1.0, 2.0, 3.0, 5.0]), len_loser=t([2.0, 1.0, 3.0, 4.0]))


def check_values(name: str, values, n_pairs: int) -> None:
    """A ValueError (one line) unless ``values`` is a tensor of shape (n_pairs,)."""
    if not isinstance(values, torch.Tensor):
        raise ValueError(f"loss {name!r} returned a {type(values).__name__}; a pair objective must return a "
                         f"torch tensor of one loss per pair, shape ({n_pairs},)")
    if tuple(values.shape) != (n_pairs,):
        raise ValueError(f"loss {name!r} returned shape {tuple(values.shape)} for a batch of {n_pairs} pairs; a "
                         f"pair objective must return one loss per pair, shape ({n_pairs},), unreduced "
                         "(polopt averages over pairs)")


def validate(objective: PairObjective, beta: float = 0.5) -> None:
    """Call ``objective`` on :func:`probe_pair`, and on the same pairs at the reference (policy =
    reference, where training starts): a ValueError (one line) unless it returns finite losses of
    shape (4,) on both."""
    probe = probe_pair()
    at_reference = PairScores(probe.ref_winner, probe.ref_loser, probe.ref_winner, probe.ref_loser,
                              probe.len_winner, probe.len_loser)
    for where, pair in (("a probe batch of 4 ordinary pairs", probe),
                        ("the same 4 pairs at the reference (every log-ratio 0, where training starts)",
                         at_reference)):
        try:
            values = objective(pair, beta)
        except (ValueError, TypeError):
            raise
        except Exception as err:  # a user's function can fail in any way; say which and where
            raise ValueError(f"loss {objective.name!r} failed on {where}: {type(err).__name__}: {err}") from err
        check_values(objective.name, values, len(pair.winner))
        if not torch.isfinite(values.detach()).all():
            raise ValueError(f"loss {objective.name!r} returned non-finite values {values.detach().tolist()} on "
                             f"{where}; it must be finite for any log-probabilities and lengths")


# ----------------------------------------------------------------------------
# The built-in members
# ----------------------------------------------------------------------------

# a combinator over the registry itself, so it lives beside it
def plus_winner_nll(pair: PairScores, beta: float, *, base: str = "reference_free_logistic", weight: float = 1.0,
                    per_token: bool = False) -> Tensor:
    """Any loss plus a supervised term on the winner: ``loss_base(pair) + weight * NLL(y_w)``.

    ``base`` is any registered loss or pair objective (or a dotted path); with the default
    (the reference-free logistic loss), weight 1 and the whole-sequence NLL this is CPO.
    ``per_token``: the NLL divided by the winner's length.

    References:
        Xu et al., Contrastive Preference Optimization, 2024 (arXiv 2401.08417). Checked: the CPO
        objective ``min L_prefer + L_NLL`` with ``L_NLL = -E log pi(y_w)`` (weight 1, whole
        sequence) as reproduced at deepnlp.org/equation/contrastive-preference-optimization-cpo
        and in a README by the paper's first author; see
        :func:`polopt.losses.pair.reference_free_logistic` for L_prefer.
    """
    supervised = pair_objectives.winner_nll(pair, per_token=per_token)  # (B,)
    return as_objective(resolve_cached(base))(pair, beta) + weight * supervised


_BUILTINS = [
    (pair_objectives.divergence_reverse_kl, "Wang et al. 2023 (f-DPO, reverse KL = DPO)"),
    (pair_objectives.divergence_forward_kl, "Wang et al. 2023 (f-DPO, forward KL)"),
    (pair_objectives.divergence_jensen_shannon, "Wang et al. 2023 (f-DPO, Jensen-Shannon)"),
    (pair_objectives.divergence_alpha, "Wang et al. 2023 (f-DPO, alpha-divergence)"),
    (pair_objectives.chi_squared_link, "Huang et al. 2024 (chi-PO)"),
    (pair_objectives.length_normalised_free, "Meng et al. 2024 (SimPO)"),
    (pair_objectives.length_regularised, "Park et al. 2024 (R-DPO)"),
    (pair_objectives.winner_anchored, "Pal et al. 2024 (DPO-Positive)"),
    (pair_objectives.reference_free_logistic, "Xu et al. 2024 (CPO's preference term)"),
    (plus_winner_nll, "Xu et al. 2024 (CPO: a loss plus the winner's NLL)"),
    (pair_objectives.odds_ratio_with_nll, "Hong et al. 2024 (ORPO)"),
]
for _fn, _source in _BUILTINS:
    register(_fn.__name__, source=_source)(_fn)


def builtin_names() -> list[str]:
    """The built-in pair objectives (not users' additions), in registration order."""
    return [fn.__name__ for fn, _ in _BUILTINS]
