"""Pair objectives as a link of a difference of per-response scores: their population loss, gradient and
Hessian from a few (K, K) array operations instead of autograd over every pair.

Every built-in pair objective of :mod:`polopt.losses.pair` has the shape

    ell(a, b) = link(s_w(a) - s_l(b)) + t(a),

a scalar link of a winner score minus a loser score, plus a term of the winner alone, where a, b are the
winner's and loser's log-probabilities and each score (and t) reads one response's log-probability,
reference log-probability and length (e.g. SimPO: ``link(x) = -log sigma(x)``, ``s(a) = beta a / n``, the
margin gamma folded into ``s_w``; ORPO: the link scaled by its weight, ``s`` the log-odds of ``a / n``,
``t(a) = -a / n``). For win weights W (K, K) and log-probabilities l (K,), with ``X = s_w(l)[:, None] -
s_l(l)[None, :]`` and ``A1 = W link'(X)``, ``A2 = W link''(X)`` (elementwise), L's derivatives in l are

    G = s_w' (A1 1) - s_l' (A1^T 1) + t' (W 1)
    H = diag(s_w'^2 (A2 1) + s_w'' (A1 1) + s_l'^2 (A2^T 1) - s_l'' (A1^T 1) + t'' (W 1)) - M - M^T,
    M = diag(s_w') A2 diag(s_l'),

the chain rule through the pair's two arguments (``d2 ell / da db = -link'' s_w'(a) s_l'(b)``), summed over
pairs. The per-response derivatives (K values each) come from torch autograd, the link's from its formula
(the logistic link of every built-in) or autograd. Where an objective has this shape (:func:`form_of`: the
built-ins by name, or an objective's own ``score_form`` attribute), :class:`DenseTerms` is used, after a
check of its values against the objective itself on the task's pairs (:func:`verified`); any other
objective keeps autograd over its pairs (:class:`toy_tasks.exact.prompt.PairTerms`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace

import numpy as np
import torch
import torch.nn.functional as F

from polopt.losses import group_pairwise
from polopt.losses import pair as pair_losses
from polopt.losses.margin import MarginLoss
from polopt.losses.pair import PairScores
from polopt.losses.reduce import per_pair_losses

Tensor = torch.Tensor
F64 = torch.float64
Score = Callable[[Tensor, Tensor, Tensor], Tensor]  # (log-prob, reference log-prob, length), each (K,) -> (K,)
FORM_AGREEMENT = 1e-10  # the form's per-pair values and the objective's agree to this (relative) before it is used
PROBE_PAIRS = 2048  # the check compares them on about this many of a prompt's pairs (every pair of a small task)


@dataclass(frozen=True)
class Link:
    """A scalar function of the score difference: ``scale * fn(clamp(x, -clip, clip))``; ``fn`` is -log sigma
    (the logistic link) when None, whose derivatives are written out: ``-sigma(-x)``, ``sigma(x) sigma(-x)``."""

    fn: Callable[[Tensor], Tensor] | None = None
    scale: float = 1.0
    clip: float | None = None

    def __call__(self, x: Tensor) -> Tensor:
        if self.clip is not None:
            x = x.clamp(-self.clip, self.clip)
        if self.fn is not None:
            return self.fn(x) if self.scale == 1.0 else self.scale * self.fn(x)  # fn's output may be x itself
        return self._scaled(logistic_from_sigmoid(x, torch.sigmoid(x)))

    def derivatives(self, x: Tensor) -> tuple[Tensor, Tensor, Tensor]:
        """The link and its first and second derivatives at x, elementwise."""
        if self.fn is None and self.clip is None:
            high, low = torch.sigmoid(x), torch.sigmoid(-x)  # sigma(x) and 1 - sigma(x), each to full precision
            return self._scaled(logistic_from_sigmoid(x, high)), self._scaled(low.neg()), self._scaled(high.mul_(low))
        return elementwise_derivatives(self, x)

    def _scaled(self, values: Tensor) -> Tensor:
        """``scale * values`` in place (``values``: a tensor of this class's own making; no pass over a (K, K)
        grid where the scale is 1)."""
        return values if self.scale == 1.0 else values.mul_(self.scale)


def logistic_from_sigmoid(x: Tensor, high: Tensor) -> Tensor:
    """``-log sigma(x)`` from ``high = sigma(x)``: one log where softplus costs several times more; ``-x``
    where sigma(x) underflowed (x below about -745, where -log sigma(x) = -x to float64's precision)."""
    out = -torch.log(high)
    return torch.where(high > 0, out, -x) if float(high.detach().min()) == 0.0 else out


@dataclass(frozen=True)
class ScoreForm:
    """``ell(a, b) = link(winner_score(a) - loser_score(b)) + winner_term(a)`` (see the module docstring).
    ``smooth``: every piece is twice differentiable (no kink such as DPO-Positive's max(0, -h_w), so no kink
    search is needed where Newton is slow); False where unknown (a margin loss's link). ``affine``: both
    scores are one affine function of the log-probability up to a constant (``s_w(a) = c a + b_w``, ``s_l(a) =
    c a + b_l``, c and the b's may read the response's reference log-probability and length) and so is the
    winner term: with the logistic link the population loss is then convex in the log-probabilities
    (:func:`toy_tasks.exact.convexity.certificate`)."""

    link: Link
    winner_score: Score
    loser_score: Score
    winner_term: Score | None = None
    smooth: bool = True
    affine: bool = False

    def pair_values(self, pair: PairScores) -> Tensor:
        """ell of every pair of ``pair``, (B,)."""
        x = (self.winner_score(pair.winner, pair.ref_winner, pair.len_winner)
             - self.loser_score(pair.loser, pair.ref_loser, pair.len_loser))  # (B,)
        out = self.link(x)
        if self.winner_term is not None:
            out = out + self.winner_term(pair.winner, pair.ref_winner, pair.len_winner)
        return out


def elementwise_derivatives(fn: Callable[[Tensor], Tensor], x: Tensor) -> tuple[Tensor, Tensor, Tensor]:
    """``fn(x)``, ``fn'(x)``, ``fn''(x)`` of an elementwise fn by autograd (the gradient of sum fn is fn')."""
    x = x.detach().requires_grad_(True)
    value = fn(x)
    (d1,) = torch.autograd.grad(value.sum(), x, create_graph=True)
    d2 = torch.autograd.grad(d1.sum(), x)[0] if d1.requires_grad else torch.zeros_like(x)
    return value.detach(), d1.detach(), d2.detach()


# ------------------------------------------------------------------ the built-ins' forms


def _logratio(scale: float) -> Score:
    return lambda a, ref, n: scale * (a - ref)


def _of_logratio(fn: Callable[[Tensor], Tensor]) -> Score:
    return lambda a, ref, n: fn(a - ref)


def _exp_tail(h: Tensor) -> Tensor:
    return pair_losses._exp_tail(h)  # the objectives' own e^h with its linear tail, so values agree bit for bit


def _alpha(beta: float, alpha: float = 0.5) -> ScoreForm:
    score = _of_logratio(lambda h: -(beta / alpha) * _exp_tail(-alpha * h))
    return ScoreForm(Link(), score, score)


def _chi(beta: float, clip: float | None = None) -> ScoreForm:
    score = _of_logratio(lambda h: beta * (_exp_tail(h) + h))
    return ScoreForm(Link(clip=None if clip is None else float(clip)), score, score, smooth=clip is None)


def _simpo(beta: float, gamma: float = 0.5) -> ScoreForm:
    return ScoreForm(Link(), lambda a, ref, n: beta * (a / n) - gamma, lambda a, ref, n: beta * (a / n), affine=True)


def _rdpo(beta: float, alpha: float = 0.05) -> ScoreForm:
    score = lambda a, ref, n: beta * (a - ref) + alpha * n  # noqa: E731  alpha (n_w - n_l) split between the two
    return ScoreForm(Link(), score, score, affine=True)


def _anchored(beta: float, penalty: float = 50.0) -> ScoreForm:
    winner = _of_logratio(lambda h: beta * (h - penalty * F.relu(-h)))
    return ScoreForm(Link(), winner, _logratio(beta), smooth=False)


def _orpo(beta: float, weight: float = 0.1) -> ScoreForm:
    score = lambda a, ref, n: pair_losses._log_odds(a / n)  # noqa: E731
    return ScoreForm(Link(scale=weight), score, score, lambda a, ref, n: -a / n)


def _plus_nll(beta: float, base: str = "reference_free_logistic", weight: float = 1.0,
              per_token: bool = False) -> ScoreForm | None:
    from polopt.losses.registry import resolve

    inner = form_of(resolve(base), beta)
    if inner is None or inner.winner_term is not None:
        return None
    nll = (lambda a, ref, n: -weight * (a / n)) if per_token else (lambda a, ref, n: -weight * a)
    return replace(inner, winner_term=nll)  # an affine term: an affine base stays affine


def _flip_corrected(beta: float, flip_rate: float = 0.1) -> ScoreForm:
    return ScoreForm(Link(fn=lambda x: group_pairwise.flip_corrected_of_margin(x, flip_rate)), _logratio(beta),
                     _logratio(beta))


def _blend(beta: float, tau: float = 0.05) -> ScoreForm:
    return ScoreForm(Link(fn=lambda x: group_pairwise.blend_of_margin(x, tau)), _logratio(beta), _logratio(beta))


def _same(score: Score, affine: bool = False) -> ScoreForm:
    return ScoreForm(Link(), score, score, affine=affine)


FORMS: dict[str, Callable[..., ScoreForm | None]] = {
    "divergence_reverse_kl": lambda beta: _same(_logratio(beta), affine=True),
    "divergence_forward_kl": lambda beta: _same(_of_logratio(lambda h: -beta * _exp_tail(-h))),
    "divergence_jensen_shannon": lambda beta: _same(_of_logratio(lambda h: beta * F.logsigmoid(h))),
    "divergence_alpha": _alpha,
    "chi_squared_link": _chi,
    "length_normalised_free": _simpo,
    "length_regularised": _rdpo,
    "winner_anchored": _anchored,
    "reference_free_logistic": lambda beta: _same(lambda a, ref, n: beta * a, affine=True),
    "plus_winner_nll": _plus_nll,
    "odds_ratio_with_nll": _orpo,
    # pairwise group objectives (polopt.losses.group_pairwise) that are links of the margin beta (h_w - h_l)
    "flip_corrected_logistic": _flip_corrected,
    "logistic_exponential_blend": _blend,
}


def form_of(objective, beta: float) -> ScoreForm | None:
    """The :class:`ScoreForm` of ``objective`` at ``beta``: its own ``score_form(beta)`` where it declares one,
    a built-in's by its function (:data:`FORMS`), a margin loss f as ``f(beta h_w - beta h_l)``; else None."""
    own = getattr(objective, "score_form", None)
    if own is not None:
        return own(beta)
    if isinstance(objective, MarginLoss):
        return ScoreForm(Link(fn=objective), _logratio(beta), _logratio(beta), smooth=False)
    fn, params = getattr(objective, "fn", None), dict(getattr(objective, "params", {}) or {})
    if fn is pair_losses._margin_pair_loss:
        return ScoreForm(Link(fn=params["loss"]), _logratio(beta), _logratio(beta), smooth=False)
    build = FORMS.get(getattr(fn, "__name__", ""))
    if build is None or getattr(fn, "__module__", "") not in ("polopt.losses.pair", "polopt.losses.registry",
                                                              "polopt.losses.group_pairwise"):
        return None
    try:
        return build(beta, **params)
    except TypeError:  # a parameter the form does not know: leave the objective to autograd
        return None


def verified(objective, form: ScoreForm | None, pair: PairScores, beta: float, seed: int = 0) -> bool:
    """Whether ``form`` gives the objective's own per-pair losses (within :data:`FORM_AGREEMENT`) on ``pair``
    at the reference and at random log-probabilities around it."""
    if form is None:
        return False
    rng = np.random.default_rng(seed)
    for noise in (0.0, 1.0):
        shift = torch.as_tensor(noise * rng.standard_normal((2, len(pair.winner))), dtype=F64)
        probe = replace(pair, winner=pair.ref_winner + shift[0], loser=pair.ref_loser + shift[1])
        with torch.no_grad():
            want = per_pair_losses(objective, probe, beta=beta)
            got = form.pair_values(probe)
        if want.shape != got.shape or not bool(torch.all(torch.abs(want - got) <= FORM_AGREEMENT * (1 + want.abs()))):
            return False
    return True


# ------------------------------------------------------------------ the population loss of one prompt


class DenseTerms:
    """L of one prompt and its derivatives in the log-probabilities through a :class:`ScoreForm` (the module
    docstring's formulas), every pair at once as (K, K) arrays. Pairs of no weight drop out by their weight 0
    (their link values are finite for the logistic link; another link's are masked by ``where``)."""

    def __init__(self, form: ScoreForm, w: Tensor, log_ref: Tensor, lengths: Tensor):
        self.form, self.w, self.log_ref, self.lengths = form, w, log_ref, lengths
        self.mask = None if form.link.fn is None else w > 0  # (K, K), for a link that may overflow
        self.row_w = w.sum(1)  # (K,): the weight of each response as a winner

    def _scores(self, log_pi: Tensor, order: int):
        """Each score's value and derivatives at ``log_pi``: three lists of (K,) tensors."""
        out = []
        for score in (self.form.winner_score, self.form.loser_score, self.form.winner_term):
            if score is None:
                out.append([torch.zeros_like(log_pi)] * 3)
                continue
            fn = lambda a, s=score: s(a, self.log_ref, self.lengths)  # noqa: E731
            out.append([fn(log_pi), None, None] if order == 0 else list(elementwise_derivatives(fn, log_pi)))
        return out

    def _weighted(self, values: Tensor) -> Tensor:
        """W * values (K, K), 0 where no weight."""
        out = self.w * values
        return out if self.mask is None else torch.where(self.mask, out, 0.0)

    def _total(self, values: Tensor) -> Tensor:
        """sum W * values, a scalar (a dot product: no (K, K) temporary where no mask is needed)."""
        return torch.dot(self.w.view(-1), values.reshape(-1)) if self.mask is None else self._weighted(values).sum()

    def _gap(self, sw: Tensor, sl: Tensor) -> Tensor:
        gap = sw[:, None] - sl[None, :]  # (K, K): X
        return gap if self.mask is None else torch.where(self.mask, gap, 0.0)

    def value(self, log_pi: Tensor) -> float:
        with torch.no_grad():
            (sw, _, _), (sl, _, _), (t, _, _) = self._scores(log_pi, 0)
            return float(self._total(self.form.link(self._gap(sw, sl))) + self.row_w @ t)

    def derivatives(self, log_pi: Tensor) -> tuple[float, Tensor, Tensor]:
        """L, G (K,) and H (K, K) in the log-probabilities."""
        (sw, sw1, sw2), (sl, sl1, sl2), (t, t1, t2) = self._scores(log_pi, 2)
        f0, f1, f2 = self.form.link.derivatives(self._gap(sw, sl))  # (K, K) each
        a1, a2 = self._weighted(f1), self._weighted(f2)  # (K, K) each
        r1, c1, r2, c2 = a1.sum(1), a1.sum(0), a2.sum(1), a2.sum(0)  # (K,) each
        grad = sw1 * r1 - sl1 * c1 + t1 * self.row_w
        m = a2.mul_(sw1[:, None]).mul_(sl1[None, :])  # (K, K): -d2 ell / da db, per (winner, loser); a2 reused
        hess = (m + m.T).neg_()  # (K, K)
        hess.diagonal().add_(sw1**2 * r2 + sw2 * r1 + sl1**2 * c2 - sl2 * c1 + t2 * self.row_w)
        return float(self._total(f0) + self.row_w @ t), grad, hess

    def gradient(self, log_pi: Tensor, shift: float = 0.0) -> Tensor:
        """G (K,), with the argument each pair reads of response k shifted by ``shift`` in the terms that
        differentiate by it (the one-sided partials of :mod:`toy_tasks.exact.kinks`)."""
        (sw, sw1, _), (sl, sl1, _), (_, t1, _) = self._scores(log_pi, 1)
        slope = lambda gap: self._weighted(self.form.link.derivatives(gap)[1])  # noqa: E731  W link'
        if shift == 0.0:
            a1 = slope(self._gap(sw, sl))
            return sw1 * a1.sum(1) - sl1 * a1.sum(0) + t1 * self.row_w
        (sw_s, sw1_s, _), (sl_s, sl1_s, _), (_, t1_s, _) = self._scores(log_pi + shift, 1)
        up, down = slope(self._gap(sw_s, sl)), slope(self._gap(sw, sl_s))
        return sw1_s * up.sum(1) - sl1_s * down.sum(0) + t1_s * self.row_w
