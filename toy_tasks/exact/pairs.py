"""The exact optimum of any pair objective on a finite task, with a certificate.

A *pair objective* is a callable ``objective(pair, beta) -> Tensor`` of per-pair losses, shape (B,),
where ``pair`` is a :class:`polopt.losses.pair.PairScores` (winner and loser log-probabilities under
the policy and the reference, and their lengths). On a finite task with win weights W (X, K, K),
reference pi_ref and lengths n, its population loss over the simplex is

    L(pi) = sum_x sum_{i != j} W[x,i,j] ell(log pi_xi, log pi_xj, log ref_xi, log ref_xj, n_xi, n_xj).

This module minimises L in float64:

- a margin loss f (a :class:`polopt.losses.margin.MarginLoss`) keeps the solver of :mod:`toy_tasks.exact.margin` (closed
  forms, linear programme, Newton in the log-ratios, Ford's existence test): it is the special case
  ``ell = f(beta ((w - ref_w) - (l - ref_l)))``, and :func:`exact_optimum` hands it over unchanged.
- any other objective: pi = softmax(z) per prompt, a Newton solve in the logits z
  (:mod:`toy_tasks.exact.newton`: Cholesky steps capped in length, Armijo line search), the gradient and
  Hessian assembled in one pass from every pair's derivatives in its two log-probabilities (in closed
  (K, K) formulas from a built-in's per-response scores, :mod:`toy_tasks.exact.scores`; by torch autograd
  over the whole batch of pairs for any other objective; float64) and the chain rule through log-softmax
  (:mod:`toy_tasks.exact.prompt`), from several seeded starts (the reference and random logits) to
  detect a non-unique minimiser or distinct local minima.
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
- kinks: where Newton stops with a large gradient next to log-ratios of 0 (DPO-Positive's anchor), the
  active-set search of :mod:`toy_tasks.exact.kinks` from every start.

The solver that stood here before (scipy's trust region, autograd per call) is kept unchanged in
:mod:`toy_tasks.exact.landed.pairs`; tests and ``bench/exact_solve.py`` hold this one to it.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import scipy.optimize
import scipy.special
import torch
from tqdm.auto import tqdm

from polopt.losses.margin import MarginLoss
from polopt.losses.pair import PairLoss, PairScores, as_pair_loss
from polopt.losses.reduce import per_pair_losses
from toy_tasks.exact import convexity, kinks, scores
from toy_tasks.exact.kinks import KINK_BAND, SLOPE_AGREEMENT  # noqa: F401  (part of this module's interface)
from toy_tasks.exact.margin import Optimum, population_loss, solve
from toy_tasks.exact.newton import newton_step
from toy_tasks.exact.prompt import Chart, PromptLoss, minimise_chart, objective_name

Tensor = torch.Tensor

GRADIENT_TOLERANCE = 1e-10  # stop when max |dL/dz| falls below this
CLOSED_FORM_TOLERANCE = 1e-9  # a closed form is used when its gradient is this small
CERTIFIED = 1e-7  # an answer whose gradient is larger is reported as not certified
MAX_ITERATIONS = 300  # Newton iterations per solve: smooth problems need tens; a kink stalls it sooner
KINK_STALL = 6  # the first Newton solve hands over to the kink search once this many steps were refused since
#                 its smallest gradient last halved (circling a kink); a smooth answer found there is polished
PATIENCE = 25  # iterations without halving the smallest gradient before a solve gives up
BISECTIONS = 64  # halvings of the bracket [-60, 60] of a closed form's log-ratio: below float64's spacing
AFFINE_PREMISE = " (a logistic link of affine scores; KKT on sum pi <= 1)"  # why convexity holds, in a method
STARTS = 3  # seeded starts per prompt: the reference, then random logits
SOLVE_BAR_DELAY = 3.0  # seconds before the solve shows a progress bar (quick solves stay silent)
SAME_POLICY_TV = 1e-6  # starts whose policies differ by more than this (TV) make the optimum non-unique
DESCENT_RAY = (1.0, 4.0, 16.0, 64.0, 256.0)  # multiples of the final Newton step tried along the boundary ray
BOUNDARY_ROUNDS = 4  # continuations along the ray before the infimum is reported
VANISHED_DROP = 2.0  # a response whose log-probability fell by more than this while continuing has no mass in the limit


def margin_of(objective) -> MarginLoss | None:
    """The margin loss f behind ``objective`` (a :class:`polopt.losses.margin.MarginLoss`, or a pair objective
    made from one by :func:`polopt.losses.pair.as_pair_loss`), else None."""
    if isinstance(objective, MarginLoss):
        return objective
    margin = getattr(objective, "margin", None)
    return margin if isinstance(margin, MarginLoss) else None


def is_margin_loss(objective) -> bool:
    """Whether ``objective`` is a margin loss f (solved by :mod:`toy_tasks.exact.margin`)."""
    return margin_of(objective) is not None


def margin_objective(loss: MarginLoss | Callable[[Tensor], Tensor]) -> PairLoss:
    """A margin loss f as an opaque pair loss ``ell = f(beta ((w - ref_w) - (l - ref_l)))`` (docs/maths.md):
    :func:`polopt.losses.pair.as_pair_loss` with the margin forgotten, so that the solver takes the
    Newton path of any pair loss instead of the margin solver (the tests compare the two)."""
    pair_loss = as_pair_loss(loss)
    return PairLoss(pair_loss.name, pair_loss.fn, pair_loss.params, pair_loss.source)


# ------------------------------------------------------------------ the population loss


def _pair_terms(objective: PairLoss, w: Tensor, log_pi: Tensor, log_ref: Tensor, lengths: Tensor,
                beta: float) -> Tensor:
    """``sum_{i != j} W[i,j] ell(...)`` of one prompt (or all prompts: leading dimension X), a scalar."""
    index = torch.nonzero(w > 0, as_tuple=True)  # the weighted ordered pairs, each (E,)
    *lead, i, j = index
    pair = PairScores(winner=log_pi[(*lead, i)], loser=log_pi[(*lead, j)],
                      ref_winner=log_ref[(*lead, i)], ref_loser=log_ref[(*lead, j)],
                      len_winner=lengths[(*lead, i)], len_loser=lengths[(*lead, j)])  # each (E,)
    return (w[index] * per_pair_losses(objective, pair, beta=beta)).sum()  # (E,) weights times (E,) losses


def pair_population_loss(objective: PairLoss, weights: np.ndarray, policy: np.ndarray,
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


def _Prompt(objective: PairLoss, w: np.ndarray, log_ref: np.ndarray, lengths: np.ndarray,  # noqa: N802
            beta: float) -> Chart:
    """L of one prompt in all its softmax logits z (K,): :class:`toy_tasks.exact.prompt.Chart` with no
    response pinned (the name the landed solver gave it)."""
    return PromptLoss(objective, w, log_ref, lengths, beta).chart()


class _Landed:
    """A problem with the landed solver's interface (``fun``: the gauged value and gradient, ``hess``, ``value``,
    ``grad``; e.g. the group objectives' population of :mod:`toy_tasks.exact.groups`) as this module's Newton
    reads a :class:`toy_tasks.exact.prompt.Chart`."""

    def __init__(self, problem):
        self.problem = problem

    def gauged_value(self, z: np.ndarray) -> float:
        return float(self.problem.fun(z)[0])

    def gauged_derivatives(self, z: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        value, grad = self.problem.fun(z)
        return float(value), np.asarray(grad), np.asarray(self.problem.hess(z))

    def value(self, z: np.ndarray) -> float:
        return float(self.problem.value(z))

    def grad(self, z: np.ndarray) -> np.ndarray:
        return np.asarray(self.problem.grad(z))

    def derivatives(self, z: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        return self.value(z), self.grad(z), np.asarray(self.problem.hess(z))


def _as_chart(problem) -> Chart | _Landed:
    return problem if hasattr(problem, "gauged_derivatives") else _Landed(problem)


def _minimise(chart: Chart, z0: np.ndarray, stalled: int | None = None) -> np.ndarray:
    """Newton from z0 to max |dL/dz| <= GRADIENT_TOLERANCE (or a stall, or the iteration limit)."""
    return minimise_chart(chart, z0, tol=GRADIENT_TOLERANCE, max_iterations=MAX_ITERATIONS, patience=PATIENCE,
                          stalled=stalled).x


def _runs_to_boundary(chart: Chart, z: np.ndarray) -> np.ndarray | None:
    """A point further along a ray where L keeps falling, or None when z is a minimiser.

    At a finite strict minimiser the Newton step is ~0 and L does not fall along it; where the
    infimum lies on the boundary the Newton step keeps a finite length (L decays like e^{-c t}
    along the ray) and L falls strictly at every multiple of it tried. Multiples where L or its
    derivatives are no longer finite numbers in float64 (a probability that underflowed to 0) end the
    ray (the derivatives are checked only where the drop could count: at a minimiser none are)."""
    _, grad, hess = chart.gauged_derivatives(z)
    step = newton_step(hess, grad)
    base = chart.value(z)
    values, points = [base], [z]
    for t in DESCENT_RAY:
        value = chart.value(z + t * step)
        if not np.isfinite(value):
            break
        values.append(value)
        points.append(z + t * step)
    noise = 1e-14 * (1.0 + abs(base))  # float64 rounding of a sum of many terms
    falling = 1 + next((n for n, (a, b) in enumerate(zip(values, values[1:], strict=False)) if b > a + noise),
                       len(values) - 1)  # the longest prefix along which L falls
    threshold = min(1e-12 * (1.0 + abs(base)), 1e-6 * abs(base) if base != 0 else np.inf)
    if base - min(values[:falling]) <= threshold:
        return None
    scan = range(1, min(len(values), falling + 1))  # up to the first rise: a later end cannot shorten the ray more
    kept = next((n for n in scan if not _derivatives_finite(chart, points[n])), len(values))
    if kept > falling or kept < 3:  # the ray, ended where the derivatives are not finite, rises or is too short
        return None
    return points[kept - 1] if base - values[kept - 1] > threshold else None


def _derivatives_finite(chart: Chart, z: np.ndarray) -> bool:
    """Whether the gradient and the Hessian are finite at z."""
    _, grad, hess = chart.derivatives(z)
    return bool(np.all(np.isfinite(grad)) and np.all(np.isfinite(hess)))


def _solve_prompt(chart: Chart, z0: np.ndarray, kink_search: bool = True) -> dict:
    """Minimise from z0; search a kink where Newton circles with a large gradient (``kink_search``, and the
    objective not known to be smooth: :attr:`toy_tasks.exact.scores.ScoreForm.smooth`),
    returning a kinked answer as it is and polishing a smooth one by Newton; follow the boundary ray
    where there is one. Returns z, the value, the residual, and (when the infimum is on the boundary)
    the responses that keep mass in the limit. ``chart``: a :class:`toy_tasks.exact.prompt.Chart`, or a problem
    with the landed solver's interface (see :class:`_Landed`)."""
    chart = _as_chart(chart)
    kink_search = kink_search and not getattr(getattr(chart, "prompt", None), "smooth", False)
    z = _minimise(chart, z0, stalled=KINK_STALL if kink_search else None)
    if kink_search and float(np.abs(chart.grad(z)).max()) > GRADIENT_TOLERANCE:
        kinked = _kinked(chart.prompt, z)
        if kinked is not None and not kinked.pop("smooth"):
            stopped = chart.value(z)
            if kinked["value"] <= stopped + 1e-12 * (1.0 + abs(stopped)):
                return kinked
        z = _minimise(chart, z if kinked is None else kinked["z"])
    first = torch.log_softmax(torch.as_tensor(z), 0).numpy()
    on_boundary = False
    for _ in range(BOUNDARY_ROUNDS):
        further = _runs_to_boundary(chart, z)
        if further is None:
            break
        on_boundary = True
        z = _minimise(chart, further)
    log_pi = torch.log_softmax(torch.as_tensor(z), 0).numpy()
    out = {"z": z, "value": chart.value(z), "residual": float(np.abs(chart.grad(z)).max()),
           "finite": not on_boundary, "support": None}
    if on_boundary:
        kept = (log_pi > first - VANISHED_DROP) & (log_pi > np.log(1e-12))
        out["support"] = [int(i) for i in np.flatnonzero(kept)] or [int(np.argmax(log_pi))]
    return out


def _kinked(prompt: PromptLoss, z: np.ndarray) -> dict | None:
    """Where Newton stopped with a large gradient next to log-ratios of 0: the active-set search of
    :mod:`toy_tasks.exact.kinks`, certified to :data:`CERTIFIED`, or None."""
    return kinks.search(prompt, z, tol=CERTIFIED, gradient_tol=GRADIENT_TOLERANCE, max_iterations=MAX_ITERATIONS)


def _starts(log_ref: np.ndarray, n: int, seed: int, first: np.ndarray | None = None) -> list[np.ndarray]:
    """The reference (or ``first``), then n - 1 seeded random logits around the reference."""
    rng = np.random.default_rng(seed)
    return [log_ref.copy() if first is None else first] + [log_ref + rng.standard_normal(len(log_ref))
                                                            for _ in range(n - 1)]


# ------------------------------------------------------------------ closed forms


def divergence_optimum(ratio_link: Callable[[Tensor], Tensor], reference: np.ndarray, rewards: np.ndarray,
                       *, beta: float) -> np.ndarray | None:
    """pi* of a divergence-constrained objective on Bradley–Terry preferences: ``f'(pi_i / ref_i) =
    r_i / beta + c`` with c such that pi sums to 1 (Wang et al., Beyond Reverse KL, 2023).

    ``ratio_link`` is f' (increasing: f strictly convex), a torch function of u = pi / ref; where it carries
    ``log_inverse`` (numpy: y -> log u of f'(u) = y, a built-in's :data:`LOG_INVERSES`), each log-ratio is read
    from it instead of a bisection.
    ``reference``, ``rewards``: (K,). Returns pi (K,), or None where no c puts every u in
    (e^-60, e^60) (then there is no interior solution to report)."""
    link = lambda t: ratio_link(torch.as_tensor(np.exp(t), dtype=torch.float64)).numpy()  # noqa: E731  f'(e^t)
    low_t, high_t = -60.0, 60.0
    low, high = float(link(np.array([low_t]))[0]), float(link(np.array([high_t]))[0])

    inverse = getattr(ratio_link, "log_inverse", None)  # t of f'(e^t) = y in closed form, where the member has one

    def log_ratios(targets: np.ndarray) -> np.ndarray:  # t with f'(e^t) = target, each clipped to the bracket
        if inverse is not None:
            with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                exact = np.clip(np.nan_to_num(inverse(targets), nan=high_t), low_t, high_t)
            return np.where(targets <= low, low_t, np.where(targets >= high, high_t, exact))
        below, above = np.full(len(targets), low_t), np.full(len(targets), high_t)
        for _ in range(BISECTIONS):  # f' is increasing: bisection on every target at once
            middle = 0.5 * (below + above)
            rising = link(middle) < targets
            below, above = np.where(rising, middle, below), np.where(rising, above, middle)
        return np.where(targets <= low, low_t, np.where(targets >= high, high_t, 0.5 * (below + above)))

    s = np.asarray(rewards, dtype=np.float64) / beta
    # c found through the top response's log-ratio t_top in [-60, 60] (c = f'(e^t_top) - max s): the mass
    # grows with t_top from below 1 (every ratio at e^-60) to above 1 (the top one at e^60)
    ratios = lambda t_top: log_ratios(s + float(link(np.array([t_top]))[0]) - s.max())  # noqa: E731
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


# log u solving f'(u) = y for the members whose f' inverts in closed form (numpy, elementwise; nan or inf
# outside f''s range, which the caller clips): reverse KL log u + 1 = y; forward KL -1/u = y; Jensen–Shannon
# log(2u / (1 + u)) = y, u = e^y / (2 - e^y); alpha (1 - u^-alpha) / alpha = y, u = (1 - alpha y)^(-1/alpha).
LOG_INVERSES: dict[str, Callable[..., np.ndarray]] = {
    "divergence_reverse_kl": lambda y: y - 1.0,
    "divergence_forward_kl": lambda y: -np.log(-y),
    "divergence_jensen_shannon": lambda y: y - np.log(2.0 - np.exp(y)),
    "divergence_alpha": lambda y, alpha=0.5: -np.log(1.0 - alpha * y) / alpha,
}


def ratio_link(objective) -> Callable[[Tensor], Tensor] | None:
    """The objective's f' as a function of u = pi / pi_ref, where it belongs to the divergence family:
    its own ``ratio_link`` attribute, or the link of a registered member (with its ``log_inverse`` where
    :data:`LOG_INVERSES` has one); else None."""
    own = getattr(objective, "ratio_link", None)
    if own is not None:
        return own
    fn, params = getattr(objective, "fn", None), getattr(objective, "params", {})
    link = RATIO_LINKS.get(getattr(fn, "__name__", ""))
    if link is None or getattr(fn, "__module__", "") != "polopt.losses.pair":
        return None
    if link(torch.ones(1, dtype=torch.float64), **params) is None:
        return None

    def bound(u: Tensor) -> Tensor:
        return link(u, **params)

    inverse = LOG_INVERSES.get(fn.__name__)
    if inverse is not None:
        bound.log_inverse = lambda y: inverse(y, **params)
    return bound


def _closed_form(objective, weights, reference, rewards, beta, population) -> np.ndarray | None:
    link = ratio_link(objective)
    if link is None or rewards is None or not population:
        return None
    if not np.all(weights + np.swapaxes(weights, 1, 2) + np.eye(weights.shape[1]) > 0):
        return None  # the logistic terms reach their minima only where every pair is weighted
    rows = [divergence_optimum(link, reference[x], rewards[x], beta=beta) for x in range(len(reference))]
    return None if any(r is None for r in rows) else np.stack(rows)


# ------------------------------------------------------------------ the solver


def solve_pairs(objective: PairLoss, weights: np.ndarray, reference: np.ndarray, lengths: np.ndarray, *,
                beta: float, rewards: np.ndarray | None = None, population: bool = False, starts: int = STARTS,
                seed: int = 0, warm: np.ndarray | None = None) -> Optimum:
    """The exact optimum of a pair objective's population loss (see the module docstring).

    Args:
        objective: ``objective(pair, beta) -> (B,)``.
        weights: (X, K, K) win weights (label smoothing already applied).
        reference: (X, K) pi_ref; lengths: (X, K) tokens per response.
        rewards: (X, K) Bradley–Terry rewards, for the divergence family's closed form only.
        population: whether ``weights`` are the population weights of those rewards.
        starts: seeded starts per prompt (the first is the reference).
        warm: (X, K) log-ratios to take as the first start instead of the reference (a warm start:
            the optimum at a nearby beta, see :func:`warm_start`); the seeded random starts stay.

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
    # a large or kinked problem takes a while: a bar appears once the solve has run for SOLVE_BAR_DELAY s
    bar = tqdm(total=n_prompts * starts, desc=f"exact optimum ({k} responses per prompt)", unit="start",
               delay=SOLVE_BAR_DELAY, leave=False)
    proofs = []
    for x, problem in enumerate(problems):
        first = None if warm is None else log_ref[x] + np.asarray(warm[x], dtype=np.float64)
        runs = []
        for z0 in _starts(log_ref[x], starts, seed + x, first=first):
            runs.append(_solve_prompt(problem, z0))
            bar.update()
            proof = _proved(problem, runs[0]) if len(runs) == 1 else None
            if proof is not None:  # the seeded starts would only repeat what the proof shows
                proofs.append(proof)
                bar.update(starts - 1)
                break
        runs = [r for r in runs if r["residual"] <= CERTIFIED] or runs  # a stuck start does not count
        best = min(runs, key=lambda r: r["value"])
        value += best["value"]
        z[x], residual = best["z"], max(residual, best["residual"])
        finite &= best["finite"]
        support.append(best["support"] if not best["finite"] else list(range(k)))
        unique &= _agree(runs, best, notes, x)
    bar.close()
    if not finite:
        return Optimum(False, None, value, "no finite optimum: the infimum lies on the simplex's boundary "
                       "(Newton in the softmax logits, continued along the descent ray)",
                       residual, False, support, components,
                       notes + [f"{_name(objective)}: some responses' probabilities fall to 0 in the limit; "
                                f"'limit_support' lists, per prompt, the responses that keep mass"])
    h = z - scipy.special.logsumexp(z, axis=1, keepdims=True) - log_ref
    how = "the objective's score form" if isinstance(problems[0].prompt.terms, scores.DenseTerms) else "torch autograd"
    method = (f"Newton in the softmax logits (Cholesky, Armijo line search; derivatives of all pairs at once, "
              f"{how}, float64), {starts_used(starts, len(proofs), n_prompts, AFFINE_PREMISE)}, gradient tolerance "
              f"{GRADIENT_TOLERANCE:g}")
    if residual > CERTIFIED:
        notes.append(f"not certified: the gradient at the answer is {residual:.3g} (> {CERTIFIED:g}); the objective "
                     "may not be differentiable there (a max(0, .) term; the kink search did not certify it either), "
                     "or the solve stopped early; reached_optimum is null")
    return Optimum(True, h - h.mean(axis=1, keepdims=True), value, method, residual, unique, None, components, notes,
                   certified=residual <= CERTIFIED)


def _proved(problem: Chart, run: dict) -> str | None:
    """Why the first start's answer ``run`` is the prompt's global and only minimiser
    (:func:`toy_tasks.exact.convexity.certificate`), where it is finite and certified; else None."""
    if not run["finite"] or run["residual"] > CERTIFIED or not hasattr(problem, "prompt"):
        return None
    return convexity.certificate(problem.prompt, torch.log_softmax(torch.as_tensor(run["z"]), 0).numpy(),
                                 tol=CERTIFIED)


def starts_used(starts: int, proved: int, n_prompts: int, why: str = "") -> str:
    """How many starts a solve took, in words (the pair and the group solver's ``method``): one where convexity
    proves the answer (``why``: the premise, in parentheses), else the seeded ones."""
    if proved == n_prompts:
        return f"one start per prompt, the answer global and unique by convexity in the log-probabilities{why}"
    if proved:
        return (f"{starts} seeded starts ({proved} of {n_prompts} prompts proved global and unique by convexity "
                "from one)")
    return f"{starts} seeded starts"


def warm_start(optimum: Optimum) -> np.ndarray | None:
    """The ``warm`` start of a solve at a nearby beta (or on a nearby task) from ``optimum``: its
    log-ratios (X, K), or None where it is not finite."""
    return optimum.logratios


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


_name = objective_name
