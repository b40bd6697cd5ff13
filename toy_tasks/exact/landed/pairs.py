"""[Landed solver, kept for comparison: see toy_tasks.exact.landed.]

The exact optimum of any pair objective on a finite task, with a certificate.

A *pair objective* is a callable ``objective(pair, beta) -> Tensor`` of per-pair losses, shape (B,),
where ``pair`` is a :class:`polopt.losses.pair.PairScores` (winner and loser log-probabilities under
the policy and the reference, and their lengths). On a finite task with win weights W (X, K, K),
reference pi_ref and lengths n, its population loss over the simplex is

    L(pi) = sum_x sum_{i != j} W[x,i,j] ell(log pi_xi, log pi_xj, log ref_xi, log ref_xj, n_xi, n_xj).

This module minimises L in float64:

- a margin loss f (a :class:`polopt.losses.margin.MarginLoss`) keeps the solver of :mod:`toy_tasks.exact.margin` (closed
  forms, linear programme, Newton in the log-ratios, Ford's existence test): it is the special case
  ``ell = f(beta ((w - ref_w) - (l - ref_l)))``, and :func:`exact_optimum` hands it over unchanged.
- any other objective: pi = softmax(z) per prompt, a trust-region Newton solve in the logits z
  (scipy.optimize.minimize, 'trust-exact' with the exact Hessian for up to :data:`DENSE_LIMIT`
  responses, 'trust-krylov' with exact Hessian-vector products above), gradient and Hessian from
  torch.autograd in float64, from several seeded starts (the reference and random logits) to detect
  a non-unique minimiser or distinct local minima.
- the certificate ``residual``: max |dL/dz| at the answer. With g = dL/dpi this is
  ``max_i pi_i |g_i - sum_j pi_j g_j|``, the gradient of L projected onto the tangent space of the
  simplex (in the softmax chart); it is 0 exactly at a stationary point in the simplex's interior.
- the boundary: a reference-free objective can have its infimum only where some probability is 0
  (e.g. SimPO, Meng et al. 2024, on deterministic preferences). After a solve, a Newton step that
  still lowers L along a ray of growing length means the minimiser runs off to the boundary: the
  solve continues along it, the optimum is reported as not finite with the infimum of L and the
  responses that keep their mass in the limit (``limit_support``), never a NaN.
- closed forms: an objective of the divergence family (Wang et al., Beyond Reverse KL: Generalizing
  Direct Preference Optimization with Diverse Divergence Constraints, 2023) declares its ``f'`` as the
  attribute ``ratio_link`` (a torch function of u = pi / pi_ref); on Bradley–Terry population weights
  the optimum solves ``f'(pi_i / ref_i) = r_i / beta + c`` (their Theorem; for reverse KL,
  f'(u) = log u + 1 gives DPO's pi* ∝ pi_ref e^{r / beta}), computed by :func:`divergence_optimum`
  and certified by the same residual.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import scipy.optimize
import scipy.special
import torch
from tqdm.auto import tqdm

from polopt.losses.margin import MarginLoss
from polopt.losses.pair import PairScores
from toy_tasks.exact.landed.margin import Optimum, population_loss, solve

Tensor = torch.Tensor
PairObjective = Callable[[PairScores, float], Tensor]

GRADIENT_TOLERANCE = 1e-10  # stop when max |dL/dz| falls below this
CLOSED_FORM_TOLERANCE = 1e-9  # a closed form is used when its gradient is this small
CERTIFIED = 1e-7  # an answer whose gradient is larger is reported as not certified
KINK_BAND = 1e-4  # log-ratios this close to 0 are taken to sit at an anchor term's kink
KINK_LIMIT = 128  # above this many responses, only the start at the reference searches a kink: from a random
#                   start at K = 364 the active set changes one transfer at a time, and the search ran over 8
#                   minutes (killed, beside the test suite) even with the chain-rule Hessian, where the
#                   reference start took 29 s beside it
SLOPE_AGREEMENT = 1e-6  # a transfer's measured slope and the one its one-sided partials predict agree this well
MAX_ITERATIONS = 300  # trust-region iterations per solve: smooth problems need tens; a kink would take them all
DENSE_LIMIT = 1000  # above this many responses per prompt, Hessian-vector products instead of the Hessian
STARTS = 3  # seeded starts per prompt: the reference, then random logits
SOLVE_BAR_DELAY = 3.0  # seconds before the solve shows a progress bar (quick solves stay silent)
SAME_POLICY_TV = 1e-6  # starts whose policies differ by more than this (TV) make the optimum non-unique
DESCENT_RAY = (1.0, 4.0, 16.0, 64.0, 256.0)  # multiples of the final Newton step tried along the boundary ray
BOUNDARY_ROUNDS = 4  # continuations along the ray before the infimum is reported
VANISHED_DROP = 2.0  # a response whose log-probability fell by more than this while continuing has no mass in the limit


def margin_of(objective) -> MarginLoss | None:
    """The margin loss f behind ``objective`` (a :class:`polopt.losses.margin.MarginLoss`, or a pair objective
    made from one by :func:`polopt.losses.registry.from_margin`), else None."""
    if isinstance(objective, MarginLoss):
        return objective
    margin = getattr(objective, "margin", None)
    return margin if isinstance(margin, MarginLoss) else None


def is_margin_loss(objective) -> bool:
    """Whether ``objective`` is a margin loss f (solved by :mod:`toy_tasks.exact.margin`)."""
    return margin_of(objective) is not None


def margin_objective(loss: MarginLoss | Callable[[Tensor], Tensor]) -> PairObjective:
    """A margin loss f as a pair objective: ``ell = f(beta ((w - ref_w) - (l - ref_l)))`` (DESIGN.md)."""

    def objective(pair: PairScores, beta: float) -> Tensor:
        return loss(beta * (pair.logratio_winner - pair.logratio_loser))  # (B,)

    objective.__name__ = getattr(loss, "name", getattr(loss, "__name__", "margin"))
    return objective


# ------------------------------------------------------------------ the population loss


def _pair_terms(objective: PairObjective, w: Tensor, log_pi: Tensor, log_ref: Tensor, lengths: Tensor,
                beta: float) -> Tensor:
    """``sum_{i != j} W[i,j] ell(...)`` of one prompt (or all prompts: leading dimension X), a scalar."""
    index = torch.nonzero(w > 0, as_tuple=True)  # the weighted ordered pairs, each (E,)
    *lead, i, j = index
    pair = PairScores(winner=log_pi[(*lead, i)], loser=log_pi[(*lead, j)],
                      ref_winner=log_ref[(*lead, i)], ref_loser=log_ref[(*lead, j)],
                      len_winner=lengths[(*lead, i)], len_loser=lengths[(*lead, j)])  # each (E,)
    values = objective(pair, beta)
    if not isinstance(values, Tensor) or values.shape != w[index].shape:
        shape = tuple(values.shape) if isinstance(values, Tensor) else type(values).__name__
        raise ValueError(f"pair objective {_name(objective)} must return one loss per pair, a tensor of shape "
                         f"({len(i)},) for {len(i)} pairs; got {shape}")
    return (w[index] * values).sum()


def pair_population_loss(objective: PairObjective, weights: np.ndarray, policy: np.ndarray,
                         reference: np.ndarray, lengths: np.ndarray, *, beta: float) -> float:
    """L(pi) of the module docstring in float64, for policies pi (X, K) on the simplex."""
    t = lambda a: torch.tensor(np.asarray(a, dtype=np.float64))  # noqa: E731  (a copy: a may be a read-only view)
    with np.errstate(divide="ignore"):
        log_pi = np.log(policy)
    value = _pair_terms(objective, t(weights), t(log_pi), t(np.log(reference)), t(lengths), beta)
    return float(value)


def objective_value(objective, weights: np.ndarray, h: np.ndarray, reference: np.ndarray, lengths: np.ndarray,
                    *, beta: float) -> float:
    """The population loss at log-ratios h (X, K) for a margin loss or a pair objective alike."""
    margin = margin_of(objective)
    if margin is not None:
        return population_loss(margin, weights, h, beta=beta)
    policy = scipy.special.softmax(np.log(reference) + h, axis=1)
    return pair_population_loss(objective, weights, policy, reference, lengths, beta=beta)


# ------------------------------------------------------------------ one prompt in the softmax chart


class _Prompt:
    """L of one prompt as a function of its logits z (K,), with exact derivatives by autograd.
    A gauge term ``0.5 (sum z)^2`` fixes the free shift of z without moving pi."""

    def __init__(self, objective: PairObjective, w: np.ndarray, log_ref: np.ndarray, lengths: np.ndarray,
                 beta: float):
        self.objective, self.beta = objective, beta
        # torch.tensor copies: the task's arrays may be read-only views (np.broadcast_to)
        self.w, self.log_ref, self.lengths = (torch.tensor(np.asarray(a), dtype=torch.float64)
                                              for a in (w, log_ref, lengths))

    def loss(self, z: Tensor) -> Tensor:
        log_pi = torch.log_softmax(z, dim=0)  # (K,)
        return _pair_terms(self.objective, self.w, log_pi, self.log_ref, self.lengths, self.beta)

    def value(self, z: np.ndarray) -> float:
        with torch.no_grad():
            return float(self.loss(torch.as_tensor(z, dtype=torch.float64)))

    def value_at(self, log_pi: np.ndarray) -> float:
        """L at the policy of log-probabilities ``log_pi`` (K,) itself."""
        with torch.no_grad():
            return float(_pair_terms(self.objective, self.w, torch.as_tensor(log_pi, dtype=torch.float64),
                                     self.log_ref, self.lengths, self.beta))

    def grad(self, z: np.ndarray) -> np.ndarray:
        zt = torch.as_tensor(z, dtype=torch.float64).requires_grad_(True)
        (g,) = torch.autograd.grad(self.loss(zt), zt)
        return g.numpy()

    def fun(self, z: np.ndarray) -> tuple[float, np.ndarray]:
        zt = torch.as_tensor(z, dtype=torch.float64).requires_grad_(True)
        value = self.loss(zt)
        (g,) = torch.autograd.grad(value, zt)
        shift = z.sum()
        return float(value.detach()) + 0.5 * shift**2, g.numpy() + shift

    def hess(self, z: np.ndarray) -> np.ndarray:
        return self.hessian(z) + 1.0  # the gauge term's Hessian is the all-ones matrix

    def hessian(self, z: np.ndarray) -> np.ndarray:
        """The Hessian of L in z (K, K), assembled from each pair's second derivatives in its two
        log-probabilities (:meth:`logpi_derivatives`) and the chain rule through log pi = z - logsumexp(z):
        ``J^T H J - (sum G) (diag(pi) - pi pi^T)`` with ``J = I - 1 pi^T``, H and G the Hessian and
        gradient in log pi. One pass over the pairs instead of K (autograd's full Hessian)."""
        log_pi = torch.log_softmax(torch.as_tensor(z, dtype=torch.float64), dim=0)  # (K,)
        grad_logpi, h = self.logpi_derivatives(log_pi)
        return _softmax_chain_rule(log_pi.exp(), grad_logpi, h).numpy()

    def logpi_derivatives(self, log_pi: Tensor) -> tuple[Tensor, Tensor]:
        """The gradient (K,) and Hessian (K, K) of L in the log-probabilities ``log_pi`` (K,), from each
        pair's first and second derivatives in its own winner's and loser's log-probabilities (a pair's
        loss reads only those two: the contract)."""
        i, j = torch.nonzero(self.w > 0, as_tuple=True)  # (E,) each
        w = self.w[i, j]
        a, b = log_pi[i].detach().clone().requires_grad_(True), log_pi[j].detach().clone().requires_grad_(True)
        values = self.objective(PairScores(a, b, self.log_ref[i], self.log_ref[j], self.lengths[i],
                                           self.lengths[j]), self.beta)  # (E,)
        ga, gb = torch.autograd.grad(values.sum(), (a, b), create_graph=True)

        def second(g, wrt):  # elementwise d g_e / d wrt_e; zeros where g does not depend on it
            if not g.requires_grad:
                return [torch.zeros_like(a) for _ in wrt]
            out = torch.autograd.grad(g.sum(), wrt, retain_graph=True, allow_unused=True)
            return [torch.zeros_like(a) if d is None else d for d in out]

        haa, hab = second(ga, (a, b))
        (hbb,) = second(gb, (b,))
        k = len(log_pi)
        grad_logpi = torch.zeros(k, dtype=torch.float64).index_add_(0, i, w * ga.detach()).index_add_(
            0, j, w * gb.detach())  # (K,)
        h = torch.zeros(k, k, dtype=torch.float64)
        h.index_put_((i, i), w * haa.detach(), accumulate=True)
        h.index_put_((j, j), w * hbb.detach(), accumulate=True)
        h.index_put_((i, j), w * hab.detach(), accumulate=True)
        h.index_put_((j, i), w * hab.detach(), accumulate=True)
        return grad_logpi, h

    def hessp(self, z: np.ndarray, p: np.ndarray) -> np.ndarray:
        zt = torch.as_tensor(z, dtype=torch.float64)
        _, hv = torch.autograd.functional.hvp(self.loss, zt, torch.as_tensor(p, dtype=torch.float64))
        return hv.numpy() + p.sum()


def _minimise(problem: _Prompt, z0: np.ndarray) -> np.ndarray:
    """Trust-region Newton from z0 to max |dL/dz| <= GRADIENT_TOLERANCE (or the iteration limit)."""
    k = len(z0)
    if k <= DENSE_LIMIT:
        kwargs = dict(hess=problem.hess, method="trust-exact")
    else:
        kwargs = dict(hessp=problem.hessp, method="trust-krylov")
    result = scipy.optimize.minimize(problem.fun, z0 - z0.mean(), jac=True,
                                     options={"gtol": GRADIENT_TOLERANCE, "maxiter": MAX_ITERATIONS}, **kwargs)
    z = result.x
    for _ in range(5):  # polish with plain Newton steps: trust-region methods may stop a little above gtol
        gradient = np.abs(problem.fun(z)[1]).max()
        if gradient <= GRADIENT_TOLERANCE:
            break
        candidate = z + _newton_step(problem, z)
        if not np.abs(problem.fun(candidate)[1]).max() < gradient:
            break
        z = candidate
    return z


def _newton_step(problem: _Prompt, z: np.ndarray) -> np.ndarray:
    """The Newton step of the gauged problem at z (least squares where the Hessian is singular)."""
    _, g = problem.fun(z)
    if len(z) <= DENSE_LIMIT:
        return -np.linalg.lstsq(problem.hess(z), g, rcond=None)[0]
    op = scipy.sparse.linalg.LinearOperator((len(z), len(z)), matvec=lambda p: problem.hessp(z, p))
    return -scipy.sparse.linalg.minres(op, g)[0]


def _runs_to_boundary(problem: _Prompt, z: np.ndarray) -> np.ndarray | None:
    """A point further along a ray where L keeps falling, or None when z is a minimiser.

    At a finite strict minimiser the Newton step is ~0 and L does not fall along it; where the
    infimum lies on the boundary the Newton step keeps a finite length (L decays like e^{-c t}
    along the ray) and L falls strictly at every multiple of it tried. Multiples where L is no
    longer a finite number in float64 (a probability that underflowed to 0) end the ray."""
    step = _newton_step(problem, z)
    base = problem.value(z)
    values, points = [base], [z]
    for t in DESCENT_RAY:
        value = problem.value(z + t * step)
        if not np.isfinite(value) or not _derivatives_finite(problem, z + t * step):
            break
        values.append(value)
        points.append(z + t * step)
    noise = 1e-14 * (1.0 + abs(base))  # float64 rounding of a sum of many terms
    falling = len(values) >= 3 and all(b <= a + noise for a, b in zip(values, values[1:], strict=False))
    drop = base - values[-1]
    if falling and drop > 1e-12 * (1.0 + abs(base)) or falling and drop > 1e-6 * abs(base) > 0:
        return points[-1]
    return None


def _derivatives_finite(problem: _Prompt, z: np.ndarray) -> bool:
    """Whether the gradient and the Hessian (or a Hessian-vector product) are finite at z."""
    second = problem.hess(z) if len(z) <= DENSE_LIMIT else problem.hessp(z, np.ones_like(z))
    return bool(np.all(np.isfinite(problem.grad(z))) and np.all(np.isfinite(second)))


def _solve_prompt(problem: _Prompt, z0: np.ndarray, kink_search: bool = True) -> dict:
    """Minimise from z0; follow the boundary ray where there is one; search a kink where Newton stops
    with a large gradient (``kink_search``). Returns z, the value, the residual, and (when the infimum
    is on the boundary) the responses that keep mass in the limit."""
    z = _minimise(problem, z0)
    first = torch.log_softmax(torch.as_tensor(z), 0).numpy()
    on_boundary = False
    for _ in range(BOUNDARY_ROUNDS):
        further = _runs_to_boundary(problem, z)
        if further is None:
            break
        on_boundary = True
        z = _minimise(problem, further)
    log_pi = torch.log_softmax(torch.as_tensor(z), 0).numpy()
    out = {"z": z, "value": problem.value(z), "residual": float(np.abs(problem.grad(z)).max()),
           "finite": not on_boundary, "support": None}
    if not on_boundary and out["residual"] > CERTIFIED and kink_search:  # a kink: no gradient vanishes
        kinked = _kinked(problem, z)
        if kinked is not None and kinked["value"] <= out["value"] + 1e-12 * (1.0 + abs(out["value"])):
            return kinked
    if on_boundary:
        kept = (log_pi > first - VANISHED_DROP) & (log_pi > np.log(1e-12))
        out["support"] = [int(i) for i in np.flatnonzero(kept)] or [int(np.argmax(log_pi))]
    return out


# ------------------------------------------------------------------ kinks at the reference


class _Pinned(_Prompt):
    """The prompt's L with the responses of ``pinned`` held at their reference probability (log-ratio
    0, where anchor terms such as max(0, -h_w) have their kink); the others share the remaining mass
    as a softmax of their own logits y."""

    def __init__(self, base: _Prompt, pinned: np.ndarray):
        self.__dict__.update(base.__dict__)
        self.pinned = torch.as_tensor(pinned)
        self.rest = float(torch.log1p(-self.log_ref[self.pinned].exp().sum()))  # log of the unpinned mass

    def log_policy(self, y: Tensor) -> Tensor:
        log_pi = self.log_ref.clone()
        log_pi[~self.pinned] = self.rest + torch.log_softmax(y, dim=0)
        return log_pi  # (K,)

    def loss(self, y: Tensor) -> Tensor:
        return _pair_terms(self.objective, self.w, self.log_policy(y), self.log_ref, self.lengths, self.beta)

    def hessian(self, y: np.ndarray) -> np.ndarray:
        """The Hessian of L in y: the free responses' log pi = rest + log_softmax(y) is a softmax chart of
        its own, so the same chain rule applies to the free block of L's derivatives in log pi."""
        log_pi = self.log_policy(torch.as_tensor(y, dtype=torch.float64))
        grad_logpi, h = self.logpi_derivatives(log_pi)
        free = ~self.pinned
        q = torch.softmax(torch.as_tensor(y, dtype=torch.float64), dim=0)  # the free responses' shares
        return _softmax_chain_rule(q, grad_logpi[free], h[free][:, free]).numpy()


def _softmax_chain_rule(pi: Tensor, grad_logpi: Tensor, h: Tensor) -> Tensor:
    """The Hessian in logits z of a function of log pi = log_softmax(z) (+ a constant), from its gradient
    G (K,) and Hessian H (K, K) in log pi: ``J^T H J - (sum G) (diag(pi) - pi pi^T)``, ``J = I - 1 pi^T``
    (d log pi_k / d z_m = delta_km - pi_m; d^2 log pi_k / dz^2 = -(diag(pi) - pi pi^T) for every k)."""
    jac = torch.eye(len(pi), dtype=torch.float64) - pi[None, :]  # (K, K)
    return jac.T @ h @ jac - grad_logpi.sum() * (torch.diag(pi) - torch.outer(pi, pi))


def _richardson(quotient: Callable[[float], float], step: float) -> float:
    """``2 q(step / 2) - q(step)``: a one-sided difference quotient q(t) with its O(t) error removed."""
    return 2.0 * quotient(step / 2) - quotient(step)


def _one_sided_partials(problem: _Prompt, log_pi: np.ndarray, step: float = 1e-6) -> tuple[np.ndarray, np.ndarray]:
    """L's one-sided partial derivatives in each log-probability at ``log_pi`` (K,): ``up[k]`` as
    log pi_k rises, ``down[k]`` as it falls, by Richardson-extrapolated one-sided differences (error
    O(step^2)); 4K evaluations of L. Where L is smooth in log pi_k the two agree."""
    base = problem.value_at(log_pi)

    def difference(k: int, t: float) -> float:  # (L(log pi + t e_k) - L(log pi)) / t, t of either sign
        moved = log_pi.copy()
        moved[k] += t
        return (problem.value_at(moved) - base) / t

    k = len(log_pi)
    up = np.array([_richardson(lambda t, i=i: difference(i, t), step) for i in range(k)])
    down = np.array([_richardson(lambda t, i=i: difference(i, t), -step) for i in range(k)])
    return up, down


def _transfer_slopes(problem: _Prompt, log_pi: np.ndarray) -> np.ndarray:
    """One-sided derivatives (K, K) of L when mass ``t pi_j`` moves from response j to response i
    (t -> 0+); the diagonal (no move) is +inf, so that it is never the steepest.

    The move raises log pi_i at rate pi_j / pi_i and lowers log pi_j at rate 1. A kink that is a
    function of one response's log-ratio (an anchor such as max(0, -h_w), Pal et al. 2024) composed
    into smooth terms makes L's directional derivative the sum of one-sided partials along each
    coordinate, so ``slope[i, j] = (pi_j / pi_i) up_i - down_j``: 4K evaluations of L instead of a
    difference quotient per transfer (4K^2). The steepest transfer it finds is then measured directly
    (:func:`_measured_slope`), so a kink of another shape is caught rather than trusted."""
    pi = np.exp(log_pi)
    up, down = _one_sided_partials(problem, log_pi)
    slopes = np.outer(up / pi, pi) - down[None, :]
    np.fill_diagonal(slopes, np.inf)
    return slopes


def _measured_slope(problem: _Prompt, log_pi: np.ndarray, i: int, j: int, step: float = 1e-6) -> float:
    """The one-sided derivative of L along the transfer of mass ``t pi_j`` from j to i, measured by
    Richardson-extrapolated forward differences."""
    pi, base = np.exp(log_pi), problem.value_at(log_pi)

    def slope(t):
        moved = pi.copy()
        moved[i], moved[j] = pi[i] + t * pi[j], pi[j] * (1.0 - t)
        return (problem.value_at(np.log(moved)) - base) / t

    return _richardson(slope, step)


def _kinked(problem: _Prompt, z: np.ndarray) -> dict | None:
    """Where Newton stopped with a large gradient next to log-ratios of 0: an active-set solve with
    those responses pinned at the reference, releasing any pinned response that a transfer of mass
    can still improve. Returns the answer with its certificate (the largest of the free gradient and
    the steepest descent over all transfers of mass), or None when it does not certify."""
    h = torch.log_softmax(torch.as_tensor(z), 0).numpy() - problem.log_ref.numpy()
    pinned = np.abs(h) < KINK_BAND
    for _ in range(3 * len(z)):
        if pinned.all():
            log_pi, free_gradient = problem.log_ref.numpy(), 0.0
        else:
            reduced = _Pinned(problem, pinned)
            y = _minimise(reduced, h[~pinned] + problem.log_ref.numpy()[~pinned])
            with torch.no_grad():
                log_pi = reduced.log_policy(torch.as_tensor(y)).numpy()
            free_gradient = float(np.abs(reduced.grad(y)).max())
        h = log_pi - problem.log_ref.numpy()
        landed = ~pinned & (np.abs(h) < KINK_BAND)  # free responses that stopped at a kink of their own
        if free_gradient > CERTIFIED and landed.any():
            pinned |= landed
            continue
        slopes = _transfer_slopes(problem, log_pi)
        i, j = np.unravel_index(int(slopes.argmin()), slopes.shape)  # the steepest transfer: j -> i
        measured = _measured_slope(problem, log_pi, i, j)
        if abs(measured - slopes[i, j]) > SLOPE_AGREEMENT * (1.0 + abs(measured)):
            return None  # a kink that is not a function of one log-ratio: the partials do not add up
        descent = -min(0.0, slopes.min(), measured)
        if descent <= CERTIFIED and free_gradient <= CERTIFIED:
            z_out = log_pi - log_pi.mean()
            return {"z": z_out, "value": problem.value(z_out), "residual": max(free_gradient, descent),
                    "finite": True, "support": None}
        if not (pinned[i] or pinned[j]):
            return None
        pinned[i] = pinned[j] = False
        h[i], h[j] = h[i] + 10 * KINK_BAND, h[j] - 10 * KINK_BAND  # start off the kink, on the descent side
    return None


def _starts(log_ref: np.ndarray, n: int, seed: int) -> list[np.ndarray]:
    rng = np.random.default_rng(seed)
    return [log_ref.copy()] + [log_ref + rng.standard_normal(len(log_ref)) for _ in range(n - 1)]


# ------------------------------------------------------------------ closed forms


def divergence_optimum(ratio_link: Callable[[Tensor], Tensor], reference: np.ndarray, rewards: np.ndarray,
                       *, beta: float) -> np.ndarray | None:
    """pi* of a divergence-constrained objective on Bradley–Terry preferences: ``f'(pi_i / ref_i) =
    r_i / beta + c`` with c such that pi sums to 1 (Wang et al., Beyond Reverse KL, 2023).

    ``ratio_link`` is f' (increasing: f strictly convex), a torch function of u = pi / ref.
    ``reference``, ``rewards``: (K,). Returns pi (K,), or None where no c puts every u in
    (e^-60, e^60) (then there is no interior solution to report)."""
    link = lambda t: float(ratio_link(torch.tensor(np.exp(t), dtype=torch.float64)))  # noqa: E731  f'(e^t)
    low_t, high_t = -60.0, 60.0
    low, high = link(low_t), link(high_t)

    def log_ratio(target: float) -> float:  # t with f'(e^t) = target, clipped to the bracket
        if target <= low:
            return low_t
        if target >= high:
            return high_t
        return scipy.optimize.brentq(lambda t: link(t) - target, low_t, high_t, xtol=1e-14, rtol=1e-15)

    s = np.asarray(rewards, dtype=np.float64) / beta
    # c found through the top response's log-ratio t_top in [-60, 60] (c = f'(e^t_top) - max s): the mass
    # grows with t_top from below 1 (every ratio at e^-60) to above 1 (the top one at e^60)
    ratios = lambda t_top: np.array([log_ratio(v + link(t_top) - s.max()) for v in s])  # noqa: E731
    t_top = scipy.optimize.brentq(lambda t: float(np.sum(reference * np.exp(ratios(t)))) - 1.0, low_t, high_t,
                                  xtol=1e-14, rtol=4 * np.finfo(float).eps, maxiter=500)
    t = ratios(t_top)
    if np.any(t <= low_t) or np.any(t >= high_t):
        return None
    pi = reference * np.exp(t)
    return pi / pi.sum()


def _alpha_link(u: Tensor, alpha: float = 0.5) -> Tensor:
    return (1.0 - u ** (-alpha)) / alpha


def _chi_link(u: Tensor, clip: float | None = None) -> Tensor | None:
    return None if clip is not None else u + torch.log(u)


# f' of the registered divergence-family members (polopt.losses.pair), by function name; each
# takes the member's keyword parameters. chi-PO's link u + log u (Huang et al. 2024) is the same
# family; its clipped form is not (the closed form holds only without clipping).
RATIO_LINKS: dict[str, Callable[..., Tensor | None]] = {
    "divergence_reverse_kl": lambda u: torch.log(u) + 1.0,  # f(u) = u log u
    "divergence_forward_kl": lambda u: -1.0 / u,  # f(u) = -log u
    "divergence_jensen_shannon": lambda u: torch.log(2.0 * u / (1.0 + u)),  # f(u) = u log u - (1+u) log((1+u)/2)
    "divergence_alpha": _alpha_link,
    "chi_squared_link": _chi_link,
}


def ratio_link(objective) -> Callable[[Tensor], Tensor] | None:
    """The objective's f' as a function of u = pi / pi_ref, where it belongs to the divergence family:
    its own ``ratio_link`` attribute, or the link of a registered member; else None."""
    own = getattr(objective, "ratio_link", None)
    if own is not None:
        return own
    fn, params = getattr(objective, "fn", None), getattr(objective, "params", {})
    link = RATIO_LINKS.get(getattr(fn, "__name__", ""))
    if link is None or getattr(fn, "__module__", "") != "polopt.losses.pair":
        return None
    if link(torch.ones(1, dtype=torch.float64), **params) is None:
        return None
    return lambda u: link(u, **params)


def _closed_form(objective, weights, reference, rewards, beta, population) -> np.ndarray | None:
    link = ratio_link(objective)
    if link is None or rewards is None or not population:
        return None
    if not np.all(weights + np.swapaxes(weights, 1, 2) + np.eye(weights.shape[1]) > 0):
        return None  # the logistic terms reach their minima only where every pair is weighted
    rows = [divergence_optimum(link, reference[x], rewards[x], beta=beta) for x in range(len(reference))]
    return None if any(r is None for r in rows) else np.stack(rows)


# ------------------------------------------------------------------ the solver


def solve_pairs(objective: PairObjective, weights: np.ndarray, reference: np.ndarray, lengths: np.ndarray, *,
                beta: float, rewards: np.ndarray | None = None, population: bool = False, starts: int = STARTS,
                seed: int = 0) -> Optimum:
    """The exact optimum of a pair objective's population loss (see the module docstring).

    Args:
        objective: ``objective(pair, beta) -> (B,)``.
        weights: (X, K, K) win weights (label smoothing already applied).
        reference: (X, K) pi_ref; lengths: (X, K) tokens per response.
        rewards: (X, K) Bradley–Terry rewards, for the divergence family's closed form only.
        population: whether ``weights`` are the population weights of those rewards.
        starts: seeded starts per prompt (the first is the reference).

    Returns an :class:`toy_tasks.exact.margin.Optimum` whose ``logratios`` are log pi* - log pi_ref (X, K)
    (one component per prompt: only a constant shift per prompt is free) and whose ``residual`` is
    the certificate max |dL/dz|.
    """
    weights, reference, lengths = (np.asarray(a, dtype=np.float64) for a in (weights, reference, lengths))
    n_prompts, k = reference.shape
    log_ref = np.log(reference)
    problems = [_Prompt(objective, weights[x], log_ref[x], lengths[x], beta) for x in range(n_prompts)]
    components = [np.zeros(k, dtype=int)] * n_prompts
    closed = _closed_form(objective, weights, reference, rewards, beta, population)
    if closed is not None:  # used where its certificate holds
        residual = max(float(np.abs(p.grad(np.log(closed[x]))).max()) for x, p in enumerate(problems))
        if residual <= CLOSED_FORM_TOLERANCE:
            h = np.log(closed) - log_ref
            value = sum(p.value(np.log(closed[x])) for x, p in enumerate(problems))
            return Optimum(True, h - h.mean(axis=1, keepdims=True), value,
                           "closed form f'(pi / pi_ref) = r / beta + c (Wang et al. 2023), certified by its residual",
                           residual, True, None, components)
    z = np.zeros((n_prompts, k))
    value, residual, finite, unique, support, notes = 0.0, 0.0, True, True, [], []
    n_starts = starts if k <= DENSE_LIMIT else min(starts, 2)
    # a large or kinked problem takes minutes: a bar appears once the solve has run for SOLVE_BAR_DELAY s
    bar = tqdm(total=n_prompts * n_starts, desc=f"exact optimum ({k} responses per prompt)", unit="start",
               delay=SOLVE_BAR_DELAY, leave=False)
    for x, problem in enumerate(problems):
        runs = []
        for start, z0 in enumerate(_starts(log_ref[x], n_starts, seed + x)):
            # above KINK_LIMIT responses only the reference start searches a kink (the anchor's kink lies there)
            runs.append(_solve_prompt(problem, z0, kink_search=k <= KINK_LIMIT or start == 0))
            bar.update()
        certified = [r for r in runs if r["residual"] <= CERTIFIED] or runs  # a stuck start does not count
        runs = certified
        best = min(runs, key=lambda r: r["value"])
        value += best["value"]
        z[x], residual = best["z"], max(residual, best["residual"])
        finite &= best["finite"]
        support.append(best["support"] if not best["finite"] else list(range(k)))
        unique &= _agree(runs, best, notes, x)
    bar.close()
    if not finite:
        return Optimum(False, None, value, "no finite optimum: the infimum lies on the simplex's boundary "
                       "(trust-region Newton in the softmax logits, continued along the descent ray)",
                       residual, False, support, components,
                       notes + [f"{_name(objective)}: some responses' probabilities fall to 0 in the limit; "
                                f"'limit_support' lists, per prompt, the responses that keep mass"])
    h = z - scipy.special.logsumexp(z, axis=1, keepdims=True) - log_ref
    scheme = "trust-exact" if k <= DENSE_LIMIT else "trust-krylov"
    method = (f"trust-region Newton in the softmax logits (scipy {scheme}, torch autograd float64), "
              f"{n_starts} seeded starts, gradient tolerance {GRADIENT_TOLERANCE:g}")
    if residual > CERTIFIED:
        search = (f"above {KINK_LIMIT} responses per prompt (this task has {k}) only the reference start searches a "
                  "kink, and it did not certify" if k > KINK_LIMIT else "the kink search did not certify it either")
        notes.append(f"not certified: the gradient at the answer is {residual:.3g} (> {CERTIFIED:g}); the objective "
                     f"may not be differentiable there (a max(0, .) term; {search}), or the solve stopped early; "
                     "reached_optimum is null")
    return Optimum(True, h - h.mean(axis=1, keepdims=True), value, method, residual, unique, None, components, notes,
                   certified=residual <= CERTIFIED)


def _agree(runs: list[dict], best: dict, notes: list[str], x: int) -> bool:
    """Whether every start reached the same policy; notes say how they differ."""
    pis = [scipy.special.softmax(r["z"]) for r in runs if r["finite"] == best["finite"]]
    spread = max(0.5 * np.abs(p - scipy.special.softmax(best["z"])).sum() for p in pis)
    values = [r["value"] for r in runs]
    if max(values) - best["value"] > 1e-9 * (1.0 + abs(best["value"])):
        notes.append(f"prompt {x}: the starts reached different values ({min(values):.10g} to {max(values):.10g}): "
                     "a non-convex objective; the lowest is reported")
        return False
    if best["finite"] and spread > SAME_POLICY_TV:
        notes.append(f"prompt {x}: starts reached policies up to TV {spread:.3g} apart at the same value: "
                     "the minimiser is not unique; compare loss values")
        return False
    return True


def exact_optimum(objective, weights: np.ndarray, *, task, beta: float, population: bool) -> Optimum:
    """The optimum of ``objective`` (a margin loss or a pair objective) on ``task``'s win weights
    ``weights``: margin losses through :func:`toy_tasks.exact.margin.solve`, unchanged; pair objectives
    through :func:`solve_pairs`."""
    margin = margin_of(objective)
    if margin is not None:
        return solve(margin, weights, beta=beta, rewards=task.rewards, sampling=task.sampling,
                     preference=task.preference, population=population)
    return solve_pairs(objective, weights, task.reference, task.lengths, beta=beta, rewards=task.rewards,
                       population=population)


def _name(objective) -> str:
    return getattr(objective, "name", None) or getattr(objective, "__name__", type(objective).__name__)
