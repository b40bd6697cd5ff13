"""``polopt check`` for a group objective ``ell(group, beta)``: what applies, and what does not.

A group objective reads one or more kinds of feedback (``labels``: unpaired, ``ranks``: ranking,
``scores``: scored; :attr:`polopt.losses.group_objective.GroupObjective.reads`). The margin checks
(f of one margin) do not apply; these do, each population check once per feedback kind it reads,
named ``CHECK:KIND``:

1. ``per_group``: one finite loss per group, shape (B,), on probe groups; groups coupled only
   through a statistic held without gradient (KTO's reference point, BCO's shift), as declared.
2. ``finite``: finite values and gradients at log-probabilities down to -1e4 (and 0), in float64,
   float32 and bfloat16.
3. ``reference_pull:KIND``: on the task's population with no signal (every reward equal: labels
   desirable with probability 1/2, every ranking equally likely, equal scores), the field training
   follows at pi = pi_ref, its gradient in the softmax logits z (with a detached statistic held
   fixed: the semi-gradient), and the field's Jacobian there. The reference *pulls* when the field
   vanishes and every eigenvalue of the Jacobian on the directions that move pi has a positive real
   part (a strict local minimum, or an attracting stationary point); a field that does not vanish
   moves the policy with no signal (warn, naming who gains); a flat or repelling reference: warn.
4. ``signal:KIND``: on the task with rewards, the first step of gradient descent from the reference,
   dz = -grad L: the first-order change of the expected reward, Cov_pi(r, dz), must be positive and
   the best response must gain probability (the objective rewards desirable / higher-ranked /
   higher-scored responses); negative: the objective rewards the worse responses (fail).
5. ``noisy_optimum:KIND``: the exact target on the same task (its feedback is noisy: labels drawn
   with probabilities, Plackett–Luce rankings): a certified minimiser or stationary point, or an
   infimum on the simplex's boundary (warn, with the responses that keep mass).
6. ``descent:KIND``: train from the reference in exact mode and compare with the certified target.
   Reached (TV <= tol): pass. Stopped elsewhere: for a non-convex objective a local minimum (warn,
   with the TV to the global one) unless it is on the wrong side, below the reference's expected
   reward (fail). Where no finite optimum exists, the mass on the limit support must grow.

A population check judges against the certified target; a heuristic only warns, with its reason.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable

import numpy as np
import torch

from polopt.checks.population import limit_mass, train_groups
from polopt.checks.result import CheckResult, Report, guarded
from polopt.losses.group_objective import GroupObjective, probe_group
from polopt.losses.pair import check_values, kind_of
from polopt.losses.reduce import group_losses, weighted_mean
from polopt.training.optim import OptimConfig

Tensor = torch.Tensor

KIND_OF_FIELD = {"labels": "unpaired", "ranks": "ranking", "scores": "scored"}
BETTER = {"unpaired": "desirable (labelled good more often)", "ranking": "higher-ranked", "scored": "higher-scored"}
GROUP_SIZE = 2  # members per group of the population checks (the smallest that ranks; seconds per solve)
FIELD_TOL = 1e-8  # |field| below this (relative to the objective's scale) vanishes at the reference
EIGEN_TOL = 1e-9  # eigenvalues within this of 0 are flat
SIGNAL_TOL = 1e-10  # a first-order change of the expected reward below this is none
NOT_APPLICABLE = {
    "elementwise": "a group objective reads a whole group (log-ratios, lengths, feedback), not one margin; "
                   "per_group checks its shape instead",
    "convexity": "convexity of f in the margin; a group objective is no function of one margin",
    "taylor": "f(0), f'(0), f''(0) are coefficients in the margin x",
    "pair_optimum": "x*(p) needs f of the margin; see noisy_optimum and descent",
    "scale": "compares f(x) with rescaled built-in margin losses",
}


def unvalidated_group(loss) -> GroupObjective | None:
    """A bare callable of the group signature ``f(group, beta)`` as an objective not yet validated (so that
    ``per_group`` can say why validation fails); None for anything else."""
    if isinstance(loss, GroupObjective):
        return loss
    if not callable(loss) or isinstance(loss, str):
        return None
    label = getattr(loss, "__name__", type(loss).__name__)
    try:
        return GroupObjective(label, loss, source="user-supplied") if kind_of(loss, label) == "group" else None
    except TypeError:
        return None


def kinds(objective: GroupObjective) -> list[str]:
    """The feedback kinds (``task.feedback``) the objective reads, in a fixed order."""
    return [KIND_OF_FIELD[f] for f in ("labels", "ranks", "scores") if f in objective.reads]


# ----------------------------------------------------------------------------
# 1-2: probe groups
# ----------------------------------------------------------------------------


def check_per_group(objective: GroupObjective, *, beta: float) -> CheckResult:
    """Shape (B,), finite, and coupling between groups only through a detached statistic."""
    name = "per_group"
    field = (objective.reads or ("ranks",))[0]
    probe = probe_group(field)
    try:
        together = objective(probe, beta)
        check_values(objective.name, together, 4, unit="group")
    except Exception as err:  # a user's objective can fail in any way on ordinary groups
        return CheckResult(name, "fail", f"on 4 ordinary groups: {type(err).__name__}: {err}", {"error": str(err)})
    alone = torch.cat([objective(_select(probe, k), beta) for k in range(4)])
    gap = float((together.detach() - alone.detach()).abs().max())
    facts = {"batch_vs_single_max_difference": gap, "stop_gradient": objective.stop_gradient,
             "reads": list(objective.reads)}
    if not torch.isfinite(together).all():
        return CheckResult(name, "fail", f"non-finite losses {together.tolist()} on ordinary groups", facts)
    coupled = gap > 1e-10 * max(1.0, float(together.abs().max()))
    if coupled and not objective.stop_gradient:
        return CheckResult(name, "fail", f"groups are coupled: a group's loss changes with the rest of the batch (by "
                           f"{gap:.3g}) through a statistic that carries gradient; a mean or normalisation over the "
                           "batch inside the objective makes it depend on the batch", facts)
    how = ("groups coupled only through a statistic of the batch held without gradient (its training target is a "
           "stationary point)" if coupled else "the same alone as in a batch")
    return CheckResult(name, "pass", f"one loss per group, shape (B,), reads {', '.join(kinds(objective))}; {how}",
                       facts)


def _select(group, k: int):
    """Group k of a batch alone (its weight dropped: one group's batch statistic is its own)."""
    return dataclasses.replace(group, **{f.name: getattr(group, f.name)[k:k + 1] for f in dataclasses.fields(group)
                                         if f.name != "weight" and getattr(group, f.name) is not None}, weight=None)


def _extreme_groups(field: str, dtype: torch.dtype):
    """Every combination of log-probabilities -1e4 .. 0 for two members' policy and reference, (256, 2)
    each, with the probe's feedback of ``field`` repeated."""
    values = (-1e4, -50.0, -1e-3, 0.0)
    grid = torch.tensor(np.array(np.meshgrid(*[values] * 4)).reshape(4, -1), dtype=dtype)  # (4, 256)
    logp, ref = grid[:2].T.contiguous(), grid[2:].T.contiguous()  # (256, 2) each
    feedback = getattr(probe_group(field), field)[:1, :2].repeat(len(logp), 1)  # (256, 2)
    if field == "ranks":
        feedback = torch.tensor([[0, 1]]).repeat(len(logp), 1)
    base = probe_group(field, dtype=dtype)
    return dataclasses.replace(base, logp=logp, ref_logp=ref, lengths=torch.ones_like(logp),
                               mask=torch.ones(logp.shape, dtype=torch.bool), **{field: feedback.to(
                                   feedback.dtype if field == "ranks" else dtype)})


def check_finite_groups(objective: GroupObjective, *, beta: float) -> CheckResult:
    """Finite values and gradients on the extreme grid, each feedback kind read, three dtypes."""
    name = "finite"
    bad = []
    for field in objective.reads:
        for dtype in (torch.float64, torch.float32, torch.bfloat16):
            group = _extreme_groups(field, dtype)
            logp = group.logp.clone().requires_grad_(True)
            values = objective(dataclasses.replace(group, logp=logp), beta)
            (grad,) = torch.autograd.grad(values.sum(), logp, allow_unused=True)
            if not (torch.isfinite(values).all() and (grad is None or torch.isfinite(grad).all())):
                k = int((~torch.isfinite(values.detach())).nonzero().flatten()[:1].sum())
                bad.append(f"{KIND_OF_FIELD[field]}, {str(dtype).removeprefix('torch.')}, e.g. log-probs "
                           f"{group.logp[k].tolist()} against reference {group.ref_logp[k].tolist()}")
    facts = {"log_probs": [-1e4, -50.0, -1e-3, 0.0], "non_finite": bad}
    if bad:
        return CheckResult(name, "fail", f"not finite at extreme log-probabilities ({'; '.join(bad[:3])}); use "
                           "softplus / logsigmoid / logsumexp; continue exponentials linearly beyond a bound", facts)
    return CheckResult(name, "pass", "finite values and gradients at log-probabilities -1e4..0 in float64, float32 "
                       "and bfloat16", facts)


# ----------------------------------------------------------------------------
# 3-4: the field training follows, at the reference
# ----------------------------------------------------------------------------


def population_loss(session, z: Tensor) -> Tensor:
    """The session's population objective at logits z (X K,), float64: the weighted mean of the
    objective over the session's groups, through the one loss path (a detached statistic stays
    detached, so its gradient is the semi-gradient training follows)."""
    groups = session.groups
    log_pi = torch.log_softmax(z.reshape(session.task.reference.shape), dim=1)  # (X, K)
    logp = log_pi[groups.prompt[:, None], groups.members]  # (N, G)
    return weighted_mean(group_losses(session.loss, logp, groups, beta=session.beta), groups.weight)


def field_at_reference(session) -> tuple[np.ndarray, np.ndarray]:
    """(the gradient in z at pi = pi_ref, (X K,); its Jacobian, (X K, X K)) by autograd, float64."""
    z0 = torch.as_tensor(np.log(session.task.reference), dtype=torch.float64).reshape(-1)

    def field(z: Tensor) -> Tensor:
        return torch.autograd.grad(population_loss(session, z), z, create_graph=True)[0]

    grad = field(z0.clone().requires_grad_(True)).detach().numpy()
    jacobian = torch.autograd.functional.jacobian(field, z0).numpy()
    return grad, jacobian


def _moving_eigenvalues(jacobian: np.ndarray, x: int, k: int) -> np.ndarray:
    """Eigenvalues of the Jacobian on the directions that move pi (each prompt's logits summing to 0)."""
    basis = []
    for p in range(x):
        for j in range(k - 1):
            v = np.zeros(x * k)
            v[p * k + j], v[p * k + j + 1] = 1.0, -1.0
            basis.append(v)
    q, _ = np.linalg.qr(np.array(basis).T)  # (X K, X (K - 1)) orthonormal
    return np.linalg.eigvals(q.T @ jacobian @ q)


def check_reference_pull(objective: GroupObjective, session, *, kind: str) -> CheckResult:
    """On a population with no signal: the field vanishes at the reference and the reference attracts."""
    name = f"reference_pull:{kind}"
    grad, jacobian = field_at_reference(session)
    x, k = session.task.reference.shape
    scale = max(1.0, float(np.abs(jacobian).max()))
    eig = _moving_eigenvalues(jacobian, x, k)
    facts = {"field_at_reference": float(np.abs(grad).max()), "eigenvalues": sorted(float(e) for e in eig.real),
             "feedback": kind, "group_size": session.groups.size}
    semi = " (semi-gradient: the detached statistic held fixed)" if objective.stop_gradient else ""
    if np.abs(grad).max() > FIELD_TOL * scale:
        gain = [int(i % k) for i in np.flatnonzero(-grad > FIELD_TOL * scale)]
        return CheckResult(name, "warn", f"with no signal ({_no_signal(kind)}) the gradient at the reference{semi} is "
                           f"{np.abs(grad).max():.3g}, not 0: training moves the policy by itself (responses {gain} "
                           "gain): its optimum is not anchored at pi_ref (reference-free, or reading lengths)", facts)
    if eig.real.min() > EIGEN_TOL * scale:
        what = "an attracting stationary point of training" if objective.stop_gradient else "a strict local minimum"
        return CheckResult(name, "pass", f"with no signal ({_no_signal(kind)}) the reference is {what}: the gradient"
                           f"{semi} vanishes there and every eigenvalue of its Jacobian is > 0 (smallest "
                           f"{eig.real.min():.3g}): the objective pulls towards the reference", facts)
    if np.abs(eig).max() <= EIGEN_TOL * scale:
        return CheckResult(name, "warn", f"with no signal ({_no_signal(kind)}) the objective is flat at the reference "
                           "(gradient and curvature 0): nothing pulls the policy back towards pi_ref, so noise in "
                           "finite data moves it freely", facts)
    return CheckResult(name, "warn", f"with no signal ({_no_signal(kind)}) the reference is not a minimum: the "
                       f"gradient{semi} vanishes there but its Jacobian has an eigenvalue {eig.real.min():.3g} <= 0: "
                       "training drifts away from pi_ref in that direction", facts)


def _no_signal(kind: str) -> str:
    return {"unpaired": "every response desirable with probability 1/2", "ranking": "every ranking equally likely",
            "scored": "every score equal"}[kind]


def check_signal(objective: GroupObjective, session, *, kind: str) -> CheckResult:
    """The first step of gradient descent from the reference raises the expected reward and the best response."""
    name = f"signal:{kind}"
    grad, _ = field_at_reference(session)
    task = session.task
    x, k = task.reference.shape
    step = -grad.reshape(x, k)  # dz of gradient descent
    pi, r = task.reference, task.rewards
    dpi = pi * (step - (pi * step).sum(1, keepdims=True))  # (X, K): d pi / dt along dz (softmax chain rule)
    change = float(task.prompt_weights @ (dpi * r).sum(1))  # d E_pi[r] / dt = Cov_pi(r, dz)
    best, worst = r.argmax(1), r.argmin(1)
    d_best = [float(dpi[p, best[p]]) for p in range(x)]
    d_worst = [float(dpi[p, worst[p]]) for p in range(x)]
    facts = {"expected_reward_change": change, "best_response_change": d_best, "worst_response_change": d_worst,
             "feedback": kind}
    better = BETTER[kind]
    target = target_gain(session)
    facts["target_expected_reward_gain"] = target
    if change < -SIGNAL_TOL and target is not None and target > 0:
        return CheckResult(name, "warn", f"the first step of gradient descent from the reference lowers the expected "
                           f"reward (rate {change:.3g}) although the objective's global target raises it by "
                           f"{target:.3g}: a non-convex objective whose gradient at the reference points the wrong "
                           "way: training from the reference can end at a wrong-sign local minimum (see descent)",
                           facts)
    if change < -SIGNAL_TOL:
        where = "" if target is None else f", and its global target changes it by {target:.3g}"
        return CheckResult(name, "fail", f"rewards the worse responses: the first step of gradient descent from the "
                           f"reference lowers the expected reward (rate {change:.3g}) and moves the best response's "
                           f"probability by {d_best[0]:.3g}{where}; a sign error (the {better} responses should gain)",
                           facts)
    if change <= SIGNAL_TOL:
        return CheckResult(name, "warn", f"no first-order signal at the reference (rate of the expected reward "
                           f"{change:.3g}): the {better} responses gain nothing from the first steps", facts)
    if any(d <= 0 for d in d_best):
        return CheckResult(name, "warn", f"the expected reward rises (rate {change:.3g}) but the best response loses "
                           f"probability ({d_best[0]:.3g}) at the first step: mass moves to middling responses", facts)
    return CheckResult(name, "pass", f"rewards {better} responses: from the reference, gradient descent raises the "
                       f"expected reward (rate {change:.3g}), the best response gains ({d_best[0]:.3g}) and the worst "
                       f"loses ({d_worst[0]:.3g})", facts)


# ----------------------------------------------------------------------------
# 5-6: the exact target, and where gradient descent from the reference ends
# ----------------------------------------------------------------------------


UNBOUNDED = 1e8  # an infimum below -UNBOUNDED is taken as -inf: the objective is unbounded below


def target_gain(session) -> float | None:
    """The expected reward of the session's exact target minus the reference's: of the certified policy, or,
    where the infimum lies on the boundary, of the reference restricted to the responses that keep mass in the
    limit (how the mass splits there is not known; the sign is what matters). None where neither is known, or
    where the objective is unbounded below."""
    task, opt = session.task, session.optimum
    if not opt.finite and not opt.value > -UNBOUNDED:
        return None  # unbounded below: many rays reach -inf, the solver's limit support is one of them, no target
    if opt.finite:
        policy = task.policy_from_logratios(opt.logratios)
    elif opt.limit_support:
        policy = np.zeros_like(task.reference)
        for x, support in enumerate(opt.limit_support):
            policy[x, support] = task.reference[x, support] / task.reference[x, support].sum()
    else:
        return None
    return _expected_reward(task, policy) - _expected_reward(task, task.reference)


def check_noisy_optimum(session, *, kind: str) -> CheckResult:
    """Whether the exact target on the noisy population is finite, and what it is."""
    name = f"noisy_optimum:{kind}"
    opt = session.optimum
    target = "stationary point" if opt.method.startswith("stationary") else "minimiser"
    facts = {"optimum_finite": bool(opt.finite), "optimum_kind": target, "optimum_method": opt.method,
             "optimum_certified": getattr(opt, "certified", None), "optimum_residual": opt.residual,
             "optimum_unique": opt.unique, "limit_support": opt.limit_support, "notes": list(opt.notes)}
    if opt.finite:
        uncertified = "" if facts["optimum_certified"] is not False else " (not certified: residual " \
            f"{opt.residual:.3g})"
        several = "" if opt.unique else "; several local minima or stationary points: the lowest is the target"
        return CheckResult(name, "pass", f"a finite {target} on a noisy {kind} task{uncertified}{several}", facts)
    return CheckResult(name, "warn", f"no finite {target} on a noisy {kind} task: the infimum lies on the simplex's "
                       f"boundary (the limit keeps mass on responses {opt.limit_support}); training drives the "
                       "others towards probability 0", facts)


def _expected_reward(task, policy) -> float:
    return float(task.prompt_weights @ (np.asarray(policy) * task.rewards).sum(1))


def check_descent(session, *, kind: str, steps: int = 2000, optim: OptimConfig | None = None,
                  tol: float = 1e-3) -> CheckResult:
    """Train from the reference (exact mode) and compare with the certified target (see the module docstring)."""
    name = f"descent:{kind}"
    _, result, summary = train_groups(session, steps=steps, optim=optim)
    task = session.task
    gained = _expected_reward(task, summary["policy"]) - _expected_reward(task, task.reference)
    facts = {k: summary.get(k) for k in ("policy", "optimum", "optimum_kind", "optimum_finite", "optimum_unique",
                                         "optimum_certified", "tv_to_optimum", "loss", "optimum_value", "loss_gap",
                                         "limit_support", "steps", "stopped")}
    facts.update({"expected_reward_gain": gained, "tol": tol})
    target = summary["optimum_kind"]
    if not summary["optimum_finite"]:
        return _limit_verdict(name, summary, facts, stop_gradient=session.loss.stop_gradient)
    tv = summary["tv_to_optimum"]
    if tv <= tol:
        return CheckResult(name, "pass", f"gradient descent from the reference reaches the {target}: TV {tv:.3g} <= "
                           f"{tol:g} after {result.steps} steps", facts)
    sound = target_gain(session)
    facts["target_expected_reward_gain"] = sound
    if gained < 0 and sound is not None and sound > 0:
        return CheckResult(name, "warn", f"gradient descent from the reference stops at a wrong-sign local minimum TV "
                           f"{tv:.3g} from the global {target}: its expected reward is {-gained:.3g} below the "
                           f"reference's, while the global {target} is {sound:.3g} above it (a non-convex objective; "
                           "what training reaches depends on where it starts and on the loss's parameters)", facts)
    if gained < 0:
        return CheckResult(name, "fail", f"gradient descent from the reference ends TV {tv:.3g} from the {target} at a "
                           f"policy with a lower expected reward than the reference's ({gained:.3g}): a wrong-sign "
                           "local minimum", facts)
    if result.stopped == "tol" or not summary.get("optimum_unique", True):
        return CheckResult(name, "warn", f"gradient descent from the reference stops at a local minimum TV {tv:.3g} "
                           f"from the global {target} (a non-convex objective; its expected reward still rises by "
                           f"{gained:.3g}): what training reaches depends on where it starts", facts)
    return CheckResult(name, "fail", f"training did not reach the {target}: TV {tv:.3g} > {tol:g} after {result.steps} "
                       "steps and still moving; either the target is slow to reach (try more train.steps) or the exact "
                       "solver and the trainer disagree about the objective", facts)


def _limit_verdict(name: str, summary: dict, facts: dict, *, stop_gradient: bool) -> CheckResult:
    support, start, mass, moved = limit_mass(summary, facts)
    if all(b > a for a, b in zip(start, mass, strict=True)):
        return CheckResult(name, "pass", f"no finite target: the infimum is on the boundary, and training moves mass "
                           f"onto the responses that keep it in the limit {support} ({moved})", facts)
    gained = facts["expected_reward_gain"]
    kept = [[int(i) for i in np.flatnonzero(row > 1e-6)] for row in np.asarray(summary["policy"])]
    if gained > 0 and stop_gradient:  # saturated terms zero the semi-gradient on more than one face
        return CheckResult(name, "warn", f"the solver's boundary stationary point keeps mass on {support}, training "
                           f"ends on another face keeping {kept} ({moved} on the solver's): saturated terms zero the "
                           "semi-gradient near more than one face, so the boundary target is not unique; training "
                           f"still raises the expected reward by {gained:.3g}", facts)
    if gained > 0:
        return CheckResult(name, "warn", f"the infimum is on the boundary keeping mass on {support}, but gradient "
                           f"descent from the reference heads for another face, keeping {kept} ({moved} on the "
                           "infimum's): a local infimum of a non-convex objective; training still raises the expected "
                           f"reward by {gained:.3g}", facts)
    return CheckResult(name, "fail", f"no finite target, training moved mass away from the responses that keep it in "
                       f"the limit {support} ({moved}) and lowered the expected reward by {-gained:.3g}: a wrong-sign "
                       "limit", facts)


# ----------------------------------------------------------------------------
# The battery
# ----------------------------------------------------------------------------


def run_group_checks(objective: GroupObjective, *, beta: float = 0.5, signal_task=None, silent_task=None,
                     steps: int = 2000, optim: OptimConfig | None = None, tol: float = 1e-3,
                     on_check: Callable[[CheckResult, float], None] | None = None) -> Report:
    """Every check of the module docstring. ``signal_task``: a finite task with rewards (its feedback
    populations are built by its ``prepare``); ``silent_task``: the same with every reward equal. Without
    them only the probe checks run."""
    results = []

    def record(name: str, fn: Callable[[], CheckResult]) -> None:
        start = time.perf_counter()
        results.append(guarded(name, fn))
        if on_check is not None:
            on_check(results[-1], time.perf_counter() - start)

    record("per_group", lambda: check_per_group(objective, beta=beta))
    if results[0].status == "fail":
        results.append(CheckResult("finite", "skip", "not run: the objective does not return one loss per group"))
        return Report(objective.name, beta, results, {})
    record("finite", lambda: check_finite_groups(objective, beta=beta))
    for kind in kinds(objective) if signal_task is not None else []:
        _kind_checks(objective, kind, beta, signal_task, silent_task, record, steps=steps, optim=optim, tol=tol)
    results += [CheckResult(n, "skip", f"not applicable: {why}") for n, why in NOT_APPLICABLE.items()]
    return Report(objective.name, beta, results, {})


def _kind_checks(objective, kind: str, beta: float, signal_task, silent_task, record, **train_keys) -> None:
    """The population checks of one feedback kind: one prepared session per task, shared by its checks."""
    def prepared(task):
        return task.prepare(objective, beta=beta, mode="exact", feedback=kind, group_size=GROUP_SIZE)

    if silent_task is not None:
        record(f"reference_pull:{kind}", lambda: check_reference_pull(objective, prepared(silent_task), kind=kind))
    session: list = []

    def with_session(check):
        def run() -> CheckResult:
            if not session:
                session.append(prepared(signal_task))
            return check(session[0])
        return run

    record(f"noisy_optimum:{kind}", with_session(lambda s: check_noisy_optimum(s, kind=kind)))  # holds the solve
    record(f"signal:{kind}", with_session(lambda s: check_signal(objective, s, kind=kind)))
    record(f"descent:{kind}", with_session(lambda s: check_descent(s, kind=kind, **train_keys)))

