"""Exact optima of the population loss ``L(h) = sum W[x,i,j] f(beta (h_xi - h_xj))``.

For a win-weight tensor W (population or empirical counts), a loss f and beta,
:func:`solve` returns the minimising log-ratios h* (hence pi* ∝ pi_ref e^{h*}),
the optimal value, how it was found and how exact it is:

- closed forms where published: logistic on Bradley–Terry, h = r / beta
  (Rafailov et al. 2023); squared on any P, h_i = (2 / beta) sum_j mu_j P[i,j]
  (Azar et al. 2023). Only for population weights without label smoothing.
- hinge: a linear programme (scipy.optimize.linprog, HiGHS); optima can be
  non-unique, so compare loss values.
- any other loss: a damped Newton solve (:mod:`toy_tasks.exact.newton`: Cholesky
  steps, Armijo line search) with exact gradient and Hessian from torch in float64,
  stopped on the gradient norm; the residual ``max |grad L|`` is reported.
- existence: for losses with no finite per-pair optimum at p = 1 (logistic,
  exponential, savage) a finite minimiser exists iff the graph with an edge
  i -> j whenever W[i,j] > 0 is strongly connected on the weighted responses
  (Ford, Solution of a ranking problem from binary comparisons, 1957). Otherwise
  the optimum is reported as not finite, with the infimum of L and the
  responses that take all the mass in the limit.

Only differences of h within a connected set of responses are identified. The
reported h* is centred (mean 0) on each weakly connected component;
:meth:`Optimum.aligned_to` moves it to the gauge of a trained h before
distances are measured.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.optimize
import scipy.sparse
import scipy.sparse.csgraph
import torch

from polopt.losses.margin import MarginLoss, has_finite_pair_optimum_at_certainty
from toy_tasks.exact.newton import minimise

GRADIENT_TOLERANCE = 1e-10  # stop the Newton solve when max |grad L| falls below this
MAX_ITERATIONS = 500  # Newton iterations per prompt: smooth convex problems need tens


@dataclass
class Optimum:
    """The exact optimum of a finite task's population loss.

    Attributes:
        finite: whether a finite minimiser exists.
        logratios: (X, K) h*, centred per component; None when not finite.
        value: min L, or its infimum when not finite.
        method: how it was found.
        residual: max |grad L(h*)| (None for closed forms and linear programmes).
        unique: False where the minimiser may not be unique (hinge, flat losses).
        limit_support: when not finite: per prompt, the responses that take all
            the mass as the log-ratios diverge.
        components: per prompt, a label per response: its weakly connected
            component (-1 for responses with no weight).
        certified: False where the solver could not certify its answer (a gradient above its
            tolerance at a kink it cannot search): the answer is then no exact target.
        limit_policy: when not finite and the solver minimised on the face the mass goes to: (X, K) the
            policy the infimum is approached at (0 off ``limit_support``); None where it is not known.
    """

    finite: bool
    logratios: np.ndarray | None
    value: float
    method: str
    residual: float | None = None
    unique: bool = True
    limit_support: list[list[int]] | None = None
    components: list[np.ndarray] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    certified: bool = True
    limit_policy: np.ndarray | None = None

    def aligned_to(self, h: np.ndarray) -> np.ndarray:
        """h* shifted, per connected component, to the mean of the given h; responses with
        no weight (unidentified) take h's value. Only identified differences remain."""
        if self.logratios is None:
            raise ValueError("the optimum is not finite; there is nothing to align")
        out = np.array(h, dtype=np.float64, copy=True)
        for x, labels in enumerate(self.components):
            for c in np.unique(labels[labels >= 0]):
                members = labels == c
                out[x, members] = self.logratios[x, members] - self.logratios[x, members].mean() + h[x, members].mean()
        return out


# ------------------------------------------------------------------ population loss


def population_loss(loss: MarginLoss, weights: np.ndarray, h: np.ndarray, *, beta: float) -> float:
    """``sum_{x,i,j} W[x,i,j] f(beta (h_xi - h_xj))`` in float64."""
    value, _, _ = _loss_grad_hess(loss, weights, torch.as_tensor(h, dtype=torch.float64), beta, order=0)
    return value


def smoothed_weights(weights: np.ndarray, smoothing: float) -> np.ndarray:
    """Label smoothing eps as a change of weights: ``(1 - eps) W + eps W^T``."""
    return (1.0 - smoothing) * weights + smoothing * np.swapaxes(weights, 1, 2)


def _elementwise_derivatives(loss: MarginLoss, x: torch.Tensor, order: int):
    """f(x), f'(x), f''(x) elementwise by autograd (f is elementwise, so the
    gradient of sum f is f')."""
    if order == 0:
        return loss(x), None, None
    x = x.detach().requires_grad_(True)
    value = loss(x)
    (d1,) = torch.autograd.grad(value.sum(), x, create_graph=order > 1)
    d2 = None
    if order > 1:
        d2 = torch.autograd.grad(d1.sum(), x)[0] if d1.requires_grad else torch.zeros_like(x)
    return value.detach(), d1.detach(), d2


def _loss_grad_hess(loss: MarginLoss, weights: np.ndarray, h: torch.Tensor, beta: float, order: int):
    """L, its gradient (X, K) and Hessian (X, K, K) in h. f and its derivatives are taken on the dense
    grid of pairs (no boolean indexing: it dominated the time at K = 364); pairs of no weight are
    evaluated at x = 0 and dropped by ``torch.where``, so a non-finite value there never leaks."""
    w = torch.as_tensor(weights, dtype=torch.float64)  # (X, K, K)
    weighted = w > 0
    d = h[:, :, None] - h[:, None, :]  # (X, K, K): h_i - h_j
    value_e, d1, d2 = _elementwise_derivatives(loss, torch.where(weighted, beta * d, 0.0), order)
    value = float(torch.where(weighted, w * value_e, 0.0).sum())
    if order == 0:
        return value, None, None
    g_pair = torch.where(weighted, w * d1 * beta, 0.0)  # (X, K, K): dL/d(h_i - h_j)
    grad = g_pair.sum(2) - g_pair.sum(1)  # (X, K)
    hess = None
    if order > 1:
        a = torch.where(weighted, w * d2 * beta**2, 0.0)
        a = a + a.transpose(1, 2)  # symmetric coupling of i and j
        hess = torch.diag_embed(a.sum(2)) - a  # (X, K, K): a weighted graph Laplacian per prompt
    return value, grad.numpy(), None if hess is None else hess.numpy()


# ------------------------------------------------------------------ graph structure


def _components(w: np.ndarray) -> np.ndarray:
    """Weakly connected component label per response of one prompt; -1 where no weight."""
    adjacency = (w + w.T) > 0
    active = adjacency.any(axis=1)
    _, labels = scipy.sparse.csgraph.connected_components(scipy.sparse.csr_matrix(adjacency), directed=False)
    return np.where(active, labels, -1)


def _strong_components(w: np.ndarray) -> np.ndarray:
    _, labels = scipy.sparse.csgraph.connected_components(
        scipy.sparse.csr_matrix(w > 0), directed=True, connection="strong")
    return labels


def _limit_support(w: np.ndarray, strong: np.ndarray, active: np.ndarray) -> list[int]:
    """Responses in strongly connected components that nothing outside them beats."""
    i, j = np.nonzero(w > 0)  # the weighted pairs, (E,) each
    beaten_from_outside = np.unique(strong[j][strong[i] != strong[j]])
    return [int(k) for k in np.flatnonzero(active & ~np.isin(strong, beaten_from_outside))]


# ------------------------------------------------------------------ solvers


def _newton(loss: MarginLoss, w: np.ndarray, beta: float, h0: np.ndarray,
            labels: np.ndarray) -> tuple[np.ndarray, float]:
    """Minimise one prompt's L(h) with a gauge term 0.5 * (sum of h over each component)^2,
    which fixes the free shift without moving the minimiser of L; damped Newton with the Laplacian
    Hessian (:mod:`toy_tasks.exact.newton`). Returns h and the residual max |grad L(h)|."""
    groups = [labels == c for c in np.unique(labels[labels >= 0])]
    gauge = np.zeros((len(labels), len(labels)))
    for g in groups:
        gauge[np.ix_(g, g)] = 1.0
    inactive = labels < 0
    gauge[inactive, inactive] = 1.0  # unidentified responses are pinned at 0
    wx = w[None]

    def derivatives(h):
        value, grad, hess = _loss_grad_hess(loss, wx, torch.as_tensor(h[None]), beta, order=2)
        return value + 0.5 * h @ gauge @ h, grad[0] + gauge @ h, hess[0] + gauge

    def value(h):
        return _loss_grad_hess(loss, wx, torch.as_tensor(h[None]), beta, order=0)[0] + 0.5 * h @ gauge @ h

    h = minimise(derivatives, value, h0, tol=GRADIENT_TOLERANCE, max_iterations=MAX_ITERATIONS).x
    _, grad, _ = _loss_grad_hess(loss, wx, torch.as_tensor(h[None]), beta, order=1)
    return h, float(np.abs(grad).max())


def _hinge_lp(w: np.ndarray, beta: float, labels: np.ndarray) -> np.ndarray:
    """Exact hinge minimiser of one prompt as a linear programme:
    min sum_e W_e s_e  s.t.  s_e >= 1 - beta (h_i - h_j),  s_e >= 0."""
    k = len(labels)
    pairs = np.argwhere(w > 0)
    e = len(pairs)
    rows = np.repeat(np.arange(e), 3)
    cols = np.stack([pairs[:, 0], pairs[:, 1], k + np.arange(e)], axis=1).ravel()
    vals = np.tile([-beta, beta, -1.0], e)
    a_ub = scipy.sparse.csr_matrix((vals, (rows, cols)), shape=(e, k + e))
    cost = np.concatenate([np.zeros(k), w[pairs[:, 0], pairs[:, 1]]])
    bounds = [(None, None)] * k + [(0, None)] * e
    for c in np.unique(labels):  # fix one response per component (and the unweighted ones) at 0
        first = int(np.flatnonzero(labels == c)[0])
        for i in (np.flatnonzero(labels == c) if c < 0 else [first]):
            bounds[i] = (0.0, 0.0)
    result = scipy.optimize.linprog(cost, A_ub=a_ub, b_ub=-np.ones(e), bounds=bounds, method="highs")
    if result.status != 0:
        raise RuntimeError(f"hinge linear programme failed: {result.message}")
    return result.x[:k]


def _centre(h: np.ndarray, labels: np.ndarray) -> np.ndarray:
    h = h.copy()
    for c in np.unique(labels):
        members = labels == c
        h[members] = 0.0 if c < 0 else h[members] - h[members].mean()
    return h


def solve(loss: MarginLoss, weights: np.ndarray, *, beta: float, rewards: np.ndarray | None = None,
          sampling: np.ndarray | None = None, preference: np.ndarray | None = None,
          population: bool = False, start: np.ndarray | None = None) -> Optimum:
    """The exact optimum of ``sum W f(beta (h_i - h_j))`` over h (see the module docstring).

    Args:
        loss: the loss f.
        weights: (X, K, K) win weights W (already label-smoothed if smoothing is used).
        beta: > 0.
        rewards, sampling, preference: the task's Bradley–Terry rewards (X, K),
            mu (X, K) and P (X, K, K); used for the closed forms only.
        population: True when W is the population (not empirical) weight tensor
            of those (mu, P); only then are the closed forms valid.
        start: (X, K) log-ratios to start Newton from (a warm start: the optimum at a nearby beta,
            as :func:`warm_start` scales it); h = 0 when None. A convex loss has one minimiser, so
            the answer does not depend on it; a non-convex one reports the stationary point reached.
    """
    weights = np.asarray(weights, dtype=np.float64)
    n_prompts, k, _ = weights.shape
    labels = [_components(weights[x]) for x in range(n_prompts)]
    all_active = all(np.all(lab >= 0) for lab in labels)
    connected = all(len(np.unique(lab)) == 1 for lab in labels)

    needs_strong = not has_finite_pair_optimum_at_certainty(loss)
    if needs_strong:
        support, strongly_connected = [], True
        for x in range(n_prompts):
            active = labels[x] >= 0
            strong = _strong_components(weights[x])
            ok = len(np.unique(strong[active])) == len(np.unique(labels[x][active]))
            strongly_connected &= ok
            support.append(_limit_support(weights[x], strong, active))
        if not strongly_connected:
            return _infimum(loss, weights, beta, labels, support)

    name = loss.name if not loss.params else ""
    if population and all_active and connected:
        if name == "logistic" and rewards is not None:
            h = rewards / beta
            return _closed(loss, weights, beta, h, labels, "closed form h = r / beta (DPO; Rafailov et al. 2023)")
        if name == "squared" and sampling is not None and preference is not None:
            h = (2.0 / beta) * np.einsum("xj,xij->xi", sampling, preference)
            return _closed(loss, weights, beta, h, labels,
                           "closed form h = (2 / beta) p(i > mu) (IPO; Azar et al. 2023)")

    h = np.zeros((n_prompts, k))
    if name == "hinge":
        for x in range(n_prompts):
            h[x] = _hinge_lp(weights[x], beta, labels[x])
        h = np.stack([_centre(h[x], labels[x]) for x in range(n_prompts)])
        return Optimum(True, h, population_loss(loss, weights, h, beta=beta), "linear programme (scipy linprog, HiGHS)",
                       None, False, None, labels, ["the hinge optimum may be non-unique: compare loss values"])

    residual = 0.0
    for x in range(n_prompts):
        h0 = np.zeros(k) if start is None else np.asarray(start[x], dtype=np.float64)
        h[x], r = _newton(loss, weights[x], beta, h0, labels[x])
        residual = max(residual, r)
    h = np.stack([_centre(h[x], labels[x]) for x in range(n_prompts)])
    notes = []
    if loss.convex is False:
        notes.append(f"{loss.name} is not convex: this is a stationary point reached from h = 0, "
                     "not necessarily the global minimum")
    if not connected or not all_active:
        notes.append("some responses are not connected by any weighted pair; only differences "
                     "within connected sets are identified")
    return Optimum(True, h, population_loss(loss, weights, h, beta=beta),
                   f"Newton with line search (Cholesky, Armijo), gradient tolerance {GRADIENT_TOLERANCE:g}",
                   residual, loss.convex is not False, None, labels, notes)


def warm_start(optimum: Optimum, beta: float, new_beta: float) -> np.ndarray | None:
    """A start for the solve at ``new_beta`` from the optimum at ``beta``: ``h* beta / new_beta``, exact
    wherever the optimal scaled margins ``beta (h_i - h_j)`` do not depend on beta (closed forms of
    DPO and IPO: Rafailov et al. 2023, Azar et al. 2023) and a close start elsewhere; None when the
    optimum is not finite."""
    return None if optimum.logratios is None else optimum.logratios * (beta / new_beta)


def _closed(loss, weights, beta, h, labels, method) -> Optimum:
    h = np.stack([_centre(h[x], labels[x]) for x in range(len(labels))])
    _, grad, _ = _loss_grad_hess(loss, weights, torch.as_tensor(h), beta, order=1)
    return Optimum(True, h, population_loss(loss, weights, h, beta=beta), method,
                   float(np.abs(grad).max()), True, None, labels)


def _infimum(loss: MarginLoss, weights: np.ndarray, beta: float, labels, support) -> Optimum:
    """No finite minimiser: the infimum of L, reached as the strongly connected
    components separate without bound. Pairs across components contribute
    lim_{x -> inf} f(x); pairs inside a component keep their finite optimum."""
    f_limit = float(loss(torch.tensor(1e4, dtype=torch.float64)))
    value = 0.0
    for x in range(weights.shape[0]):
        w = weights[x]
        strong = _strong_components(w)
        inside = strong[:, None] == strong[None, :]
        value += f_limit * float(w[~inside].sum())
        for c in np.unique(strong):
            members = np.flatnonzero(strong == c)
            if len(members) < 2:
                continue
            sub = w[np.ix_(members, members)]
            if not sub.any():
                continue
            sub_labels = _components(sub)
            h_sub, _ = _newton(loss, sub, beta, np.zeros(len(members)), sub_labels)
            value += population_loss(loss, sub[None], h_sub[None], beta=beta)
    return Optimum(False, None, value, "no finite optimum: the win graph is not strongly connected (Ford 1957)",
                   None, False, support, labels,
                   [f"{loss.name} has no finite per-pair optimum at p = 1, and some responses are never "
                    "beaten by the rest: their log-ratios grow without bound"])

