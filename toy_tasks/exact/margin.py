"""Exact optima of the population loss ``L(h) = sum W[x,i,j] f(beta (h_xi - h_xj))``.

For a win-weight tensor W (population or empirical counts), a loss f and beta,
:func:`solve` returns the minimising log-ratios h* (hence pi* ∝ pi_ref e^{h*}),
the optimal value, how it was found and how exact it is:

- closed forms where published: logistic on Bradley–Terry, h = r / beta
  (Rafailov et al. 2023); squared on any P, h_i = (2 / beta) sum_j mu_j P[i,j]
  (Azar et al. 2023). Only for population weights without label smoothing.
- hinge: a linear programme (scipy.optimize.linprog, HiGHS; solved as its dual, a maximum circulation,
  certified by the duality gap); optima can be
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

import dataclasses
import functools
from dataclasses import dataclass, field

import numpy as np
import scipy.optimize
import scipy.sparse
import scipy.sparse.csgraph
import torch

from polopt.losses.margin import MarginLoss, has_finite_pair_optimum_at_certainty
from toy_tasks.exact import margin_derivatives
from toy_tasks.exact.margin_derivatives import Derivatives
from toy_tasks.exact.newton import minimise

GRADIENT_TOLERANCE = 1e-10  # stop the Newton solve when max |grad L| falls below this
LP_GAP = 1e-9  # the hinge's dual answers where its duality gap is at most this (relative to L)
CLOSED_FORM_TOLERANCE = 1e-9  # a closed-form candidate is the answer where max |grad L| there is below this
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


def population_loss(loss: MarginLoss, weights: np.ndarray, h: np.ndarray, *, beta: float,
                    derivatives: Derivatives | None = None) -> float:
    """``sum_{x,i,j} W[x,i,j] f(beta (h_xi - h_xj))`` in float64 (``derivatives``: f's checked written-out
    form, :func:`toy_tasks.exact.margin_derivatives.checked_form`, when the caller has it)."""
    value, _, _ = _loss_grad_hess(loss, weights, torch.as_tensor(h, dtype=torch.float64), beta, order=0,
                                  derivatives=derivatives)
    return value


def smoothed_weights(weights: np.ndarray, smoothing: float) -> np.ndarray:
    """Label smoothing eps as a change of weights: ``(1 - eps) W + eps W^T``."""
    return (1.0 - smoothing) * weights + smoothing * np.swapaxes(weights, 1, 2)


def _loss_grad_hess(loss: MarginLoss, weights: np.ndarray, h: torch.Tensor, beta: float, order: int,
                    derivatives: Derivatives | None = None):
    """L, its gradient (X, K) and Hessian (X, K, K) in h. f and its derivatives are taken on the dense
    grid of pairs (no boolean indexing: it dominated the time at K = 364), written out for a built-in
    (``derivatives``: :func:`toy_tasks.exact.margin_derivatives.checked_form`; autograd when None). Pairs of
    no weight are evaluated at x = 0 and dropped: by their weight 0 where f is a checked built-in (finite at
    every finite x), else by ``torch.where``, so a non-finite value there never leaks."""
    w = torch.as_tensor(weights, dtype=torch.float64)  # (X, K, K)
    x = (h[:, :, None] - h[:, None, :]).mul_(beta)  # (X, K, K): beta (h_i - h_j)
    if derivatives is None:
        weighted = w > 0
        x = torch.where(weighted, x, 0.0)
        if order == 0:
            return float(torch.where(weighted, w * loss(x), 0.0).sum()), None, None
        value_e, d1, d2 = margin_derivatives.autograd_derivatives(loss)(x)
        value_e, d1, d2 = (torch.where(weighted, t, 0.0) for t in (value_e, d1, d2))
    elif order == 0:
        return float(torch.dot(w.reshape(-1), loss(x).reshape(-1))), None, None  # a built-in: finite everywhere
    else:
        value_e, d1, d2 = derivatives(x)
    value = float(torch.dot(w.reshape(-1), value_e.reshape(-1)))
    g_pair = d1.mul_(w)  # (X, K, K): dL/d(h_i - h_j) / beta
    grad = (g_pair.sum(2) - g_pair.sum(1)).mul_(beta)  # (X, K)
    hess = None
    if order > 1:
        a = d2.mul_(w)  # (X, K, K): W f''
        coupling = (a + a.transpose(1, 2)).mul_(-beta**2)  # symmetric coupling of i and j, negated
        hess = coupling  # (X, K, K): a weighted graph Laplacian per prompt
        hess.diagonal(dim1=1, dim2=2).sub_(coupling.sum(2))
    return value, grad.numpy(), None if hess is None else hess.numpy()


# ------------------------------------------------------------------ graph structure


def _complete(adjacency: np.ndarray) -> bool:
    """Whether every ordered pair of distinct responses is an edge (the population of a task whose every
    pair is compared): then all responses form one component, weak and strong, with no graph search."""
    return bool(adjacency.all() or (adjacency | np.eye(len(adjacency), dtype=bool)).all())


def weak_components(w: np.ndarray) -> np.ndarray:
    """Weakly connected component label per response of one prompt; -1 where no weight."""
    adjacency = (w + w.T) > 0
    if len(w) > 1 and _complete(adjacency):
        return np.zeros(len(w), dtype=np.int32)
    active = adjacency.any(axis=1)
    _, labels = scipy.sparse.csgraph.connected_components(scipy.sparse.csr_matrix(adjacency), directed=False)
    return np.where(active, labels, -1)


def _strong_components(w: np.ndarray) -> np.ndarray:
    if len(w) > 1 and _complete(w > 0):
        return np.zeros(len(w), dtype=np.int32)
    _, labels = scipy.sparse.csgraph.connected_components(
        scipy.sparse.csr_matrix(w > 0), directed=True, connection="strong")
    return labels


def _limit_support(w: np.ndarray, strong: np.ndarray, active: np.ndarray) -> list[int]:
    """Responses in strongly connected components that nothing outside them beats."""
    i, j = np.nonzero(w > 0)  # the weighted pairs, (E,) each
    beaten_from_outside = np.unique(strong[j][strong[i] != strong[j]])
    return [int(k) for k in np.flatnonzero(active & ~np.isin(strong, beaten_from_outside))]


# ------------------------------------------------------------------ solvers


def _newton(loss: MarginLoss, w: np.ndarray, beta: float, h0: np.ndarray, labels: np.ndarray,
            form: Derivatives | None = None) -> tuple[np.ndarray, float]:
    """Minimise one prompt's L(h) with a gauge term 0.5 * (sum of h over each component)^2,
    which fixes the free shift without moving the minimiser of L; damped Newton with the Laplacian
    Hessian (:mod:`toy_tasks.exact.newton`). Returns h, the residual max |grad L(h)| and L(h)."""
    groups = [labels == c for c in np.unique(labels[labels >= 0])]
    gauge = np.zeros((len(labels), len(labels)))
    for g in groups:
        gauge[np.ix_(g, g)] = 1.0
    inactive = labels < 0
    gauge[inactive, inactive] = 1.0  # unidentified responses are pinned at 0
    wx = w[None]

    def derivatives(h):
        value, grad, hess = _loss_grad_hess(loss, wx, torch.as_tensor(h[None]), beta, order=2, derivatives=form)
        return value + 0.5 * h @ gauge @ h, grad[0] + gauge @ h, hess[0] + gauge

    def value(h):
        return _loss_grad_hess(loss, wx, torch.as_tensor(h[None]), beta, order=0, derivatives=form)[0] + \
            0.5 * h @ gauge @ h

    h = minimise(derivatives, value, h0, tol=GRADIENT_TOLERANCE, max_iterations=MAX_ITERATIONS).x
    value, grad, _ = _loss_grad_hess(loss, wx, torch.as_tensor(h[None]), beta, order=1, derivatives=form)
    return h, float(np.abs(grad).max()), value


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


@functools.lru_cache(maxsize=64)
def _finite_at_certainty_of(fn, params: tuple) -> bool:
    return has_finite_pair_optimum_at_certainty(MarginLoss("", fn, dict(params)))


def _finite_at_certainty(loss: MarginLoss) -> bool:
    """:func:`polopt.losses.margin.has_finite_pair_optimum_at_certainty` (a numerical search where the member has
    no closed form: milliseconds), once per function and parameters."""
    try:
        return _finite_at_certainty_of(loss.fn, tuple(sorted(loss.params.items())))
    except TypeError:  # a parameter that cannot be a key
        return has_finite_pair_optimum_at_certainty(loss)


def _hinge(loss: MarginLoss, weights: np.ndarray, beta: float, labels: list[np.ndarray]) -> Optimum:
    """The hinge's optimum, prompt by prompt (:func:`_hinge_by_circulation`), centred per component."""
    solved = [_hinge_by_circulation(loss, weights[x], beta, labels[x]) for x in range(len(weights))]
    h = np.stack([_centre(h_x, labels[x]) for x, (h_x, _) in enumerate(solved)])
    gaps = [gap for _, gap in solved]
    closed = all(g is not None for g in gaps)
    how = "its dual, a maximum circulation" if closed else "the primal where the dual's gap was not closed"
    notes = ["the hinge optimum may be non-unique: compare loss values"]
    if closed:
        notes.append(f"certified by the duality gap: L(h) minus the circulation's value is at most {max(gaps):.2g}")
    return Optimum(True, h, population_loss(loss, weights, h, beta=beta),
                   f"linear programme (scipy linprog, HiGHS; {how})", None, False, None, labels, notes)


def _hinge_by_circulation(loss: MarginLoss, w: np.ndarray, beta: float,
                          labels: np.ndarray) -> tuple[np.ndarray, float | None]:
    """The hinge minimiser of one prompt from the dual of :func:`_hinge_lp`, and its duality gap.

    Dualising ``s_e >= 1 - beta (h_i - h_j)`` with multipliers lambda_e gives a maximum circulation on the win
    graph: ``max sum_e lambda_e`` subject to ``0 <= lambda_e <= W_e`` and as much flow into every response as out
    (h is free); its K equality rows replace the primal's E inequality rows and E slacks (E = K (K - 1) on a
    population: 3.7 million at K = 1,365), and HiGHS solves it in about a second at K = 364 where the primal
    took minutes. The rows' multipliers y give ``beta h = -y`` (LP duality: Bertsimas and Tsitsiklis,
    Introduction to Linear Optimization, 1997, chapter 4). Certificate: the duality gap ``L(h) - sum_e
    lambda_e`` with lambda clipped into its bounds (any feasible circulation bounds L from below). Where HiGHS
    fails or the gap exceeds :data:`LP_GAP` (relative), the primal answers and the gap is None."""
    pairs = np.argwhere(w > 0)  # (E, 2)
    e, k = len(pairs), len(w)
    rows = np.concatenate([pairs[:, 0], pairs[:, 1]])
    incidence = scipy.sparse.csr_matrix((np.concatenate([np.ones(e), -np.ones(e)]),
                                         (rows, np.concatenate([np.arange(e), np.arange(e)]))), shape=(k, e))
    capacity = w[pairs[:, 0], pairs[:, 1]]  # (E,)
    tight = {"primal_feasibility_tolerance": 1e-10, "dual_feasibility_tolerance": 1e-10}
    result = scipy.optimize.linprog(-np.ones(e), A_eq=incidence, b_eq=np.zeros(k),
                                    bounds=np.stack([np.zeros(e), capacity], axis=1), method="highs-ds", options=tight)
    if result.status == 0:
        flow = np.clip(result.x, 0.0, capacity)  # (E,)
        balanced = float(np.abs(incidence @ flow).max(initial=0.0)) <= LP_GAP * float(capacity.max(initial=1.0))
        h = -np.asarray(result.eqlin.marginals) / beta
        value = population_loss(loss, w[None], h[None], beta=beta)
        gap = value - float(flow.sum())
        if balanced and abs(gap) <= LP_GAP * (1.0 + abs(value)):
            return h, abs(gap)
    return _hinge_lp(w, beta, labels), None


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
    labels = [weak_components(weights[x]) for x in range(n_prompts)]
    all_active = all(np.all(lab >= 0) for lab in labels)
    connected = all(len(np.unique(lab)) == 1 for lab in labels)

    needs_strong = not _finite_at_certainty(loss)
    if needs_strong:
        strong = [_strong_components(weights[x]) for x in range(n_prompts)]
        active = [labels[x] >= 0 for x in range(n_prompts)]
        if not all(len(np.unique(strong[x][active[x]])) == len(np.unique(labels[x][active[x]]))
                   for x in range(n_prompts)):
            support = [_limit_support(weights[x], strong[x], active[x]) for x in range(n_prompts)]
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

    if name == "hinge":
        return _hinge(loss, weights, beta, labels)
    form = margin_derivatives.checked_form(loss)
    star = _per_pair_star(loss, weights, beta) if all_active and connected else None
    if star is not None:
        closed = _closed(loss, weights, beta, star, labels, "closed form: every response's log-ratio from its per-pair "
                         "optimum x*(p) against one response (Tang et al. 2024), certified by its residual", form)
        if closed.residual <= CLOSED_FORM_TOLERANCE:
            return _as_stationary_point(closed, loss)
        if start is None and (loss.convex or closed.value < population_loss(loss, weights, np.zeros_like(star),
                                                                            beta=beta, derivatives=form)):
            start = closed.logratios  # Newton's start: a convex loss's answer does not depend on it; else it lowers L

    h = np.zeros((n_prompts, k))

    residual, value = 0.0, 0.0
    for x in range(n_prompts):
        h0 = np.zeros(k) if start is None else np.asarray(start[x], dtype=np.float64)
        h[x], r, v = _newton(loss, weights[x], beta, h0, labels[x], form)
        residual, value = max(residual, r), value + v  # L reads differences only: centring below leaves it
    h = np.stack([_centre(h[x], labels[x]) for x in range(n_prompts)])
    notes = []
    if loss.convex is False:
        notes.append(f"{loss.name} is not convex: this is a stationary point reached from h = 0, "
                     "not necessarily the global minimum")
    if not connected or not all_active:
        notes.append("some responses are not connected by any weighted pair; only differences "
                     "within connected sets are identified")
    return Optimum(True, h, value,
                   f"Newton with line search (Cholesky, Armijo), gradient tolerance {GRADIENT_TOLERANCE:g}",
                   residual, loss.convex is not False, None, labels, notes)


def warm_start(optimum: Optimum, beta: float, new_beta: float) -> np.ndarray | None:
    """A start for the solve at ``new_beta`` from the optimum at ``beta``: ``h* beta / new_beta``, exact
    wherever the optimal scaled margins ``beta (h_i - h_j)`` do not depend on beta (closed forms of
    DPO and IPO: Rafailov et al. 2023, Azar et al. 2023) and a close start elsewhere; None when the
    optimum is not finite."""
    return None if optimum.logratios is None else optimum.logratios * (beta / new_beta)


def _closed(loss, weights, beta, h, labels, method, form: Derivatives | None = None) -> Optimum:
    h = np.stack([_centre(h[x], labels[x]) for x in range(len(labels))])
    value, grad, _ = _loss_grad_hess(loss, weights, torch.as_tensor(h), beta, order=1, derivatives=form)
    return Optimum(True, h, value, method, float(np.abs(grad).max()), True, None, labels)


def _per_pair_star(loss: MarginLoss, weights: np.ndarray, beta: float) -> np.ndarray | None:
    """Log-ratios (X, K) putting each response's pair with the response compared most often at that pair's own
    optimum: ``beta (h_i - h_root) = x*(p_i)``, ``p_i = W[i, root] / (W[i, root] + W[root, i])`` (x*: the member's
    closed-form per-pair optimum, :meth:`polopt.losses.margin.MarginLoss.pair_optimum`). Where the per-pair
    optima are consistent (Bradley–Terry preferences and ``x*(p)`` a multiple of logit p: the exponential
    loss's ``logit(p) / 2`` and the Savage loss's ``logit p``, Tang et al. 2024) every pair sits at its own
    optimum and this is the optimum of L; elsewhere it is a start. None where a response is never compared
    with the root, a p is 0 or 1, or the member has no closed-form x*."""
    if loss.closed_form_optimum is None:
        return None
    h = np.zeros(weights.shape[:2])
    for x, w in enumerate(weights):
        total = w + w.T  # (K, K): the weight of each unordered pair
        root = int(np.argmax((total > 0).sum(1)))
        wins, compared = w[:, root], total[:, root]
        others = np.arange(len(w)) != root
        if np.any(compared[others] <= 0) or np.any(wins[others] <= 0) or np.any(wins[others] >= compared[others]):
            return None
        h[x, others] = [loss.closed_form_optimum(float(p)) / beta for p in wins[others] / compared[others]]
    return h if np.all(np.isfinite(h)) else None


def _as_stationary_point(optimum: Optimum, loss: MarginLoss) -> Optimum:
    """A closed-form answer of a loss not known to be convex: certified stationary, not claimed unique."""
    if loss.convex is not False:
        return optimum
    return dataclasses.replace(optimum, unique=False, notes=[
        f"{loss.name} is not convex: this is a stationary point (its gradient vanishes), "
        "not proved the global minimum"])


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
            sub_labels = weak_components(sub)
            h_sub, _, _ = _newton(loss, sub, beta, np.zeros(len(members)), sub_labels)
            value += population_loss(loss, sub[None], h_sub[None], beta=beta)
    return Optimum(False, None, value, "no finite optimum: the win graph is not strongly connected (Ford 1957)",
                   None, False, support, labels,
                   [f"{loss.name} has no finite per-pair optimum at p = 1, and some responses are never "
                    "beaten by the rest: their log-ratios grow without bound"])

