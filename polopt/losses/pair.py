"""Pair losses: losses of the whole pair, their argument, and the built-in members.

A *pair loss* is a plain function ``name(pair, beta, *, params...) -> Tensor`` returning one
loss per pair, shape (B,), where ``pair`` is a :class:`PairScores` (policy and reference
log-probabilities of winner and loser, and their lengths in tokens); :class:`PairLoss` binds one
to its parameters. Every margin loss ``f`` is a pair loss too, ``f(beta * ((winner - ref_winner)
- (loser - ref_loser)))`` (:func:`as_pair_loss`). Each member below is pure and unreduced;
reduction (weights, label smoothing) happens once, in :mod:`polopt.losses.reduce`. The registry
that names them for ``loss=...`` is :mod:`polopt.losses.registry`.

Notation: ``h_w = log pi(y_w) - log pi_ref(y_w)``, ``h_l`` likewise (log-ratios), ``u = pi / pi_ref
= e^h``, ``n_w, n_l`` the lengths, ``sigma`` the logistic function.

Where the formulas come from (checked with the search tool; each member's References name the
text and say what matched). The stored copies of the arXiv and ar5iv pages return only their
opening (abstract, introduction), so no equation was read from an arXiv page itself; it was read from
the paper authors' own code (f-DPO, ORPO, SimPO's hyperparameters, CPO's objective in its first
author's README) or from independent reproductions of the paper's equations (chi-PO, SimPO, CPO,
ORPO, DPO-Positive, R-DPO), two sources wherever two were found. Every formula below matched those
texts, signs and the place of each constant included, so none was changed; the default parameters
are the papers' own values where a source gave one (each docstring says which). The derivations that
fix the signs are kept, and ``tests/losses/test_pair_objectives.py`` pins each member against a value
computed by hand from the paper's equation.
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Callable
from dataclasses import dataclass, field

import torch
import torch.nn.functional as F

from polopt.losses.margin import MarginLoss

Tensor = torch.Tensor

# exp(z) continues along its tangent above this, so that values and gradients stay finite in
# float32 and bfloat16 at log-ratios of +-1e4 (as polopt.losses.margin.exponential does): e^50 ~ 5e21.
_EXP_LINEAR_TAIL = 50.0
# a response of probability 1 has infinite odds: log-probabilities are capped just below 0
_LOGP_CAP = -1e-6


def _exp_tail(z: Tensor) -> Tensor:
    """``e^z`` for z <= 50, continued along its tangent above: finite everywhere, (B,) -> (B,)."""
    t = _EXP_LINEAR_TAIL
    inside = torch.exp(z.clamp(max=t))  # clamp keeps the unselected branch finite
    return torch.where(z <= t, inside, math.exp(t) * (1.0 + (z - t)))


def _logistic_of(z: Tensor) -> Tensor:
    """``-log sigma(z)``, overflow-safe. (B,) -> (B,)."""
    return F.softplus(-z)  # softplus(-z) = log(1 + e^-z) = -log sigma(z)


# ----------------------------------------------------------------------------
# The argument and the type
# ----------------------------------------------------------------------------


@dataclass(frozen=True)
class PairScores:
    """The argument every pair loss reads: log-probabilities and lengths of a batch of labelled
    pairs, each field (B,).

        winner, loser          policy log-probabilities of the whole responses, log pi(y|x)
        ref_winner, ref_loser  reference log-probabilities, log pi_ref(y|x)
        len_winner, len_loser  response lengths in tokens (1 for every response of a finite task
                               whose file gives no lengths)
    """

    winner: Tensor
    loser: Tensor
    ref_winner: Tensor
    ref_loser: Tensor
    len_winner: Tensor
    len_loser: Tensor

    @property
    def logratio_winner(self) -> Tensor:
        """``h(x, y_w) = log pi(y_w|x) - log pi_ref(y_w|x)``, (B,)."""
        return self.winner - self.ref_winner

    @property
    def logratio_loser(self) -> Tensor:
        """``h(x, y_l) = log pi(y_l|x) - log pi_ref(y_l|x)``, (B,)."""
        return self.loser - self.ref_loser

    def swapped(self) -> PairScores:
        """The pair with winner and loser exchanged, lengths included (the flipped label of smoothing)."""
        return PairScores(self.loser, self.winner, self.ref_loser, self.ref_winner, self.len_loser,
                          self.len_winner)


@dataclass(frozen=True)
class PairLoss:
    """A loss of the whole pair: ``ell(pair, beta, **params) -> (B,)``.

    Attributes:
        name: registry name or dotted path.
        fn: the callable ``fn(pair, beta, **params)``.
        params: keyword parameters bound into ``fn`` (from ``loss.<key>=``).
        source: the paper (built-ins) or "user-supplied".
        margin: the margin loss this pair loss is (:func:`as_pair_loss`), else None.
    """

    name: str
    fn: Callable[..., Tensor]
    params: dict = field(default_factory=dict)
    source: str = ""
    margin: MarginLoss | None = None

    def __call__(self, pair: PairScores, beta: float) -> Tensor:
        return self.fn(pair, beta, **self.params)

    def __repr__(self) -> str:
        extra = "".join(f", {k}={v}" for k, v in self.params.items() if k != "loss")
        return f"PairLoss({self.name!r}{extra})"


def check_values(name: str, values, n: int, *, unit: str = "pair") -> None:
    """A ValueError (one line) unless ``values`` is a tensor of shape (n,): one loss per ``unit`` ("pair" for a
    pair objective, "group" for a group objective), unreduced."""
    if not isinstance(values, torch.Tensor):
        raise ValueError(f"loss {name!r} returned a {type(values).__name__}; a {unit} objective must return a "
                         f"torch tensor of one loss per {unit}, shape ({n},)")
    if tuple(values.shape) != (n,):
        raise ValueError(f"loss {name!r} returned shape {tuple(values.shape)} for a batch of {n} {unit}s; a "
                         f"{unit} objective must return one loss per {unit}, shape ({n},), unreduced "
                         f"(polopt averages over {unit}s)")


def _margin_pair_loss(pair: PairScores, beta: float, *, loss: MarginLoss) -> Tensor:
    """``f(beta * rho)`` with ``rho = (w - ref_w) - (l - ref_l)``, the same expression (and so the
    same floating-point result) as :func:`polopt.losses.reduce.margins`. (B,) -> (B,)."""
    return loss(beta * (pair.logratio_winner - pair.logratio_loser))


def as_pair_loss(loss: MarginLoss | PairLoss | Callable[..., Tensor]) -> PairLoss:
    """Any loss as a :class:`PairLoss`: a pair loss as it is, a margin loss ``f`` as ``f(beta * rho)``
    (remembering ``f`` in ``margin``), a bare callable by its signature (:func:`kind_of`)."""
    if isinstance(loss, PairLoss):
        return loss
    if not isinstance(loss, MarginLoss):
        if not callable(loss):
            raise TypeError(f"expected a polopt MarginLoss, PairLoss or a callable f(x) or f(pair, beta), got "
                            f"{type(loss).__name__}")
        name = getattr(loss, "__name__", getattr(loss, "name", type(loss).__name__))
        kind = kind_of(loss, name)
        if kind == "group":
            raise TypeError(f"loss {name!r} is a group objective f(group, beta): it trains on groups (task.feedback="
                            "unpaired, ranking or scored, or pairs on a finite task), not where pairs are needed")
        if kind == "pair":
            return PairLoss(name, loss, {}, "user-supplied")
        loss = MarginLoss(name, loss, {}, None, "user-supplied")
    return PairLoss(loss.name, _margin_pair_loss, {"loss": loss}, loss.source, margin=loss)


def _takes_a_group(parameter: inspect.Parameter) -> bool:
    """Whether a function's first parameter says it takes a group (a group objective,
    :mod:`polopt.losses.group_objective`): named ``group``, or annotated GroupScores (the class or,
    under ``from __future__ import annotations``, its name)."""
    note = parameter.annotation
    shown = note if isinstance(note, str) else getattr(note, "__name__", "")
    return parameter.name == "group" or shown.split(".")[-1] == "GroupScores"


def kind_of(fn: Callable, label: str) -> str:
    """``"margin"`` for ``f(x)``, ``"pair"`` for ``ell(pair, beta)``, ``"group"`` for ``ell(group,
    beta)`` (the first parameter named ``group`` or annotated GroupScores), decided by the positional
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
        first = next(p for p in parameters if p.name == positional[0])
        return "group" if _takes_a_group(first) else "pair"
    raise TypeError(f"loss {label!r} takes ({', '.join(positional)}): a loss takes one tensor, f(x) (a margin "
                    "loss of x = beta * margin), or two arguments, f(pair, beta) (a pair objective returning one "
                    "loss per pair) or f(group, beta) (a group objective returning one loss per group); extra "
                    "parameters go after * as keyword-only")


# ----------------------------------------------------------------------------
# Divergence-generalised DPO (f-DPO): the link f'(u) replaces DPO's log u
# ----------------------------------------------------------------------------


def divergence_reverse_kl(pair: PairScores, beta: float) -> Tensor:
    """f-DPO with the reverse KL, ``f(u) = u log u``: this is DPO.

    ``f'(u) = log u + 1``, so ``loss = -log sigma(beta (h_w - h_l))`` (the constant cancels), the
    logistic margin loss. Its optimum on Bradley–Terry preferences: ``h = r / beta + const``.

    References:
        Wang et al., Beyond Reverse KL: Generalizing Direct Preference Optimization with Diverse
        Divergence Constraints, 2023 (arXiv 2309.16240; OpenReview 2cRzmWXK9N). Checked: the
        reverse-KL row (``u log u``, ``log u + 1``) of the f, f' table in a reproduction of the
        paper, and the paper's published code, whose reverse-KL loss is the DPO loss.
        Rafailov et al., Direct Preference Optimization, 2023.
    """
    return _logistic_of(beta * (pair.logratio_winner - pair.logratio_loser))


def divergence_forward_kl(pair: PairScores, beta: float) -> Tensor:
    """f-DPO with the forward KL, ``f(u) = -log u``.

    ``f'(u) = -1/u = -e^{-h}``: ``loss = -log sigma(beta (e^{-h_l} - e^{-h_w}))``. The optimum on
    Bradley–Terry preferences solves ``-e^{-h_i} = r_i / beta + const``, i.e. ``pi ∝ pi_ref /
    (c - r / beta)`` (the link set equal to the reward plus a constant, as in the paper's KKT
    argument; the closed form is derived here, not read). ``e^{-h}`` keeps a linear tail beyond
    ``-h = 50``.

    References:
        Wang et al., Beyond Reverse KL, 2023 (arXiv 2309.16240). Checked: forward-KL row ``-log u``,
        ``f'(u) = -1/u`` of the f, f' table in a reproduction,
        and the paper's published code: logit
        ``-e^{-h_w} + e^{-h_l}`` inside ``-log sigma(beta .)``, as here.
    """
    return _logistic_of(beta * (_exp_tail(-pair.logratio_loser) - _exp_tail(-pair.logratio_winner)))


def divergence_jensen_shannon(pair: PairScores, beta: float) -> Tensor:
    """f-DPO with the Jensen–Shannon divergence, ``f(u) = u log u - (1 + u) log((1 + u) / 2)``.

    ``f'(u) = log(2u / (1 + u)) = log 2 + log sigma(h)``: ``loss = -log sigma(beta (log sigma(h_w) -
    log sigma(h_l)))`` (log 2 cancels). The link is bounded above by log 2: raising a winner far above
    the reference earns little, so the optimum moves less than DPO's.

    References:
        Wang et al., Beyond Reverse KL, 2023 (arXiv 2309.16240). Checked: JS row ``u log u - (u + 1)
        log((u + 1) / 2)``, ``f'(u) = log(2u / (1 + u))`` of the f, f' table in a reproduction,
        and the paper's published code, which writes the link as
        ``log 2 - log(1 + 1/u)``, the same function.
    """
    return _logistic_of(beta * (F.logsigmoid(pair.logratio_winner) - F.logsigmoid(pair.logratio_loser)))


def divergence_alpha(pair: PairScores, beta: float, *, alpha: float = 0.5) -> Tensor:
    """f-DPO with an alpha-divergence, ``f(u) = (u^{1-a} - (1 - a) u - a) / (a (a - 1))``, 0 < a < 1.

    ``f'(u) = (1 - u^{-a}) / a``: ``loss = -log sigma((beta / a) (e^{-a h_l} - e^{-a h_w}))``. As
    a -> 0 the link tends to log u (reverse KL, DPO); at a = 1 it is ``1 - 1/u`` (forward KL).

    References:
        Wang et al., Beyond Reverse KL, 2023 (arXiv 2309.16240). Checked: alpha-divergence row
        (``alpha`` in (0, 1)) ``f(u) = (u^{1-a} - (1 - a) u - a) / (a (a - 1))``, ``f'(u) = (1 -
        u^{-a}) / a`` of the f, f' table in a reproduction,
        and the paper's published code: logit
        ``(u_l^{-a} - u_w^{-a}) / a``, alpha asserted in (0, 1), as here. The limits above are
        derived, not read.
    """
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"loss.alpha must lie in (0, 1) (e.g. loss.alpha=0.5), got {alpha!r}")
    a = float(alpha)
    link_w = _exp_tail(-a * pair.logratio_winner)  # u_w^{-a}, (B,)
    link_l = _exp_tail(-a * pair.logratio_loser)  # u_l^{-a}, (B,)
    return _logistic_of((beta / a) * (link_l - link_w))


# ----------------------------------------------------------------------------
# Chi-squared preference optimisation: the chi^2 + KL link
# ----------------------------------------------------------------------------


def chi_squared_link(pair: PairScores, beta: float, *, clip: float | None = None) -> Tensor:
    """chi-PO: DPO with the link ``phi(u) = u + log u`` (mixed chi^2 + KL regularisation).

    ``loss = -log sigma(clip_c[beta (phi(u_w) - phi(u_l))])``, ``phi(u) = e^h + h``. ``clip``
    (the paper's 2 R_max) limits the argument to [-clip, clip]; None: no clipping. The e^h term
    grows fast above the reference, so the policy is held near pi_ref where the data say little
    (the paper's pessimism). ``e^h`` keeps a linear tail beyond h = 50. ``phi`` is ``f'`` of the
    mixed divergence ``f(u) = (u - 1)^2 / 2 + u log u`` (chi^2 / 2 + KL): ``f'(u) = u + log u``.

    References:
        Huang et al., Correcting the Mythos of KL-Regularization: Direct Alignment without
        Overoptimization via Chi-Squared Preference Optimization, 2024 (arXiv 2407.13399). Checked:
        Algorithm 1 (chi-PO), ``argmax sum log sigma(clip_{2 R_max}[beta phi(u_+) - beta phi(u_-)])``
        with ``phi(z) = z + log z``, clipping to [-2 R_max, 2 R_max] applied after beta, as here
        (``clip`` = 2 R_max), in two independent reproductions of the paper's equations (study
        notes in the search index), and the mixed generator
        in a third (a Lean formalisation). No code of the authors was found;
        the paper's R_max has no default, so ``clip`` defaults to none.
    """
    hw, hl = pair.logratio_winner, pair.logratio_loser
    z = beta * ((_exp_tail(hw) + hw) - (_exp_tail(hl) + hl))  # (B,)
    if clip is not None:
        z = z.clamp(-float(clip), float(clip))
    return _logistic_of(z)


# ----------------------------------------------------------------------------
# Lengths and the reference: SimPO, R-DPO, DPO-Positive, reference-free
# ----------------------------------------------------------------------------


def length_normalised_free(pair: PairScores, beta: float, *, gamma: float = 0.5) -> Tensor:
    """SimPO: reference-free, length-normalised log-likelihoods with a target margin gamma.

    ``loss = -log sigma(beta log pi(y_w) / n_w - beta log pi(y_l) / n_l - gamma)``. No reference
    appears, so nothing holds the policy near pi_ref: on a finite task the infimum may be reached
    only at the simplex's boundary.

    The margin gamma stands outside beta. The authors' released runs use beta 2.0 or 2.5 with
    ``gamma / beta`` from 0.1 to 0.8 (gamma 0.25 to 1.6); the default gamma = 0.5 lies in that
    range. polopt's default beta (0.5) is far below theirs: pass ``beta=2`` to train as they did.

    References:
        Meng et al., SimPO: Simple Preference Optimization with a Reference-Free Reward, 2024
        (arXiv 2405.14734). Checked: the SimPO objective ``-log sigma(beta / |y_w| log pi(y_w) -
        beta / |y_l| log pi(y_l) - gamma)`` (reward ``beta / |y| log pi(y)``, margin gamma in the
        Bradley-Terry model) in a study note that follows the paper's equations and in a README by
        CPO's first author; beta and gamma / beta in the SimPO authors' README.
    """
    z = beta * (pair.winner / pair.len_winner - pair.loser / pair.len_loser) - gamma  # (B,)
    return _logistic_of(z)


def length_regularised(pair: PairScores, beta: float, *, alpha: float = 0.05) -> Tensor:
    """R-DPO: DPO with ``alpha (n_w - n_l)`` inside the log-sigmoid.

    ``loss = -log sigma(beta (h_w - h_l) + alpha (n_w - n_l))``. Sign, derived: maximise
    ``E[r - alpha n] - beta KL``; its optimum gives ``r = beta h + alpha n + const``, and
    Bradley–Terry on r gives the line above. A longer winner already "explains" part of the
    preference, so the policy learns less from length.

    References:
        Park et al., Disentangling Length from Quality in Direct Preference Optimization, 2024
        (arXiv 2403.19159; ACL Findings 2024). Checked, against summaries that quote the paper (no
        copy of its equation itself was found): the penalty ``alpha |y|`` in the RL objective gives
        "an additional regularization margin (alpha|y_w| - alpha|y_l|) in the binary classification
        loss logit" that "up-weights gradients for pairs where the chosen answer is shorter", which
        fixes the sign + as derived above; the same + sign in two study notes. alpha = 0.05 per
        token is the paper's Phi-2 / UltraFeedback run (0.1 on Anthropic HH), as quoted there.
    """
    z = beta * (pair.logratio_winner - pair.logratio_loser) + alpha * (pair.len_winner - pair.len_loser)
    return _logistic_of(z)


def winner_anchored(pair: PairScores, beta: float, *, penalty: float = 50.0) -> Tensor:
    """DPO-Positive: DPO with a penalty when the winner falls below the reference.

    ``loss = -log sigma(beta (h_w - h_l - penalty * max(0, -h_w)))``: while ``pi(y_w) >=
    pi_ref(y_w)`` this is DPO; below, every unit of lost winner log-probability costs ``penalty``
    units of margin. It targets likelihood displacement (the winner's probability falling).

    References:
        Pal et al., Smaug: Fixing Failure Modes of Preference Optimisation with DPO-Positive, 2024
        (arXiv 2402.13228). Checked: ``-log sigma(beta (log pi(y_w)/pi_ref(y_w) - log
        pi(y_l)/pi_ref(y_l) - lambda max(0, log pi_ref(y_w)/pi(y_w))))``, the penalty inside
        beta's bracket and zero while the winner is at or above the reference (the paper's runs:
        lambda = 50, beta = 0.3; ablation lambda in 5, 50, 500), in a reproduction note citing
        the paper's v2; the penalty ``max(0, log pi_ref(y_w)/pi(y_w))`` in a
        second summary.
    """
    hw = pair.logratio_winner
    z = beta * (hw - pair.logratio_loser - penalty * F.relu(-hw))  # (B,)
    return _logistic_of(z)


def reference_free_logistic(pair: PairScores, beta: float) -> Tensor:
    """The logistic loss of the policy's own log-probabilities, no reference.

    ``loss = -log sigma(beta (log pi(y_w) - log pi(y_l)))``: CPO's preference term.

    References:
        Xu et al., Contrastive Preference Optimization: Pushing the Boundaries of LLM Performance in
        Machine Translation, 2024 (arXiv 2401.08417). Checked: ``L(pi; U) = -E log sigma(beta log
        pi(y_w) - beta log pi(y_l))`` (the paper's Eq. 3, named so in a comment on
        huggingface.co/papers/2405.14734) as reproduced at
        deepnlp.org/equation/contrastive-preference-optimization-cpo and in a README by the paper's
        first author. Whole-sequence log-probabilities, no length normalisation, as here.
    """
    return _logistic_of(beta * (pair.winner - pair.loser))


# ----------------------------------------------------------------------------
# A supervised term on the winner: CPO and ORPO
# ----------------------------------------------------------------------------


def winner_nll(pair: PairScores, *, per_token: bool = False) -> Tensor:
    """Negative log-likelihood of the winner, ``-log pi(y_w)`` (``/ n_w`` when ``per_token``). (B,)."""
    return -pair.winner / pair.len_winner if per_token else -pair.winner


def _log_odds(logp: Tensor) -> Tensor:
    """``log(p / (1 - p))`` of ``p = e^logp``, overflow-safe. (B,) -> (B,)."""
    logp = logp.clamp(max=_LOGP_CAP)  # p = 1 has infinite odds
    # log(1 - e^x): expm1 near 0, log1p(-e^x) further out (Maechler's rule); each branch's input is
    # clamped to where it is used, so the branch torch.where drops has finite gradients too
    cut = -math.log(2.0)
    near = torch.log(-torch.expm1(logp.clamp(min=cut)))
    far = torch.log1p(-torch.exp(logp.clamp(max=cut)))
    return logp - torch.where(logp > cut, near, far)


def odds_ratio_with_nll(pair: PairScores, beta: float, *, weight: float = 0.1) -> Tensor:
    """ORPO: the winner's per-token NLL plus ``weight`` times the log odds-ratio loss.

    With ``P(y) = exp(log pi(y) / n)`` (the per-token geometric mean), ``odds(y) = P / (1 - P)``:
    ``loss = -log pi(y_w) / n_w - weight * log sigma(log odds(y_w) - log odds(y_l))``. Reference-free
    and beta-free: ``beta`` is not used (ORPO has none).

    References:
        Hong et al., ORPO: Monolithic Preference Optimization without Reference Model, 2024
        (arXiv 2403.07691). Checked: Eq. 6 ``L = E[L_SFT + lambda L_OR]``, ``L_OR = -log
        sigma(log odds(y_w) / odds(y_l))`` (deepnlp.org/equation/odds-ratio-preference-optimization-
        orpo), ``P = exp(mean token log-probability)`` and a per-token NLL in study notes, and the
        paper's published code: the token-averaged NLL of the winner plus ``lambda`` times ``-log
        sigma(log-odds difference)`` of the length-normalised log-probabilities, as here; lambda =
        0.1 in their published run script.
    """
    del beta  # ORPO has no beta
    ratio = _log_odds(pair.winner / pair.len_winner) - _log_odds(pair.loser / pair.len_loser)  # (B,)
    return winner_nll(pair, per_token=True) + weight * _logistic_of(ratio)
