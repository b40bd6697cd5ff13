"""One prompt's population loss of a pair objective, with its gradient and Hessian assembled in one pass.

For win weights W (K, K), reference log-probabilities and lengths, the loss of a policy of
log-probabilities ``l = log pi`` (K,) is ``L(l) = sum_e W_e ell(l_i(e), l_j(e), ...)`` over the E weighted
ordered pairs e = (i, j). Each pair reads only its winner's and loser's log-probabilities (the pair
objective's contract), so L's derivatives in l are sums of per-pair derivatives:

    G_k = sum_{e: i=k} W_e d_a ell + sum_{e: j=k} W_e d_b ell
    H   = scatter of W_e [[d_aa, d_ab], [d_ab, d_bb]] ell onto (i, j) (a Laplacian-like pattern),

with d_a, d_b, d_aa, d_ab, d_bb taken for all E pairs at once by torch autograd (a pair's loss does not
read another pair's arguments, so the gradient of the sum is each pair's own derivative). A policy is a
softmax of logits y over the *free* responses, the others held at their reference probability (the
kink search pins them there): ``l_F = log m + log_softmax(y)``, m the free mass. The chain rule through
log-softmax gives, with q = softmax(y), ``J = I - 1 q^T``,

    dL/dy = G_F - q sum(G_F),   d2L/dy2 = J^T H_FF J - sum(G_F) (diag(q) - q q^T),

and ``J^T H J = H - r q^T - q r^T + (1^T r) q q^T`` with ``r = H 1``: O(K^2), no K^3 product.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import torch

from polopt.losses.pair import PairScores
from polopt.losses.reduce import per_pair_losses
from toy_tasks.exact import scores
from toy_tasks.exact.newton import NewtonResult, minimise

Tensor = torch.Tensor
F64 = torch.float64


def objective_name(objective) -> str:
    return getattr(objective, "name", None) or getattr(objective, "__name__", type(objective).__name__)


class PairTerms:
    """L of one prompt and its derivatives in the log-probabilities by torch autograd over its E weighted pairs
    (any pair objective): ``d_a, d_b, d_aa, d_ab, d_bb`` of every pair from three backward passes, scattered
    onto (K, K) (the module docstring)."""

    def __init__(self, prompt: PromptLoss):
        self.prompt = prompt

    def value(self, log_pi: Tensor) -> float:
        with torch.no_grad():
            return float(self.prompt.loss_at(log_pi))

    def derivatives(self, log_pi: Tensor) -> tuple[float, Tensor, Tensor]:
        p = self.prompt
        a = log_pi[p.i].detach().clone().requires_grad_(True)  # (E,)
        b = log_pi[p.j].detach().clone().requires_grad_(True)  # (E,)
        values = p.pair_losses(a, b)  # (E,)
        ga, gb = _grads(values.sum(), (a, b), create_graph=True)
        haa, hab = _grads(ga.sum(), (a, b), retain_graph=True) if ga.requires_grad else (_zero(a), _zero(a))
        (hbb,) = _grads(gb.sum(), (b,)) if gb.requires_grad else (_zero(b),)
        w, i, j, k = p.weight, p.i, p.j, p.k
        grad = torch.zeros(k, dtype=F64).index_add_(0, i, w * ga.detach()).index_add_(0, j, w * gb.detach())
        cross = w * hab.detach()
        hess = (torch.zeros(k * k, dtype=F64).index_add_(0, i * (k + 1), w * haa.detach())
                .index_add_(0, j * (k + 1), w * hbb.detach()).index_add_(0, i * k + j, cross)
                .index_add_(0, j * k + i, cross).view(k, k))  # (K, K)
        return float((w * values.detach()).sum()), grad, hess

    def gradient(self, log_pi: Tensor, shift: float = 0.0) -> Tensor:
        """G (K,), each pair's derivative in its winner (loser) argument taken with that argument shifted by
        ``shift`` (the one-sided partials of :mod:`toy_tasks.exact.kinks`)."""
        p = self.prompt
        a, b = log_pi[p.i], log_pi[p.j]  # (E,) each
        if shift:
            (ga, _), (_, gb) = p.pair_gradients(a + shift, b), p.pair_gradients(a, b + shift)
        else:
            ga, gb = p.pair_gradients(a, b)
        return torch.zeros(p.k, dtype=F64).index_add_(0, p.i, p.weight * ga).index_add_(0, p.j, p.weight * gb)


class PromptLoss:
    """L of one prompt as a function of its log-probabilities, with its derivatives: through the objective's
    :class:`toy_tasks.exact.scores.ScoreForm` as (K, K) arrays where it has one (every built-in), else by
    autograd over its pairs (:class:`PairTerms`)."""

    def __init__(self, objective: Callable, w: np.ndarray, log_ref: np.ndarray, lengths: np.ndarray, beta: float):
        self.objective, self.beta = objective, beta
        # torch.tensor copies: the task's arrays may be read-only views (np.broadcast_to)
        self.w, self.log_ref, self.lengths = (torch.tensor(np.asarray(a), dtype=F64) for a in (w, log_ref, lengths))
        self.k = len(self.log_ref)
        self.i, self.j = torch.nonzero(self.w > 0, as_tuple=True)  # the weighted ordered pairs, (E,) each
        self.weight = self.w[self.i, self.j]  # (E,)
        self.ref_i, self.ref_j = self.log_ref[self.i], self.log_ref[self.j]  # (E,) each
        self.len_i, self.len_j = self.lengths[self.i], self.lengths[self.j]  # (E,) each
        form = scores.form_of(objective, beta)
        probe = slice(None, None, max(1, len(self.i) // scores.PROBE_PAIRS))  # up to ~2 PROBE_PAIRS pairs, spread out
        pair = PairScores(*(t[probe] for t in (self.ref_i, self.ref_j, self.ref_i, self.ref_j, self.len_i, self.len_j)))
        dense = len(self.i) > 0 and scores.verified(objective, form, pair, beta)
        self.terms = scores.DenseTerms(form, self.w, self.log_ref, self.lengths) if dense else PairTerms(self)
        self.smooth = dense and form.smooth  # known to have no kink (else a stalled Newton may search one)

    def pair_losses(self, a: Tensor, b: Tensor) -> Tensor:
        """ell of every weighted pair at winner log-probabilities a and loser log-probabilities b, (E,)."""
        pair = PairScores(a, b, self.ref_i, self.ref_j, self.len_i, self.len_j)
        return per_pair_losses(self.objective, pair, beta=self.beta)  # validated: (E,)

    def loss_at(self, log_pi: Tensor) -> Tensor:
        """L at log-probabilities ``log_pi`` (K,), a scalar tensor (differentiable)."""
        return (self.weight * self.pair_losses(log_pi[self.i], log_pi[self.j])).sum()

    def value_at(self, log_pi) -> float:
        return self.terms.value(torch.as_tensor(log_pi, dtype=F64))

    def pair_gradients(self, a: Tensor, b: Tensor) -> tuple[Tensor, Tensor]:
        """``(d_a ell, d_b ell)`` of every pair at (a, b), each (E,)."""
        a, b = a.detach().clone().requires_grad_(True), b.detach().clone().requires_grad_(True)
        ga, gb = torch.autograd.grad(self.pair_losses(a, b).sum(), (a, b), allow_unused=True)
        return (torch.zeros_like(a) if ga is None else ga), (torch.zeros_like(b) if gb is None else gb)

    def logpi_gradient(self, log_pi, shift: float = 0.0) -> Tensor:
        """G (K,) in the log-probabilities, with each pair's differentiated argument shifted by ``shift``."""
        return self.terms.gradient(torch.as_tensor(log_pi, dtype=F64), shift)

    def logpi_derivatives(self, log_pi: Tensor) -> tuple[float, Tensor, Tensor]:
        """L, its gradient G (K,) and Hessian H (K, K) in the log-probabilities ``log_pi`` (K,)."""
        return self.terms.derivatives(log_pi.detach())

    def chart(self, pinned: np.ndarray | None = None) -> Chart:
        """L in the softmax logits of the responses not ``pinned`` (all of them when None)."""
        return Chart(self, np.zeros(self.k, dtype=bool) if pinned is None else np.asarray(pinned, dtype=bool))


class Chart:
    """L as a function of logits y over the free responses, the pinned ones held at the reference.
    ``gauged_*`` add ``0.5 (sum y)^2``, which fixes y's free shift without moving pi (Newton's target)."""

    def __init__(self, prompt: PromptLoss, pinned: np.ndarray):
        self.prompt, self.pinned = prompt, torch.as_tensor(pinned)
        self.free = ~self.pinned
        self.all_free = bool(self.free.all())
        self.rest = float(torch.log1p(-prompt.log_ref[self.pinned].exp().sum()))  # log of the free mass

    def log_policy(self, y) -> Tensor:
        y = torch.as_tensor(y, dtype=F64)
        log_pi = self.prompt.log_ref.clone()
        log_pi[self.free] = self.rest + torch.log_softmax(y, dim=0)
        return log_pi  # (K,)

    def loss(self, y: Tensor) -> Tensor:
        """L at y as a differentiable tensor (for autograd's own derivatives in tests)."""
        return self.prompt.loss_at(self.log_policy(y))

    def value(self, y) -> float:
        return self.prompt.value_at(self.log_policy(y))

    def derivatives(self, y, gauge: bool = False) -> tuple[float, np.ndarray, np.ndarray]:
        """L, dL/dy and d2L/dy2 (see the module docstring); with ``gauge``, plus the gauge's (all-ones) Hessian."""
        log_pi = self.log_policy(y)
        value, grad, hess = self.prompt.logpi_derivatives(log_pi)
        q = torch.softmax(torch.as_tensor(y, dtype=F64), dim=0)  # the free responses' shares
        if not self.all_free:
            grad, hess = grad[self.free], hess[self.free][:, self.free]
        hess_y = softmax_chain_rule(q, grad, hess, gauge=gauge)  # (F, F), hess overwritten
        return value, (grad - q * grad.sum()).numpy(), hess_y.numpy()

    def grad(self, y) -> np.ndarray:
        g_free = self.prompt.logpi_gradient(self.log_policy(y))[self.free]
        q = torch.softmax(torch.as_tensor(y, dtype=F64), dim=0)
        return (g_free - q * g_free.sum()).numpy()

    def hessian(self, y) -> np.ndarray:
        return self.derivatives(y)[2]

    def gauged_value(self, y) -> float:
        return self.value(y) + 0.5 * float(np.sum(y)) ** 2

    def gauged_derivatives(self, y) -> tuple[float, np.ndarray, np.ndarray]:
        value, grad, hess = self.derivatives(y, gauge=True)
        shift = float(np.sum(y))
        return value + 0.5 * shift**2, grad + shift, hess


def softmax_chain_rule(q: Tensor, grad_logpi: Tensor, h: Tensor, gauge: bool = False) -> Tensor:
    """The Hessian in logits y of a function of ``log_softmax(y)`` (+ a constant), from its gradient G
    (n,) and Hessian H (n, n) in the log-probabilities: ``J^T H J - (sum G) (diag(q) - q q^T)`` with
    ``J = I - 1 q^T``, written as ``H - r q^T - q r^T + (1^T r) q q^T``, ``r = H 1`` (O(n^2)): with
    ``c = 1^T r + sum G`` and ``u = r - (c / 2) q`` it is ``H - u q^T - q u^T - (sum G) diag(q)``, two
    rank-one updates of H in place (``h`` is overwritten). ``gauge``: plus the all-ones matrix."""
    r = h.sum(dim=1)  # (n,)
    total = grad_logpi.sum()
    u = r - 0.5 * (r.sum() + total) * q  # (n,)
    h = torch.addr(h, u, q, alpha=-1.0)  # (n, n)
    h.addr_(q, u, alpha=-1.0)
    h.diagonal().sub_(total * q)
    if gauge:
        h.add_(1.0)
    return h


def _grads(output: Tensor, inputs: tuple[Tensor, ...], **kwargs) -> list[Tensor]:
    """torch.autograd.grad with zeros where the output does not depend on an input."""
    found = torch.autograd.grad(output, inputs, allow_unused=True, **kwargs)
    return [_zero(x) if g is None else g for g, x in zip(found, inputs, strict=True)]


def _zero(x: Tensor) -> Tensor:
    return torch.zeros_like(x, requires_grad=False)


def minimise_chart(chart: Chart, y0: np.ndarray, *, tol: float, max_iterations: int, **options) -> NewtonResult:
    """Newton on the gauged L of ``chart`` from ``y0`` (:func:`toy_tasks.exact.newton.minimise`, which
    takes ``options``)."""
    y0 = np.asarray(y0, dtype=np.float64)
    return minimise(chart.gauged_derivatives, chart.gauged_value, y0 - y0.mean(), tol=tol,
                    max_iterations=max_iterations, **options)
