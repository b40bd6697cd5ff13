"""The one registry of losses: names and dotted paths to a loss, registration, validation.

``loss=NAME`` (or ``loss=pkg.module:name``) names either

- a *margin loss* ``f(x)`` (:mod:`polopt.losses.margin`: a function of one tensor, the scaled
  margin ``x = beta * rho``), resolved to a :class:`MarginLoss` so that every analysis of the
  family (closed forms, the per-pair optimum x*(p), ``polopt check``) keeps working; or
- a *pair loss* ``ell(pair, beta)`` (:mod:`polopt.losses.pair`: a function of a
  :class:`PairScores` and beta, returning one loss per pair), resolved to a :class:`PairLoss`; or
- a *group objective* ``ell(group, beta)`` (:mod:`polopt.losses.group_objective`: a function of a
  :class:`GroupScores` and beta, returning one loss per group), resolved to a :class:`GroupObjective`
  with the feedback it reads (found on probe groups).

All kinds live in one table, told apart by the signature: one positional parameter is a margin
loss, two a pair loss, or a group objective when the first is named ``group`` (or annotated
``GroupScores``); keyword-only parameters are the ``loss.<key>=`` settings
(as Huber's ``delta``). Anything else is a one-line TypeError. :func:`resolve` is the one way from
a name, a dotted path, a bare callable or a loss to a loss with its parameters bound.

Usage::

    from polopt import losses
    losses.resolve("divergence_alpha", alpha=0.3)      # a PairLoss
    losses.resolve("logistic")                          # a MarginLoss
    losses.resolve("team_losses:my_loss")               # by signature
    losses.names("margin"), losses.names("pair"), losses.names("group")
"""

from __future__ import annotations

import dataclasses
import functools
import importlib
import inspect
from collections.abc import Callable

import torch

from polopt.losses import group, group_pairwise, margin, pair
from polopt.losses.group_objective import GroupObjective, validate_group
from polopt.losses.margin import MarginLoss
from polopt.losses.pair import PairLoss, PairScores, as_pair_loss, check_values, kind_of, winner_nll
from polopt.losses.reduce import per_pair_losses

Tensor = torch.Tensor
KINDS = ("margin", "pair", "group")
Loss = MarginLoss | PairLoss | GroupObjective

_REGISTRY: dict[str, Loss] = {}


# ----------------------------------------------------------------------------
# Importing a dotted path
# ----------------------------------------------------------------------------


def import_dotted(path: str, *, field: str = "loss path", takes: str = "f(x) or f(pair, beta)") -> Callable:
    """The callable a dotted path ``pkg.module:name`` names (imported only when named): the one place polopt
    imports by a name read at run time (``loss=``, and ``evaluate.scorer=`` through :mod:`polopt.methods.scorers`);
    ``field`` and ``takes`` word its errors."""
    module_name, _, attr = path.partition(":")
    if not module_name or not attr:
        raise ValueError(f"{field} {path!r} must look like 'pkg.module:name'")
    try:
        module = importlib.import_module(module_name)
    except ImportError as err:
        raise ValueError(f"{field} {path!r}: cannot import module {module_name!r} ({err}); "
                         "is it on PYTHONPATH?") from err
    try:
        fn = getattr(module, attr)
    except AttributeError as err:
        raise ValueError(f"{field} {path!r}: module {module_name!r} has no attribute {attr!r}") from err
    if not callable(fn):
        raise TypeError(f"{field} {path!r} names a {type(fn).__name__}, not a callable {takes}")
    return fn


# ----------------------------------------------------------------------------
# Registering and listing
# ----------------------------------------------------------------------------


def _entry(key: str, fn: Callable[..., Tensor], source: str, *, convex: bool | None = None,
           closed_form_optimum: Callable[[float], float] | None = None, pairwise_group: bool = False) -> Loss:
    """A registry entry for ``fn``, of the kind its signature says (``pairwise_group``: a pair function
    registered as a group objective on rankings, :func:`from_pair`)."""
    kind = kind_of(fn, key)
    if kind == "margin":
        return MarginLoss(key, fn, {}, convex, source, closed_form_optimum)
    if convex is not None or closed_form_optimum is not None:
        raise TypeError(f"register: {key!r} is a {kind} loss; convex and closed_form_optimum describe margin "
                        "losses f(x) only")
    if kind == "group":
        return GroupObjective(key, fn, {}, source, stop_gradient=getattr(fn, "stop_gradient", False))
    return from_pair(PairLoss(key, fn, {}, source)) if pairwise_group else PairLoss(key, fn, {}, source)


def register(name: str | None = None, *, source: str = "", convex: bool | None = None,
             closed_form_optimum: Callable[[float], float] | None = None, pairwise_group: bool = False):
    """Decorator adding a margin loss ``f(x)``, a pair loss ``ell(pair, beta)`` or a group objective
    ``ell(group, beta)`` (told apart by the signature; parameters keyword-only) to the registry under
    ``name``. ``pairwise_group``: register the pair function as a group objective on rankings. A group
    function with the attribute ``stop_gradient = True`` declares a statistic held without gradient.

    Example::

        @polopt.losses.register("softsquare", convex=True, source="ours")
        def softsquare(x):
            return torch.nn.functional.softplus(1 - x) ** 2

        @polopt.losses.register("anchored_squared", source="ours")
        def anchored_squared(pair, beta, *, weight=1.0):
            rho = pair.logratio_winner - pair.logratio_loser
            return (beta * rho - 1) ** 2 + weight * torch.relu(-pair.logratio_winner)
    """

    def decorate(fn: Callable[..., Tensor]) -> Callable[..., Tensor]:
        key = name or getattr(fn, "__name__", None)
        if not callable(fn):
            raise TypeError(f"register: a loss must be callable, got {type(fn).__name__}")
        if not key:
            raise ValueError("register: give the loss a name, register('my_loss')")
        entry = _entry(key, fn, source, convex=convex, closed_form_optimum=closed_form_optimum,
                       pairwise_group=pairwise_group)
        existing = _REGISTRY.get(key)
        if existing is not None and type(existing) is not type(entry):
            raise ValueError(f"register: {key!r} is already a {_kind(existing)} loss; choose another name")
        _REGISTRY[key] = entry
        return fn

    return decorate


def unregister(name: str) -> None:
    """Remove ``name`` from the registry (a test's or a notebook's own additions)."""
    _REGISTRY.pop(name, None)


def _kind(loss: Loss) -> str:
    return "margin" if isinstance(loss, MarginLoss) else "group" if isinstance(loss, GroupObjective) else "pair"


def _check_kind(kind: str | None) -> None:
    if kind is not None and kind not in KINDS:
        raise ValueError(f"kind must be one of {', '.join(KINDS)} (or None for every loss), got {kind!r}")


def names(kind: str | None = None) -> list[str]:
    """Every registered name ``loss=`` takes, in registration order (margin losses first among the
    built-ins, group objectives last); ``kind="margin"``, ``"pair"`` or ``"group"`` for one kind."""
    _check_kind(kind)
    return [key for key, loss in _REGISTRY.items() if kind is None or _kind(loss) == kind]


def builtin_names(kind: str | None = None) -> list[str]:
    """The built-in members (not users' additions), in registration order; ``kind`` as :func:`names`."""
    return [key for key in names(kind) if _REGISTRY[key].fn is _BUILTIN_FNS.get(key)]


def is_builtin(loss: Loss) -> bool:
    """A built-in member at its default parameters."""
    return _BUILTIN_FNS.get(loss.name) is loss.fn and not loss.params


# ----------------------------------------------------------------------------
# Resolving: the one way to a loss
# ----------------------------------------------------------------------------


def resolve(loss: str | Loss | Callable[..., Tensor], **params) -> Loss:
    """The loss ``loss`` names, with ``params`` bound: a registered name, a dotted path
    ``pkg.module:name`` or a bare callable (told apart by the signature), or a loss (rebound to
    ``params`` when given). A pair loss is validated on a probe batch; a group objective on probe
    groups, which also find the feedback it reads (:func:`polopt.losses.group_objective.validate_group`).

    Raises:
        ValueError: unknown name (the message lists them all), an unknown parameter, or a pair loss
            that does not return finite losses of shape (B,) on a probe batch.
        TypeError: a function of neither signature.
    """
    if isinstance(loss, MarginLoss | PairLoss | GroupObjective):
        base = loss
    elif isinstance(loss, str) and loss in _REGISTRY:
        base = _REGISTRY[loss]
    elif isinstance(loss, str) and ":" in loss:
        fn = import_dotted(loss)
        registered = _REGISTRY.get(getattr(fn, "__name__", ""))
        base = registered if registered is not None and registered.fn is fn else _entry(loss, fn, "user-supplied")
    elif isinstance(loss, str) and loss:
        raise ValueError(f"unknown loss {loss!r}; known losses: {', '.join(names())}; or give a dotted path "
                         "'pkg.module:name' to f(x), f(pair, beta) or f(group, beta)")
    elif callable(loss) and not isinstance(loss, str):
        base = _entry(getattr(loss, "__name__", type(loss).__name__), loss, "user-supplied")
    else:
        raise ValueError(f"loss must be a registered name, a dotted path 'pkg.module:name', a callable or a "
                         f"polopt loss, got {loss!r}")
    bound = _bind(base, params)
    if isinstance(bound, GroupObjective):
        return validate_group(bound)
    if isinstance(bound, PairLoss):
        validate(bound)
    return bound


def resolve_margin(loss: str | MarginLoss | Callable[[Tensor], Tensor], **params) -> MarginLoss:
    """:func:`resolve` where only a margin loss will do (the methods' losses, the analytic checks):
    a ValueError naming the pair loss otherwise."""
    resolved = resolve(loss, **params)
    if not isinstance(resolved, MarginLoss):
        raise ValueError(f"{resolved.name!r} is a {_kind(resolved)} loss; a margin loss f(x) is needed here "
                         f"(one of {', '.join(names('margin'))}, or a dotted path to f(x))")
    return resolved


@functools.lru_cache(maxsize=64)
def _resolve_default(name: str) -> Loss:
    """:func:`resolve` at default parameters, once per name (for losses built on others)."""
    return resolve(name)


def _bind(loss: Loss, params: dict) -> Loss:
    """``loss`` with ``params`` added to its bound parameters (keyword-only parameters of its function)."""
    if not params:
        return loss
    accepted = inspect.signature(loss.fn).parameters
    unknown = [k for k in params if k not in accepted or accepted[k].kind is not inspect.Parameter.KEYWORD_ONLY]
    if unknown:
        takes = [k for k, p in accepted.items() if p.kind is p.KEYWORD_ONLY] or ["no parameters"]
        raise ValueError(f"loss {loss.name!r} got unknown parameter(s) {', '.join(unknown)}; "
                         f"it takes: {', '.join(takes)}")
    merged = {**loss.params, **params}
    if isinstance(loss, GroupObjective):
        return dataclasses.replace(loss, params=merged)
    if isinstance(loss, PairLoss):
        return PairLoss(loss.name, loss.fn, merged, loss.source, loss.margin)
    # the closed form of a member holds at its default parameters only
    defaults = all(accepted[k].default == v for k, v in merged.items())
    return MarginLoss(loss.name, loss.fn, merged, loss.convex, loss.source,
                      loss.closed_form_optimum if defaults else None)


def from_pair(loss: PairLoss) -> GroupObjective:
    """A pair loss as a group objective on rankings: the mean of the pair loss over the pairs each
    group's ranking orders (:func:`polopt.losses.group_objective.ranked_pairs`); at G = 2 the pair loss
    itself."""
    return GroupObjective(loss.name, loss.fn, dict(loss.params), loss.source, pairwise=True, reads=("ranks",))


def as_group_objective(loss: Loss) -> GroupObjective:
    """A :class:`GroupObjective` for any kind of loss (margin losses and pair losses through
    :func:`polopt.losses.pair.as_pair_loss` and :func:`from_pair`)."""
    if isinstance(loss, GroupObjective):
        return loss
    return from_pair(as_pair_loss(loss))


# ----------------------------------------------------------------------------
# Validation: one line for a pair loss that cannot work
# ----------------------------------------------------------------------------


def probe_pair(dtype: torch.dtype = torch.float64) -> PairScores:
    """Four ordinary pairs (log-probabilities of probabilities 0.1..0.8, lengths 1..5) on which
    every sound loss returns finite values."""
    t = functools.partial(torch.tensor, dtype=dtype)
    return PairScores(winner=t([-1.2, -0.7, -2.0, -0.3]), loser=t([-1.5, -1.1, -0.9, -2.2]),
                      ref_winner=t([-1.0, -1.0, -1.6, -0.5]), ref_loser=t([-1.4, -0.8, -1.2, -2.0]),
                      len_winner=t([1.0, 2.0, 3.0, 5.0]), len_loser=t([2.0, 1.0, 3.0, 4.0]))


def validate(loss: PairLoss, beta: float = 0.5) -> None:
    """Call ``loss`` on :func:`probe_pair`, and on the same pairs at the reference (policy =
    reference, where training starts): a ValueError (one line) unless it returns finite losses of
    shape (4,) on both."""
    probe = probe_pair()
    at_reference = PairScores(probe.ref_winner, probe.ref_loser, probe.ref_winner, probe.ref_loser,
                              probe.len_winner, probe.len_loser)
    for where, scores in (("a probe batch of 4 ordinary pairs", probe),
                          ("the same 4 pairs at the reference (every log-ratio 0, where training starts)",
                           at_reference)):
        try:
            values = loss(scores, beta)
        except (ValueError, TypeError):
            raise
        except Exception as err:  # a user's function can fail in any way; say which and where
            raise ValueError(f"loss {loss.name!r} failed on {where}: {type(err).__name__}: {err}") from err
        check_values(loss.name, values, len(scores.winner))
        if not torch.isfinite(values.detach()).all():
            raise ValueError(f"loss {loss.name!r} returned non-finite values {values.detach().tolist()} on "
                             f"{where}; it must be finite for any log-probabilities and lengths")


# ----------------------------------------------------------------------------
# The built-in members
# ----------------------------------------------------------------------------

# a combinator over the registry itself, so it lives beside it
def plus_winner_nll(pair: PairScores, beta: float, *, base: str = "reference_free_logistic", weight: float = 1.0,
                    per_token: bool = False) -> Tensor:
    """Any loss plus a supervised term on the winner: ``loss_base(pair) + weight * NLL(y_w)``.

    ``base`` is any registered loss (or a dotted path); with the default (the reference-free
    logistic loss), weight 1 and the whole-sequence NLL this is CPO. ``per_token``: the NLL
    divided by the winner's length.

    References:
        Xu et al., Contrastive Preference Optimization, 2024 (arXiv 2401.08417). Checked: the CPO
        objective ``min L_prefer + L_NLL`` with ``L_NLL = -E log pi(y_w)`` (weight 1, whole
        sequence) as reproduced at deepnlp.org/equation/contrastive-preference-optimization-cpo
        and in a README by the paper's first author; see
        :func:`polopt.losses.pair.reference_free_logistic` for L_prefer.
    """
    supervised = winner_nll(pair, per_token=per_token)  # (B,)
    return per_pair_losses(_resolve_default(base), pair, beta=beta) + weight * supervised



# (function, source, convex, closed-form per-pair optimum); convexity and closed forms are margin losses' only
_BUILTINS = [
    (margin.logistic, "Rafailov et al. 2023 (DPO)", True),
    (margin.squared, "Azar et al. 2023 (IPO)", True),
    (margin.hinge, "Zhao et al. 2023 (SLiC)", True),
    (margin.huber, "Huber 1964, on the squared loss", True),
    (margin.exponential, "Tang et al. 2024 (GPO)", True),
    (margin.truncated_quadratic, "Tang et al. 2024 (GPO)", True),
    (margin.savage, "Tang et al. 2024 (GPO)", False),
    (pair.divergence_reverse_kl, "Wang et al. 2023 (f-DPO, reverse KL = DPO)", None),
    (pair.divergence_forward_kl, "Wang et al. 2023 (f-DPO, forward KL)", None),
    (pair.divergence_jensen_shannon, "Wang et al. 2023 (f-DPO, Jensen-Shannon)", None),
    (pair.divergence_alpha, "Wang et al. 2023 (f-DPO, alpha-divergence)", None),
    (pair.chi_squared_link, "Huang et al. 2024 (chi-PO)", None),
    (pair.length_normalised_free, "Meng et al. 2024 (SimPO)", None),
    (pair.length_regularised, "Park et al. 2024 (R-DPO)", None),
    (pair.winner_anchored, "Pal et al. 2024 (DPO-Positive)", None),
    (pair.reference_free_logistic, "Xu et al. 2024 (CPO's preference term)", None),
    (plus_winner_nll, "Xu et al. 2024 (CPO: a loss plus the winner's NLL)", None),
    (pair.odds_ratio_with_nll, "Hong et al. 2024 (ORPO)", None),
]
# group objectives: the group-native members, then pair functions registered as group objectives on rankings
_GROUP_BUILTINS = [
    (group.unpaired_prospect, "Ethayarajh et al. 2024 (KTO)"),
    (group.unpaired_classifier, "Jung et al. 2024 (BCO)"),
    (group.ranking_likelihood, "Rafailov et al. 2023, appendix (Plackett-Luce listwise DPO)"),
    (group.score_cross_entropy, "Chen et al. 2024 (InfoNCA)"),
    (group.score_binary_contrast, "Chen et al. 2024 (NCA)"),
    (group.score_reverse_kl, "Ji et al. 2024 (EXO)"),
    (group_pairwise.flip_corrected_logistic, "Chowdhury et al. 2024 (robust DPO, known flip rate)"),
    (group_pairwise.calibrated_logistic, "Xiao et al. 2024 (Cal-DPO)"),
    (group_pairwise.anchored_raise_lower, "D'Oosterlinck et al. 2024 (APO-zero)"),
    (group_pairwise.anchored_lower_both, "D'Oosterlinck et al. 2024 (APO-down)"),
    (group_pairwise.logistic_exponential_blend, "Lu et al. 2024 (DiscoPOP)"),
]
_BUILTIN_FNS = {fn.__name__: fn for fn, *_ in _BUILTINS + _GROUP_BUILTINS}
for _fn, _source, _convex in _BUILTINS:
    register(_fn.__name__, source=_source, convex=_convex,
             closed_form_optimum=margin.CLOSED_FORM_OPTIMA.get(_fn.__name__))(_fn)
for _fn, _source in _GROUP_BUILTINS:
    register(_fn.__name__, source=_source, pairwise_group=_fn.__module__ == group_pairwise.__name__)(_fn)
