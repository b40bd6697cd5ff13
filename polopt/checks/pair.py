"""``polopt check`` for a pair objective ``ell(pair, beta)``: what applies, and what does not.

The margin checks of :mod:`polopt.checks.margin` rest on f of one scaled margin (its Taylor coefficients,
convexity in x, the per-pair optimum x*(p), the scale against built-ins); a pair objective has no
such f, so those checks report ``skip`` with the reason. What does apply:

1. ``per_pair``: one finite loss per pair, shape (B,), and no coupling between the pairs of a batch
   (the batch's values equal the one-pair-at-a-time values).
2. ``finite``: finite values and gradients at log-probabilities down to -1e4 (and 0), lengths 1
   and 1000, in float64, float32 and bfloat16.
3. ``winner_signal``: at the reference (pi = pi_ref, every log-ratio 0), d ell / d log pi(y_w) < 0
   on a grid of reference log-probabilities and lengths: the objective rewards the winner's
   probability (> 0 anywhere: it rewards a loss of the winner's probability; fail).
4. ``reference_pull``: with no preference at all (p = 1/2 for every pair, i.e. each pair equally
   often in both orders), the population objective ``L(z) = sum_{i != j} mu_i mu_j ell(i, j)`` over
   the policy's logits z at pi = pi_ref: the reference *pulls* when it is a strict local minimum
   there: every small step that changes the policy raises the objective (for a smooth objective:
   gradient 0 and positive curvature). Checked with equal and with unequal lengths. A
   reference-free objective (or one that reads lengths) moves the policy with no preference
   signal at all: warn, with the direction (which responses gain). Probed by steps in the logits,
   since a kink at the reference (DPO-Positive) leaves no gradient there.
5. ``noisy_optimum``: on a noisy finite task, whether the exact optimum of the population
   objective is finite (a reference-free objective can drive responses to 0): the session's solver
   says so; warn where the infimum is only approached at the simplex's boundary.
6. ``population:<task>``: as for margin losses (:func:`polopt.checks.margin.check_population`).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
import torch

from polopt.checks.population import check_population
from polopt.checks.result import CheckResult, Report, guarded
from polopt.losses.pair import PairLoss, PairScores
from polopt.losses.reduce import per_pair_losses
from polopt.losses.registry import probe_pair
from polopt.training.optim import OptimConfig

Tensor = torch.Tensor

NOT_APPLICABLE = {
    "elementwise": "a pair objective reads the whole pair (both log-ratios, the lengths), not one margin; "
                   "per_pair checks its shape and independence instead",
    "signal": "f'(0) is a derivative in the margin, which a pair objective does not have; winner_signal "
              "checks d loss / d log pi(winner) at the reference instead",
    "convexity": "convexity of f in the margin x; a pair objective is no function of x",
    "taylor": "f(0), f'(0), f''(0) and the GPO ratio are coefficients in the margin x",
    "pair_optimum": "x*(p) = argmin p f(x) + (1 - p) f(-x) needs f of the margin; a pair objective's optimum "
                    "depends on both responses' probabilities, their references and lengths: see noisy_optimum "
                    "and the population checks",
    "certainty": "built on x*(1), the per-pair optimum of a margin loss",
    "scale": "compares f(x) with rescaled built-in margin losses",
}
PROBE_STEP = 1e-3  # step in the logits of the reference_pull probes
RISE_TOL = 1e-13  # a change below this (relative to the objective's size) is no rise: float64 rounding is ~1e-16


def _grid_pairs(dtype: torch.dtype, length: float) -> PairScores:
    """Every combination of log-probabilities -1e4 .. 0 for the four inputs: (1296,) each."""
    values = (-1e4, -1e3, -50.0, -5.0, -1e-3, 0.0)
    grid = torch.tensor(np.array(np.meshgrid(*[values] * 4)).reshape(4, -1), dtype=dtype)  # (4, 1296)
    n = torch.full_like(grid[0], length)
    return PairScores(*grid, n, torch.full_like(n, 7.0))


def check_per_pair(objective: PairLoss, *, beta: float) -> CheckResult:
    """Shape (B,), finite on ordinary pairs, and no coupling between pairs."""
    name = "per_pair"
    pair = probe_pair()
    together = objective(pair, beta)
    if not isinstance(together, Tensor) or tuple(together.shape) != (4,):
        shape = tuple(together.shape) if isinstance(together, Tensor) else type(together).__name__
        return CheckResult(name, "fail", f"returned {shape} for 4 pairs; a pair objective returns one loss per "
                           "pair, shape (B,), unreduced", {"shape": str(shape)})
    fields = ("winner", "loser", "ref_winner", "ref_loser", "len_winner", "len_loser")
    alone = torch.cat([objective(PairScores(*(getattr(pair, f)[k:k + 1] for f in fields)), beta) for k in range(4)])
    gap = float((together.detach() - alone.detach()).abs().max())
    facts = {"batch_vs_single_max_difference": gap}
    if not torch.isfinite(together).all():
        return CheckResult(name, "fail", f"non-finite losses {together.tolist()} on ordinary pairs", facts)
    if gap > 1e-10 * max(1.0, float(together.abs().max())):
        return CheckResult(name, "fail", f"pairs are coupled: a pair's loss changes with the rest of the batch "
                           f"(by {gap:.3g}); a mean, sum or normalisation over the batch inside the objective "
                           "makes it depend on the batch", facts)
    return CheckResult(name, "pass", "one loss per pair, shape (B,), the same alone as in a batch", facts)


def check_finite_pairs(objective: PairLoss, *, beta: float) -> CheckResult:
    """Finite values and gradients on the extreme grid, lengths 1 and 1000, three dtypes."""
    name = "finite"
    bad = []
    for dtype in (torch.float64, torch.float32, torch.bfloat16):
        for length in (1.0, 1000.0):
            pair = _grid_pairs(dtype, length)
            inputs = [t.clone().requires_grad_(True) for t in (pair.winner, pair.loser, pair.ref_winner,
                                                                pair.ref_loser)]
            values = objective(PairScores(*inputs, pair.len_winner, pair.len_loser), beta)
            grads = torch.autograd.grad(values.sum(), inputs, allow_unused=True)
            ok = torch.isfinite(values).all() and all(g is None or torch.isfinite(g).all() for g in grads)
            if not ok:
                k = int((~torch.isfinite(values.detach())).nonzero().flatten()[:1].sum())
                bad.append(f"{str(dtype).removeprefix('torch.')}, length {length:g}, e.g. log-probs "
                           f"{[float(t[k]) for t in inputs]}")
    facts = {"log_probs": [-1e4, -1e3, -50.0, -5.0, -1e-3, 0.0], "lengths": [1.0, 1000.0], "non_finite": bad}
    if bad:
        return CheckResult(name, "fail", f"not finite at extreme log-probabilities ({'; '.join(bad[:3])}); use "
                           "softplus / logsigmoid, and continue exponentials linearly beyond a bound", facts)
    return CheckResult(name, "pass", "finite values and gradients at log-probabilities -1e4..0, lengths 1 and "
                       "1000, in float64, float32 and bfloat16", facts)


def check_winner_signal(objective: PairLoss, *, beta: float) -> CheckResult:
    """d ell / d log pi(y_w) < 0 at the reference, over reference log-probs and lengths."""
    name = "winner_signal"
    refs = torch.tensor([-0.2, -1.0, -3.0, -8.0], dtype=torch.float64)
    ref_w, ref_l = (t.reshape(-1) for t in torch.meshgrid(refs, refs, indexing="ij"))  # (16,)
    slopes = []
    for n_w, n_l in ((1.0, 1.0), (1.0, 4.0), (4.0, 1.0)):
        winner = ref_w.clone().requires_grad_(True)  # at the reference: log pi = log pi_ref
        loser = ref_l.clone().requires_grad_(True)
        values = objective(PairScores(winner, loser, ref_w, ref_l, torch.full_like(ref_w, n_w),
                                      torch.full_like(ref_l, n_l)), beta)
        g_w, g_l = torch.autograd.grad(values.sum(), [winner, loser], allow_unused=True)
        g_w = torch.zeros_like(winner) if g_w is None else g_w
        g_l = torch.zeros_like(loser) if g_l is None else g_l
        slopes.append((g_w.detach(), g_l.detach()))
    g_w = torch.cat([s[0] for s in slopes])
    g_l = torch.cat([s[1] for s in slopes])
    facts = {"d_winner_max": float(g_w.max()), "d_winner_min": float(g_w.min()),
             "d_loser_max": float(g_l.max()), "d_loser_min": float(g_l.min())}
    if not (torch.isfinite(g_w).all() and torch.isfinite(g_l).all()):
        return CheckResult(name, "fail", "non-finite gradient at the reference", facts)
    if float(g_w.max()) > 0:
        return CheckResult(name, "fail", f"at the reference the loss rises with the winner's log-probability "
                           f"(d loss / d log pi(y_w) up to {float(g_w.max()):.3g} > 0): it rewards losing the "
                           "preferred response (a sign error?)", facts)
    if float(g_w.max()) == 0 and float(g_l.min()) <= 0:
        return CheckResult(name, "fail", "no preference signal at the reference: neither a higher winner nor a "
                           "lower loser lowers the loss somewhere on the grid, so training may never move", facts)
    note = "" if float(g_l.min()) > 0 else (f"; but d loss / d log pi(y_l) reaches {float(g_l.min()):.3g} <= 0 "
                                             "(the objective does not always push the loser down)")
    return CheckResult(name, "pass" if not note else "warn",
                       f"d loss / d log pi(y_w) in [{float(g_w.min()):.3g}, {float(g_w.max()):.3g}] < 0 at the "
                       f"reference over reference log-probs -0.2..-8 and lengths 1..4{note}", facts)


def _balanced_population(objective: PairLoss, reference: Tensor, lengths: Tensor, beta: float):
    """``L(z) = sum_{i != j} mu_i mu_j ell(i, j)`` with mu = pi_ref, each ordered pair once (p = 1/2)."""
    k = len(reference)
    i, j = (t.reshape(-1) for t in torch.meshgrid(torch.arange(k), torch.arange(k), indexing="ij"))
    keep = i != j
    i, j = i[keep], j[keep]
    log_ref = reference.log()
    weight = reference[i] * reference[j]  # (K(K-1),)

    def population(z: Tensor) -> Tensor:
        logp = torch.log_softmax(z, dim=0)  # (K,)
        pair = PairScores(logp[i], logp[j], log_ref[i], log_ref[j], lengths[i], lengths[j])
        return (weight * per_pair_losses(objective, pair, beta=beta)).sum()

    return population


def check_reference_pull(objective: PairLoss, *, beta: float) -> CheckResult:
    """With p = 1/2 everywhere: is pi_ref a strict local minimum of the population objective?

    Probed along directions in the logits that change the policy (the basis vectors and 24 seeded
    random ones, each orthogonal to the constant, unit length), both signs, at a step of 1e-3:
    every step must raise the objective. Directional differences rather than a gradient, because
    objectives with a kink at the reference (DPO-Positive's max(0, -h_w)) have no gradient there;
    a smooth objective with gradient g and Hessian H changes by t g.d + t^2 d'Hd / 2.
    """
    name = "reference_pull"
    reference = torch.tensor([0.4, 0.3, 0.2, 0.1], dtype=torch.float64)
    cases = {"equal lengths": torch.ones(4, dtype=torch.float64),
             "lengths 1, 2, 3, 4": torch.arange(1.0, 5.0, dtype=torch.float64)}
    k = len(reference)
    directions = torch.cat([torch.eye(k, dtype=torch.float64),
                            torch.randn(24, k, dtype=torch.float64, generator=torch.Generator().manual_seed(0))])
    directions = directions - directions.mean(dim=1, keepdim=True)  # no change of the constant: a policy change
    directions = torch.cat([directions, -directions]) / directions.norm(dim=1, keepdim=True).repeat(2, 1)  # (56, K)
    facts, moves = {}, []
    with torch.no_grad():
        for label, lengths in cases.items():
            population = _balanced_population(objective, reference, lengths, beta)
            at = population(reference.log())
            change = torch.stack([population(reference.log() + PROBE_STEP * d) - at for d in directions])  # (56,)
            worst = int(change.argmin())
            facts[label] = {"smallest_change": float(change.min()), "largest_change": float(change.max())}
            if float(change.min()) <= RISE_TOL * max(1.0, abs(float(at))):
                gain = [int(r) for r in torch.nonzero(directions[worst] > 0).flatten()]  # responses that gain
                moves.append(f"with {label} a step of {PROBE_STEP:g} in the logits lowers it by "
                             f"{-float(change.min()):.3g} (raising responses {gain})")
    if moves:
        return CheckResult(name, "warn", "with no preference signal (p = 1/2 for every pair) the reference is not a "
                           "minimum of the population objective: " + "; ".join(moves) + "; the objective moves the "
                           "policy by itself (reference-free, or reading lengths), so its optimum is not anchored "
                           "at pi_ref", facts)
    return CheckResult(name, "pass", "with no preference signal (p = 1/2 for every pair) every step of 1e-3 away "
                       "from the reference raises the population objective (56 directions, equal and unequal "
                       "lengths): the objective pulls towards the reference", facts)


def check_noisy_optimum(objective: PairLoss, task, *, beta: float) -> CheckResult:
    """Whether the exact optimum of the population objective on a noisy task is finite."""
    name = "noisy_optimum"
    optimum = exact_optimum(objective, task, beta=beta)
    facts = {"optimum_finite": bool(optimum.finite), "optimum_method": optimum.method,
             "limit_support": getattr(optimum, "limit_support", None)}
    if optimum.finite:
        return CheckResult(name, "pass", f"a finite optimum on the noisy task ({optimum.method})", facts)
    return CheckResult(name, "warn", f"no finite optimum on the noisy task: the infimum is approached only at the "
                       f"simplex's boundary, on responses {facts['limit_support']}; training drives the others "
                       "towards probability 0", facts)


def exact_optimum(objective: PairLoss, task, *, beta: float):
    """The exact optimum of ``objective`` on a finite ``task`` (exact mode) by the task's own solver."""
    return task.prepare(objective, beta=beta, mode="exact").optimum


def run_pair_checks(objective: PairLoss, *, beta: float = 0.5, tasks: Sequence = (), noisy_task=None,
                    steps: int = 2000, optim: OptimConfig | None = None, tol: float = 1e-3) -> Report:
    """Every check of the module docstring for a pair objective; margin-only checks say why they skip."""
    checks: list[tuple[str, Callable[[], CheckResult]]] = [
        ("per_pair", lambda: check_per_pair(objective, beta=beta)),
        ("finite", lambda: check_finite_pairs(objective, beta=beta)),
        ("winner_signal", lambda: check_winner_signal(objective, beta=beta)),
        ("reference_pull", lambda: check_reference_pull(objective, beta=beta))]
    if noisy_task is not None:
        checks.append(("noisy_optimum", lambda: check_noisy_optimum(objective, noisy_task, beta=beta)))
    labelled = [item if isinstance(item, tuple) else (getattr(item, "name", type(item).__name__), item)
                for item in tasks]
    for label, task in labelled:
        checks.append((f"population:{label}", lambda task=task, label=label: check_population(
            objective, task, beta=beta, steps=steps, optim=optim, tol=tol, name=label)))
    results = [guarded(n, fn) for n, fn in checks]
    results += [CheckResult(n, "skip", f"not applicable: {why}") for n, why in NOT_APPLICABLE.items()]
    return Report(objective.name, beta, results, {})

