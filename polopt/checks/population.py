"""The population check of ``polopt check``: train a loss in exact mode on a finite task and compare the
result with the task's exact optimum (direction of the margins, distance, or the limit support where no
finite optimum exists). Used for margin losses (:mod:`polopt.checks.margin`) and pair objectives
(:mod:`polopt.checks.pair`) alike; :func:`train_groups` trains a group session for :mod:`polopt.checks.group`
(the one module of the checks that runs the training loop).
"""

from __future__ import annotations

import numpy as np
import torch

from polopt.checks.result import CheckResult
from polopt.losses.margin import MarginLoss
from polopt.losses.reduce import margins
from polopt.pairs import score_pairs
from polopt.training.contracts import session_tol
from polopt.training.loop import GroupBatches, TrainSettings, optimise, train
from polopt.training.optim import OptimConfig

Tensor = torch.Tensor

STILL_MARGIN = 1e-3  # |beta * weighted mean margin| below this: the policy did not move (Adam amplifies rounding)


def limit_mass(summary: dict, facts: dict) -> tuple[list, list[float], list[float], str]:
    """Where the infimum lies on the boundary: per prompt, the mass on the responses that keep it in the limit
    (``limit_support``) under the reference and the trained policy, recorded in ``facts``; returns (the
    support, the reference's mass, the trained mass, "a -> b" per prompt)."""
    support = summary.get("limit_support") or []
    policy, reference = np.asarray(summary["policy"]), np.asarray(summary["reference"])
    mass = [float(policy[x, s].sum()) for x, s in enumerate(support)]
    start = [float(reference[x, s].sum()) for x, s in enumerate(support)]
    facts.update({"limit_mass": mass, "limit_mass_reference": start})
    return support, start, mass, ", ".join(f"{a:.3g} -> {b:.4g}" for a, b in zip(start, mass, strict=True))

def _net_win_weight(pairs) -> Tensor:
    """Per (prompt, response): total weight as winner minus as loser. All ~0 means the
    preferences are balanced and h = 0 is already optimal for any convex f."""
    weight = torch.ones(len(pairs), dtype=torch.float64) if pairs.weight is None else pairs.weight.double()
    n_prompts = int(pairs.prompt.max()) + 1
    n_responses = int(torch.maximum(pairs.winner.max(), pairs.loser.max())) + 1
    net = torch.zeros(n_prompts * n_responses, dtype=torch.float64)
    net.index_add_(0, pairs.prompt * n_responses + pairs.winner, weight)
    net.index_add_(0, pairs.prompt * n_responses + pairs.loser, -weight)
    return net / weight.sum()

def _mean_margin(policy, pairs) -> float:
    """Weighted mean of the trained margins rho over the pairs: E_W[rho]."""
    with torch.no_grad():
        logp_w, logp_l = score_pairs(policy.logprobs, pairs.prompt, pairs.winner, pairs.loser)  # (N,) each
        rho = margins(logp_w.double(), logp_l.double(), pairs.reference_winner, pairs.reference_loser)  # (N,)
        weight = torch.ones_like(rho) if pairs.weight is None else pairs.weight.double()
        return float((weight * rho).sum() / weight.sum())

# the summary keys a population check reports as its facts
FACT_KEYS = ("policy", "reference", "optimum", "optimum_finite", "optimum_value", "optimum_method", "optimum_unique",
             "optimum_certified", "optimum_residual", "tv_to_optimum", "loss", "loss_gap", "limit_support",
             "margin_growth")


def _uncertified(summary: dict) -> list[str]:
    """A note when the exact solver could not certify the optimum the run is compared with."""
    if summary.get("optimum_certified") is not False:
        return []
    return [f"the exact solver could not certify its optimum (gradient {summary['optimum_residual']:.3g} there, a "
            "kink it cannot search): the comparison below is with its best answer"]


def _direction(balanced: bool, scaled_margin: float, mean_margin: float) -> tuple[list[str], list[str]]:
    """(warnings, notes) on the direction of the trained margins. A heuristic: it holds for convex margin
    losses (the derivation in :func:`check_population`), not for every objective, so it may only warn;
    the verdict is the comparison with the certified optimum."""
    if balanced:
        return [], ["preferences balanced (no direction to check)"]
    if scaled_margin < -STILL_MARGIN:
        return [f"the trained policy prefers the losers: weighted mean margin {mean_margin:.4g} < 0 (a convex "
                "margin loss never does; judged against the exact optimum)"], []
    if scaled_margin <= STILL_MARGIN:
        return ["the trained policy did not move from the reference (weighted mean margin "
                f"{mean_margin:.3g}) although the winners outweigh the losers (a convex margin loss would; judged "
                "against the exact optimum)"], []
    return [], [f"weighted mean margin {mean_margin:.4g} > 0"]


def check_population(loss: MarginLoss, task, *, beta: float, steps: int = 2000, optim: OptimConfig | None = None,
                     tol: float = 1e-3, name: str | None = None) -> CheckResult:
    """Train ``loss`` on ``task`` in exact mode and compare with the task's exact optimum.

    ``task.prepare(loss, beta=, mode="exact")`` must return a session with ``pairs``,
    ``build_policy()`` and ``summarise(policy, result)`` whose summary has the
    finite-task fields of docs/reference/run-folder.md (``tv_to_optimum``, ``loss_gap``, ...).

    Reached: TV to the optimum <= tol where the optimum is unique, else a relative
    loss gap <= tol (hinge, non-convex losses); where no finite optimum exists, the
    mass on the responses that take it all in the limit must have grown.
    Direction: for convex f, f(x) >= f(0) + f'(0) x gives
    L(h*) >= L(0) + f'(0) beta sum_ij W_ij rho*_ij, so with f'(0) < 0 and L(h*) <= L(0)
    the optimal weighted mean margin is >= 0, and > 0 unless h = 0 is already optimal,
    i.e. the preferences are balanced (derived here; a sign error makes it negative, a
    loss with no signal leaves it at 0).
    """
    label = name or getattr(task, "name", type(task).__name__)
    check = f"population:{label}"
    try:
        session = task.prepare(loss, beta=beta, mode="exact")
        policy = session.build_policy()
        result = train(policy, session.pairs, loss,
                       TrainSettings(beta=beta, steps=steps, optim=optim or OptimConfig(),
                                     log_every=max(steps // 20, 1), progress=False,
                                     tol=session_tol(session)))  # the task's early stop, as polopt train
        summary = session.summarise(policy, result)
        mean_margin = _mean_margin(policy, session.pairs)
        balanced = bool(_net_win_weight(session.pairs).abs().max() <= 1e-9)
    except Exception as err:
        return CheckResult(check, "fail", f"training or solving failed: {type(err).__name__}: {err}",
                           {"error": str(err)})
    facts = {key: summary.get(key) for key in FACT_KEYS}
    facts.update({"steps": result.steps, "mean_margin": mean_margin, "balanced": balanced, "tol": tol})
    problems = []
    warnings, notes = _direction(balanced, beta * mean_margin, mean_margin)  # 1. a heuristic: it may only warn
    # 2. trained against exact
    if summary["optimum_finite"]:
        tv, gap, value = summary["tv_to_optimum"], summary["loss_gap"], summary["optimum_value"]
        relative_gap = gap / max(abs(value), 1e-12)
        facts["relative_loss_gap"] = relative_gap
        if summary.get("optimum_unique", True):
            ok, measured = tv <= tol, f"TV to the exact optimum {tv:.3g}"
        else:
            ok, measured = relative_gap <= tol, f"relative loss gap {relative_gap:.3g} (optimum not unique)"
        notes += _uncertified(summary)
        if ok:
            notes.insert(0, f"{measured} <= {tol:g} after {steps} steps")
        else:
            problems.append(f"training did not reach the exact optimum: {measured} > {tol:g} after {steps} steps "
                            f"(trained loss {summary['loss']:.6g}, optimal {value:.6g}; TV {tv:.3g}); either "
                            "the loss's optimum is slow to reach (try more train.steps) or the exact solver and the "
                            "trainer disagree about f")
    else:
        support, start, mass, moved = limit_mass(summary, facts)
        support = support[0] if len(support) == 1 else support  # one prompt: just its responses
        if all(b > a for a, b in zip(start, mass, strict=True)):
            notes.insert(0, f"no finite optimum (as theory says for this loss and task); mass on the responses that "
                         f"take it all in the limit {support} grew {moved}")
        else:
            problems.append(f"no finite optimum, and training moved mass away from the responses that take it all "
                            f"in the limit {support} ({moved})")
    if problems:
        return CheckResult(check, "fail", "; ".join(problems + warnings), facts)
    if warnings:
        return CheckResult(check, "warn", "; ".join(warnings + notes), facts)
    return CheckResult(check, "pass", "; ".join(notes), facts)


def train_groups(session, *, steps: int, optim: OptimConfig | None = None):
    """Train a group session's tabular policy from the reference in exact mode with the task's early stop,
    as ``polopt train`` does: (policy, result, summary)."""
    policy = session.build_policy()
    settings = TrainSettings(beta=session.beta, steps=steps, optim=optim or OptimConfig(),
                             log_every=max(steps // 20, 1), progress=False, tol=session_tol(session))
    result = optimise(policy, GroupBatches(policy, session.groups, session.loss, settings), settings)
    return policy, result, session.summarise(policy, result)
