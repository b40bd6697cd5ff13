"""The exact optimum (or stationary point) of any group objective on a finite task, with a certificate.

A group objective ``ell(group, beta) -> (B,)`` on a population of weighted groups
(:class:`toy_tasks.finite.feedback.WeightedGroups`: groups b of prompt x_b, members m_b, feedback,
weight w_b) has the population loss over the simplex

    L(pi) = sum_b w_b ell(log pi[x_b, m_b], log ref[x_b, m_b], lengths, feedback_b)

with the whole population as one batch (so that a statistic of the batch, such as KTO's reference
point, is its population value). In the softmax chart pi_x = softmax(z_x):

- an objective without a stop-gradient: L is minimised per prompt (the groups of different prompts
  share nothing) by the pair solver's machinery, :mod:`toy_tasks.exact.pairs`: its trust-region
  Newton solve, its continuation along a descent ray to a boundary infimum, its seeded starts and
  its agreement test (non-unique minimisers, distinct local minima; where the first starts reach
  different values, :data:`NONCONVEX_STARTS` starts in all before the lowest is reported: a wider
  search, not a proof of global optimality). The certificate ``residual`` is max |dL/dz|, as for pairs.
- an objective that holds a statistic without gradient (``GroupObjective.stop_gradient``: KTO's
  reference point, BCO's reward shift): gradient descent does not minimise L; it stops where the
  gradient *with the detached part held at its current value* vanishes. That semi-gradient is what
  torch's autograd returns through ``.detach()``; its zero is found jointly over all prompts (the
  statistic couples them) by damped Newton steps on the semi-gradient with its Jacobian, from the
  same seeded starts. The answer is a stationary point, certified by the semi-gradient's residual
  and reported as such (``Optimum.method``; ``optimum_kind`` in summary.json), never as a minimiser.
"""

from __future__ import annotations

import functools

import numpy as np
import scipy.special
import torch

from polopt.losses.group_objective import GroupObjective, GroupScores
from polopt.losses.pair import PairLoss
from toy_tasks.exact import convexity
from toy_tasks.exact.margin import Optimum
from toy_tasks.exact.pairs import CERTIFIED, GRADIENT_TOLERANCE, STARTS, _agree, _solve_prompt, _starts, starts_used
from toy_tasks.exact.prompt import PromptLoss, softmax_chain_rule

Tensor = torch.Tensor
SEPARABLE_PROBE = 16  # groups whose losses are compared when one group's log-probabilities move
NEWTON_STEPS = 200  # damped Newton steps of a stationary-point solve from one start
NONCONVEX_STARTS = 16  # seeded starts in all once the first starts reach different values (a non-convex objective)
VANISHED = 1e-9  # a stationary point giving a response less probability than this lies on the simplex's boundary
CLOSED_FORM_TOLERANCE = 1e-9  # a closed form is the answer where max |dL/dz| there is at most this
# closed-form targets on the task's rewards r (X, K), by the objective's function name: listwise DPO's Plackett–Luce
# likelihood on rankings (pairs: G = 2) drawn from the Plackett–Luce model of r is maximised by beta h = r + c
CLOSED_FORMS = {"ranking_likelihood": lambda rewards, beta: rewards / beta}
STATIONARY = "stationary point"
MINIMISER = "minimiser"


class _Population:
    """L as a function of the logits z (X K,) of the prompts ``prompts`` of one population, with exact
    derivatives by autograd (float64). The gauge ``0.5 sum_x (sum_k z_xk)^2`` fixes each prompt's free
    shift without moving pi. Offers what the pair solver's per-prompt problem offers (``value``,
    ``grad``, ``fun``, ``hess``, ``hessp``), so that its minimiser runs on it unchanged."""

    def __init__(self, objective: GroupObjective, groups, log_ref: np.ndarray, lengths: np.ndarray, beta: float):
        self.objective, self.beta = objective, beta
        t = lambda a, dtype=torch.float64: torch.tensor(np.asarray(a), dtype=dtype)  # noqa: E731  (copies)
        self.shape = log_ref.shape  # (X, K)
        self.prompt = t(groups.prompt, torch.long)[:, None]  # (N, 1)
        self.members = t(groups.members, torch.long)  # (N, G)
        self.weight = t(groups.weight)  # (N,)
        self.feedback = {k: t(v, torch.long if k == "ranks" else torch.float64) for k, v in groups.feedback().items()}
        self.ref = t(log_ref)[self.prompt, self.members]  # (N, G)
        self.lengths = t(lengths)[self.prompt, self.members]  # (N, G)
        self.log_ref = t(log_ref).reshape(-1)

    def member_losses(self, logp: Tensor, rows: slice | None = None) -> Tensor:
        """Each group's loss at its members' log-probabilities ``logp`` (N, G) (or those of the groups ``rows``)."""
        rows = slice(None) if rows is None else rows
        group = GroupScores(logp, self.ref[rows], self.lengths[rows], torch.ones_like(logp, dtype=torch.bool),
                            weight=self.weight[rows], **{k: v[rows] for k, v in self.feedback.items()})
        return self.objective(group, self.beta)  # (N,)

    def loss_at(self, log_pi: Tensor) -> Tensor:
        """L at log-probabilities (X, K), a scalar."""
        return (self.weight * self.member_losses(log_pi[self.prompt, self.members])).sum()

    @functools.cached_property
    def separable(self) -> bool:
        """Whether each group's loss reads only its own members (no statistic of the batch, checked on the
        first groups: moving one group's log-probabilities leaves the others' losses as they were), so that
        its second derivatives come from G + 1 passes over the groups (:meth:`logpi_hessian`)."""
        if self.objective.stop_gradient:
            return False
        rows = slice(0, min(len(self.weight), SEPARABLE_PROBE))
        logp = self.ref[rows].clone()  # (n, G)
        with torch.no_grad():
            before = self.member_losses(logp, rows)
            for b in range(min(2, len(before))):
                moved = logp.clone()
                moved[b] -= torch.linspace(0.3, 0.7, logp.shape[1], dtype=logp.dtype)  # members apart, not together
                after = self.member_losses(moved, rows)
                others = torch.arange(len(before)) != b
                if not torch.equal(after[others], before[others]):
                    return False
        return True

    def logpi_hessian(self, log_pi: Tensor) -> tuple[float, Tensor, Tensor]:
        """L, its gradient (X K,) and Hessian (X K, X K) in the log-probabilities of a separable objective: the
        per-group derivatives in its G members from one backward pass and G more (the gradient of a sum of
        independent terms is each term's own), scattered onto the members' (prompt, response) indices."""
        n_flat = log_pi.numel()
        index = (self.prompt * self.shape[1] + self.members)  # (N, G): flat (prompt, response) of each member
        logp = log_pi[self.prompt, self.members].detach().clone().requires_grad_(True)  # (N, G)
        total = (self.weight * self.member_losses(logp)).sum()
        (grad,) = torch.autograd.grad(total, logp, create_graph=True)
        gradient = torch.zeros(n_flat, dtype=torch.float64).index_add_(0, index.reshape(-1), grad.detach().reshape(-1))
        hessian = torch.zeros(n_flat * n_flat, dtype=torch.float64)
        for m in range(logp.shape[1]):
            if not grad.requires_grad:
                break
            (second,) = torch.autograd.grad(grad[:, m].sum(), logp, retain_graph=True, allow_unused=True)
            if second is not None:  # (N, G): d2 L_b / d logp_bm d logp_bn
                hessian.index_add_(0, (index[:, m:m + 1] * n_flat + index).reshape(-1), second.reshape(-1))
        return float(total.detach()), gradient, hessian.view(n_flat, n_flat)

    def loss(self, z: Tensor) -> Tensor:
        return self.loss_at(torch.log_softmax(z.reshape(self.shape), dim=1))

    def _gauge(self, z: np.ndarray) -> np.ndarray:
        return np.repeat(z.reshape(self.shape).sum(1), self.shape[1])  # each prompt's sum, on its logits

    def value(self, z: np.ndarray) -> float:
        with torch.no_grad():
            return float(self.loss(torch.as_tensor(z, dtype=torch.float64)))

    def grad(self, z: np.ndarray) -> np.ndarray:
        """dL/dz (X K,): through a detached statistic, the gradient with it held fixed."""
        zt = torch.as_tensor(z, dtype=torch.float64).requires_grad_(True)
        (g,) = torch.autograd.grad(self.loss(zt), zt)
        return g.numpy()

    def fun(self, z: np.ndarray) -> tuple[float, np.ndarray]:
        gauge = z.reshape(self.shape).sum(1)
        return self.value(z) + 0.5 * float((gauge**2).sum()), self.grad(z) + self._gauge(z)

    def hess(self, z: np.ndarray) -> np.ndarray:
        """The Jacobian of :meth:`grad` plus the gauge's (a block of ones per prompt); symmetric (the
        Hessian) unless the objective detaches a statistic."""
        if self.separable:
            return self.gauged_derivatives(z)[2]
        zt = torch.as_tensor(z, dtype=torch.float64)
        jac = torch.autograd.functional.jacobian(lambda v: torch.autograd.grad(self.loss(v), v, create_graph=True)[0],
                                                 zt, vectorize=True)  # every row in one batched pass (torch.vmap)
        return jac.numpy() + np.kron(np.eye(self.shape[0]), np.ones((self.shape[1],) * 2))

    def gauged_value(self, z: np.ndarray) -> float:
        return self.fun(z)[0]

    def gauged_derivatives(self, z: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        """The gauged L, gradient and Hessian in z (what the pair solver's Newton reads): of a separable objective
        from one pass over the groups (:meth:`logpi_hessian`, then the softmax chain rule per prompt, the prompts
        sharing no group); else :meth:`fun` and :meth:`hess`."""
        if not self.separable:
            value, grad = self.fun(z)
            return value, grad, self.hess(z)
        log_pi = torch.log_softmax(torch.as_tensor(z, dtype=torch.float64).reshape(self.shape), dim=1)  # (X, K)
        value, grad, hess = self.logpi_hessian(log_pi)
        k, grads, blocks = self.shape[1], [], []
        for x in range(self.shape[0]):
            q, g = log_pi[x].exp(), grad[x * k:(x + 1) * k]
            grads.append(g - q * g.sum())
            blocks.append(softmax_chain_rule(q, g, hess[x * k:(x + 1) * k, x * k:(x + 1) * k].clone(), gauge=True))
        gauge = z.reshape(self.shape).sum(1)
        return (value + 0.5 * float((gauge**2).sum()), torch.cat(grads).numpy() + self._gauge(z),
                torch.block_diag(*blocks).numpy())

    def derivatives(self, z: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        return self.value(z), self.grad(z), self.hess(z) - np.kron(np.eye(self.shape[0]), np.ones((self.shape[1],) * 2))

    def hessp(self, z: np.ndarray, p: np.ndarray) -> np.ndarray:
        return self.hess(z) @ p


class _PairPrompt:
    """One prompt's population of a pairwise group objective on groups of two ranked members (pairs, or
    rankings of two), as the pair solver's problem: each group's loss is then its pair loss (at G = 2 the
    mean over a ranking's pairs is that one pair: :func:`polopt.losses.group_objective.ranked_pairs`), so L is
    ``sum W[i, j] ell(i, j)`` with W the groups' weights by (winner, loser), and the pair solver's chart
    (:class:`toy_tasks.exact.prompt.Chart`: its score form, or autograd over the pairs without the group
    machinery) gives the same values and derivatives several times faster. Offers what :func:`_solve_prompt`
    and :func:`toy_tasks.exact.convexity.group_certificate` read."""

    separable = True

    def __init__(self, objective: GroupObjective, chart, k: int):
        self.objective, self.chart, self.shape = objective, chart, (1, k)
        self.prompt = chart.prompt
        self.value, self.grad, self.gauged_value = chart.value, chart.grad, chart.gauged_value
        self.gauged_derivatives, self.derivatives = chart.gauged_derivatives, chart.derivatives

    def logpi_hessian(self, log_pi: Tensor) -> tuple[float, Tensor, Tensor]:
        """L, its gradient (K,) and Hessian (K, K) in the log-probabilities ``log_pi`` (1, K)."""
        return self.prompt.logpi_derivatives(log_pi.reshape(-1))


def _pair_prompt(objective: GroupObjective, groups, log_ref: np.ndarray, lengths: np.ndarray,
                 beta: float) -> _PairPrompt | None:
    """:class:`_PairPrompt` for the groups of one prompt (renumbered 0) where the objective is a pair function
    without a stop-gradient and every group is two members ranked apart; else None."""
    ranks = groups.feedback().get("ranks")
    if not objective.pairwise or objective.stop_gradient or ranks is None or groups.members.shape[1] != 2:
        return None
    if np.any(ranks[:, 0] == ranks[:, 1]):
        return None
    first_wins = ranks[:, 0] < ranks[:, 1]
    winner = np.where(first_wins, groups.members[:, 0], groups.members[:, 1])
    loser = np.where(first_wins, groups.members[:, 1], groups.members[:, 0])
    k = log_ref.shape[1]
    w = np.zeros((k, k))
    np.add.at(w, (winner, loser), groups.weight)
    pair_loss = PairLoss(objective.name, objective.fn, dict(objective.params), objective.source)  # its score form
    chart = PromptLoss(pair_loss, w, log_ref[0], lengths[0], beta).chart()
    return _PairPrompt(objective, chart, k)


def population_value(objective: GroupObjective, groups, h: np.ndarray, reference: np.ndarray, lengths: np.ndarray,
                     *, beta: float) -> float:
    """L at log-ratios h (X, K) (the policy pi ∝ pi_ref e^h)."""
    log_ref = np.log(reference)
    return _Population(objective, groups, log_ref, lengths, beta).value((log_ref + h).reshape(-1))


def _prompt_groups(groups, x: int):
    """The groups of prompt x, renumbered as the only prompt (0)."""
    keep = groups.prompt == x
    out = groups.take(keep, groups.weight[keep])
    return type(out)(out.kind, np.zeros(int(keep.sum()), dtype=np.int64), out.members, out.weight, **out.feedback())


def _interior_if_nothing_vanished(run: dict, k: int) -> dict:
    """A run the pair solver sent along a descent ray that kept every response's mass is a finite
    minimiser: at an optimal value of 0 (EXO's) float64 noise alone can make the ray look falling."""
    if not run["finite"] and run["support"] is not None and len(run["support"]) == k:
        return {**run, "finite": True, "support": None}
    return run


def _runs_from(problem: _Population, inits: list[np.ndarray]) -> list[dict]:
    """The pair solver's run (minimise, follow a boundary ray) from each start, kink search off."""
    k = problem.shape[1]
    return [_interior_if_nothing_vanished(_solve_prompt(problem, z0, kink_search=False), k) for z0 in inits]


def _proved(problem: _Population, run: dict) -> str | None:
    """Why the first start's answer is the prompt's global and only minimiser
    (:func:`toy_tasks.exact.convexity.group_certificate`), where it is finite and certified; else None."""
    if not run["finite"] or run["residual"] > CERTIFIED:
        return None
    return convexity.group_certificate(problem, run["z"], tol=CERTIFIED)


def _minimum(objective, groups, reference, lengths, beta, starts, seed) -> tuple[list[dict], list[str], bool, int]:
    """Per prompt: the pair solver's runs from seeded starts, or from the first alone where convexity proves its
    answer; (the best run per prompt, notes, unique, how many prompts were proved)."""
    best_runs, notes, unique, proofs = [], [], True, []
    log_ref = np.log(reference)
    for x in range(reference.shape[0]):
        own = _prompt_groups(groups, x)
        problem = (_pair_prompt(objective, own, log_ref[x:x + 1], lengths[x:x + 1], beta)
                   or _Population(objective, own, log_ref[x:x + 1], lengths[x:x + 1], beta))
        inits = _starts(log_ref[x], starts, seed + x)
        runs = _runs_from(problem, inits[:1])
        proof = _proved(problem, runs[0])
        if proof is not None:  # the seeded starts would only repeat what the proof shows
            best_runs.append(runs[0])
            proofs.append(proof)
            continue
        runs += _runs_from(problem, inits[1:])
        values = [r["value"] for r in runs]
        if max(values) - min(values) > 1e-9 * (1.0 + abs(min(values))):  # not convex: search wider before choosing
            runs += _runs_from(problem, _starts(log_ref[x], NONCONVEX_STARTS, seed + 1000 + x)[1:])
        runs = [r for r in runs if r["residual"] <= CERTIFIED] or runs  # a stuck start does not count
        best = min(runs, key=lambda r: r["value"])
        unique &= _agree(runs, best, notes, x)
        best_runs.append(best)
    return best_runs, notes, unique, len(proofs)


def _solve_or_least_squares(jacobian: np.ndarray, r: np.ndarray) -> np.ndarray:
    """``J^-1 r`` by an LU factorisation (torch.linalg.solve_ex), or the least-squares solution (numpy's lstsq,
    an SVD several times slower) where J is singular or the solve is not finite."""
    solution, info = torch.linalg.solve_ex(torch.as_tensor(jacobian), torch.as_tensor(r))
    if int(info) == 0 and bool(torch.isfinite(solution).all()):
        return solution.numpy()
    return np.linalg.lstsq(jacobian, r, rcond=None)[0]


def newton_on_field(problem, z: np.ndarray) -> dict:
    """Damped Newton on a field (``problem.grad``: the semi-gradient here, the expected update of
    ``method=group`` in :mod:`toy_tasks.methods.group_target`; plus the gauge) from z: each step solves
    with the Jacobian ``problem.hess`` (LU; least squares where singular) and is halved until the residual's
    norm falls. Returns z, the value and the residual max |field|."""
    def residual(v):
        return problem.grad(v) + problem._gauge(v)

    r = residual(z)
    for _ in range(NEWTON_STEPS):
        if np.abs(problem.grad(z)).max() <= GRADIENT_TOLERANCE:
            break
        step = -_solve_or_least_squares(problem.hess(z), r)
        t = 1.0
        while t > 1e-8:
            trial = residual(z + t * step)
            if np.all(np.isfinite(trial)) and np.linalg.norm(trial) < (1.0 - 1e-4 * t) * np.linalg.norm(r):
                break
            t *= 0.5
        if t <= 1e-8:
            break
        z, r = z + t * step, trial
    return {"z": z, "value": problem.value(z), "residual": float(np.abs(problem.grad(z)).max())}


def _stationary(objective, groups, reference, lengths, beta, starts, seed) -> tuple[dict, list[str], bool]:
    """The joint stationary point over all prompts from seeded starts; (the run of least residual among
    the certified ones, notes, unique)."""
    log_ref = np.log(reference)
    problem = _Population(objective, groups, log_ref, lengths, beta)
    rng = np.random.default_rng(seed)
    inits = [log_ref] + [log_ref + rng.standard_normal(log_ref.shape) for _ in range(starts - 1)]
    runs = [newton_on_field(problem, z0.reshape(-1)) for z0 in inits]
    certified = [r for r in runs if r["residual"] <= CERTIFIED]
    policy = lambda r: scipy.special.softmax(r["z"].reshape(log_ref.shape), axis=1)  # noqa: E731
    interior = [r for r in certified if policy(r).min() >= VANISHED]  # saturation near a face also zeroes it
    best = min(interior or certified or runs, key=lambda r: r["residual"])
    notes, unique = [], True
    pis = [policy(r) for r in interior]
    if len(pis) > 1:
        spread = max(0.5 * np.abs(p - pis[0]).sum(1).max() for p in pis)
        if spread > 1e-6:
            unique = False
            notes.append(f"the starts reached stationary points up to TV {spread:.3g} apart: several stationary "
                         "points; the one of least residual is reported")
    if len(certified) < len(runs):
        notes.append(f"{len(runs) - len(certified)} of {len(runs)} starts did not reach a stationary point")
    return best, notes, unique


def _closed_form(objective: GroupObjective, groups, log_ref: np.ndarray, lengths: np.ndarray, beta: float,
                 rewards: np.ndarray | None) -> Optimum | None:
    """The objective's closed-form target (:data:`CLOSED_FORMS`) where it has one and the task's rewards are
    given, if its residual max |dL/dz| is at most :data:`CLOSED_FORM_TOLERANCE` on these groups (so it is a
    stationary point of this population, not only of the model the form assumes); else None."""
    form = CLOSED_FORMS.get(getattr(objective.fn, "__name__", ""))
    builtin = getattr(objective.fn, "__module__", "") == "polopt.losses.group"  # not a user's namesake
    if form is None or not builtin or rewards is None or objective.params or objective.stop_gradient:
        return None
    h = np.asarray(form(np.asarray(rewards, dtype=np.float64), beta))  # (X, K)
    value, residual = 0.0, 0.0
    for x in range(log_ref.shape[0]):
        problem = _Population(objective, _prompt_groups(groups, x), log_ref[x:x + 1], lengths[x:x + 1], beta)
        z = log_ref[x] + h[x]
        value, residual = value + problem.value(z), max(residual, float(np.abs(problem.grad(z)).max()))
    if residual > CLOSED_FORM_TOLERANCE:
        return None
    k = log_ref.shape[1]
    return Optimum(True, h - h.mean(axis=1, keepdims=True), value,
                   f"{MINIMISER}: closed form pi_ref e^(r / beta) (the Plackett–Luce likelihood is maximised where "
                   "its model of the rankings agrees with the task's; Rafailov et al. 2023, appendix A.3), "
                   "certified by its residual", residual, True, None, [np.zeros(k, dtype=int)] * log_ref.shape[0])


def solve_groups(objective: GroupObjective, groups, reference: np.ndarray, lengths: np.ndarray, *, beta: float,
                 starts: int = STARTS, seed: int = 0, rewards: np.ndarray | None = None) -> Optimum:
    """The exact target of a group objective on weighted groups (see the module docstring): the
    minimiser, or the stationary point of an objective with a stop-gradient. ``reference``,
    ``lengths``: (X, K). ``rewards`` (X, K): the task's Bradley–Terry / Plackett–Luce rewards, for a closed
    form (:data:`CLOSED_FORMS`), tried first and kept where its residual certifies it. The Optimum's
    ``logratios`` are log pi* - log pi_ref, centred per prompt; its ``method`` starts with "minimiser" or
    "stationary point"."""
    reference, lengths = (np.asarray(a, dtype=np.float64) for a in (reference, lengths))
    log_ref, x_count, k = np.log(reference), *reference.shape
    components = [np.zeros(k, dtype=int)] * x_count
    closed = _closed_form(objective, groups, log_ref, lengths, beta, rewards)
    if closed is not None:
        return closed
    if objective.stop_gradient:
        best, notes, unique = _stationary(objective, groups, reference, lengths, beta, starts, seed)
        z = best["z"].reshape(x_count, k)
        pi = scipy.special.softmax(z, axis=1)
        finite = bool(pi.min() >= VANISHED)  # saturated terms have no gradient near a face of the simplex either
        support = [[int(i) for i in np.flatnonzero(row >= VANISHED)] for row in pi]
        residual, value = best["residual"], best["value"]
        method = (f"{STATIONARY}: the gradient with the detached statistic held fixed is zero (damped Newton on it, "
                  f"{starts} seeded starts, torch autograd float64); training stops here, not at a minimiser")
    else:
        runs, notes, unique, proved = _minimum(objective, groups, reference, lengths, beta, starts, seed)
        z = np.stack([r["z"] for r in runs])
        finite = all(r["finite"] for r in runs)
        support = [r["support"] if not r["finite"] else list(range(k)) for r in runs]
        residual, value = max(r["residual"] for r in runs), sum(r["value"] for r in runs)
        method = (f"{MINIMISER}: Newton in the softmax logits per prompt (the pair solver's, Cholesky steps with an "
                  f"Armijo line search, torch autograd float64), {starts_used(starts, proved, x_count)}")
    if not finite:
        where = (f"{STATIONARY} on the simplex's boundary: the semi-gradient vanishes only as some probabilities fall "
                 "to 0 (saturated terms)" if objective.stop_gradient else
                 f"{MINIMISER}: no finite optimum, the infimum lies on the simplex's boundary")
        limit = None if objective.stop_gradient else _limit_policy(z, support)
        return Optimum(False, None, value, where, residual, False, support, components,
                       notes + ["some responses' probabilities fall to 0 in the limit; 'limit_support' lists, per "
                                "prompt, the responses that keep mass" + ("" if limit is None else
                                ", 'limit_policy' the policy the infimum is approached at")], limit_policy=limit)
    h = z - scipy.special.logsumexp(z, axis=1, keepdims=True) - log_ref
    if residual > CERTIFIED:
        notes.append(f"not certified: the gradient at the answer is {residual:.3g} (> {CERTIFIED:g}); "
                     "reached_optimum is null")
    return Optimum(True, h - h.mean(axis=1, keepdims=True), value, method, residual, unique, None, components, notes,
                   certified=residual <= CERTIFIED)


def _limit_policy(z: np.ndarray, support: list[list[int]]) -> np.ndarray:
    """The policy a boundary infimum is approached at: the solver, having followed the descent ray until the
    responses off the support carried no weight that mattered, minimised over the rest, which is the face's
    minimiser; its probabilities off the support are set to 0 exactly and the rest renormalised."""
    pi = scipy.special.softmax(z, axis=1)
    on = np.zeros_like(pi, dtype=bool)
    for x, kept in enumerate(support):
        on[x, kept] = True
    pi = np.where(on, pi, 0.0)
    return pi / pi.sum(1, keepdims=True)


def target_kind(optimum: Optimum) -> str:
    """"stationary point" or "minimiser", as :func:`solve_groups` found it."""
    return STATIONARY if optimum.method.startswith(STATIONARY) else MINIMISER


def local_minimum_near(objective: GroupObjective, groups, reference: np.ndarray, lengths: np.ndarray, *, beta: float,
                       log_pi: np.ndarray) -> dict | None:
    """The local minimum of a group objective without a stop-gradient that the policy ``log_pi`` (X, K)
    lies in, where training stopped short of the global one (a non-convex objective): per prompt the
    pair solver's minimisation from the trained logits, certified as a local minimiser by its residual
    (max |dL/dz| <= CERTIFIED) and a positive definite Hessian (its least eigenvalue with the gauge's block
    of ones, which moves no probability). None where that fails: the answer lies on the boundary, the
    residual is large, or the Hessian is not positive definite. Returns the policy (X, K), the value, the
    residual and the least eigenvalue."""
    reference, lengths = (np.asarray(a, dtype=np.float64) for a in (reference, lengths))
    log_ref = np.log(reference)
    z, value, residual, least = [], 0.0, 0.0, np.inf
    for x in range(reference.shape[0]):
        problem = _Population(objective, _prompt_groups(groups, x), log_ref[x:x + 1], lengths[x:x + 1], beta)
        run = _solve_prompt(problem, np.asarray(log_pi[x], dtype=np.float64), kink_search=False)
        if not run["finite"] or run["residual"] > CERTIFIED:
            return None
        least = min(least, float(np.linalg.eigvalsh(0.5 * (problem.hess(run["z"]) + problem.hess(run["z"]).T))[0]))
        z.append(run["z"])
        value, residual = value + run["value"], max(residual, run["residual"])
    if least <= 0.0:
        return None
    return {"policy": scipy.special.softmax(np.stack(z), axis=1), "value": value, "residual": residual,
            "least_eigenvalue": least}
