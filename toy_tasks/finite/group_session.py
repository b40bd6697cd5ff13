"""A finite task prepared for one training run on groups: weighted groups, the exact target, metrics.

The groups' side of the trainer's interface (:class:`polopt.training.contracts.Session`, with
``groups`` where the pair session has ``pairs``): :func:`prepare` turns a task, a feedback kind
(``task.feedback``), a group size (``task.group_size``), a loss and beta into the
:class:`polopt.groups.GroupSet` to train on (``exact``: every group with its probability,
:mod:`toy_tasks.finite.feedback`; ``sampled``: the distinct groups of a seeded sample, weighted by
their share of it), solves the exact target once (:mod:`toy_tasks.exact.groups`: a minimiser, or a
stationary point for an objective with a stop-gradient) and measures a policy against it.
Any loss trains here: a group objective as it is; a margin loss or a pair objective on ranked
groups through the pair adapter.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from polopt.groups import GroupSet
from polopt.losses import registry
from polopt.losses.group_objective import FEEDBACK_FIELDS, GroupObjective
from polopt.models.tabular import build_policy
from polopt.training.contracts import TrainResult
from polopt.training.stopping import FINITE_TASK_TOL
from polopt.training.verdict import REACHED_TOLERANCE, verdict_fields
from toy_tasks.exact.groups import MINIMISER, local_minimum_near, population_value, solve_groups, target_kind
from toy_tasks.exact.margin import Optimum
from toy_tasks.finite.feedback import WeightedGroups, check_feedback, population_groups, sample_groups
from toy_tasks.measures import loss_gaps, per_prompt, total_variation
from toy_tasks.tables import finite_policy_table

MODES = ("exact", "sampled")
DTYPE = torch.float64


@dataclass
class GroupSession:
    task: object  # toy_tasks.finite.task.FiniteTask
    loss: GroupObjective
    beta: float
    mode: str
    feedback: str
    trained: WeightedGroups  # the groups trained on (the population in exact mode)
    groups: GroupSet
    optimum: Optimum  # of the trained groups
    threads: int = 1
    tol: float = FINITE_TASK_TOL
    tolerance: float = REACHED_TOLERANCE

    def build_policy(self, kind: str = "tabular", width: int = 16, seed: int = 0, **sequence_keys) -> torch.nn.Module:
        if sequence_keys:
            raise ValueError(f"model={kind} is a sequence model; groups train on finite tasks with model=tabular "
                             "or model=loglinear")
        return build_policy(kind, torch.as_tensor(np.log(self.task.reference), dtype=DTYPE), width=width, seed=seed,
                            score_scale=1.0 / self.beta)

    @staticmethod
    def logratios(policy) -> np.ndarray:
        with torch.no_grad():
            return (policy.log_distribution() - policy.reference_logprobs).double().numpy()

    def distance(self, h: np.ndarray) -> float | None:
        """TV between the policy of h and the target, in the gauge of h."""
        if not self.optimum.finite:
            return None
        target = self.task.policy_from_logratios(self.optimum.aligned_to(h))
        return total_variation(self.task.policy_from_logratios(h), target, self.task.prompt_weights)

    def value(self, h: np.ndarray) -> float:
        return population_value(self.loss, self.trained, h, self.task.reference, self.task.lengths, beta=self.beta)

    def evaluate(self, policy) -> dict:
        h = self.logratios(policy)
        out = {"kl_to_reference": self.task.kl_to_reference(self.task.policy_from_logratios(h))}
        if self.optimum.finite:
            out["tv_to_optimum"] = self.distance(h)
        return out

    def summarise(self, policy, result: TrainResult) -> dict:
        """summary.json's finite-task fields (as for pairs), with the feedback kind, the group size and
        ``optimum_kind`` ("minimiser" or "stationary point")."""
        h, opt = self.logratios(policy), self.optimum
        pi = self.task.policy_from_logratios(h)
        value = self.value(h)
        gap, relative = loss_gaps(value, opt.value)
        kind = target_kind(opt)
        summary = {
            "task": self.task.name, "mode": self.mode, "loss_name": self.loss.name, "beta": self.beta,
            "feedback": self.feedback, "group_size": self.groups.size,
            "n_groups": len(self.groups), "loss": value, "policy": per_prompt(pi),
            "reference": per_prompt(self.task.reference), "responses": self.task.responses or None,
            "prompts": self.task.prompts or None,
            "optimum": per_prompt(self.task.policy_from_logratios(opt.aligned_to(h))) if opt.finite else None,
            "optimum_kind": kind, "optimum_finite": opt.finite, "optimum_value": opt.value,
            "optimum_method": opt.method, "optimum_residual": opt.residual, "optimum_unique": opt.unique,
            "optimum_certified": opt.certified, "tv_to_optimum": self.distance(h), "loss_gap": gap,
            "relative_loss_gap": relative, "kl_to_reference": self.task.kl_to_reference(pi),
            "steps": result.steps, "seconds": result.seconds, "notes": list(opt.notes),
        }
        if kind == "stationary point":
            summary["notes"].append(f"{self.loss.name} holds a statistic without gradient: 'optimum' is the stationary "
                                    "point training converges to (the gradient with that statistic held fixed is "
                                    "zero), not a minimiser of 'loss'; loss_gap may be negative")
            summary["relative_loss_gap"] = None  # the verdict rests on the distance alone
        if not opt.finite:
            summary["limit_support"] = opt.limit_support
            if opt.limit_policy is not None:
                summary["limit_policy"] = per_prompt(opt.limit_policy)
                summary["tv_to_limit_policy"] = total_variation(pi, opt.limit_policy, self.task.prompt_weights)
        summary.update(verdict_fields(summary, result.history, tolerance=self.tolerance))
        if summary["reached_optimum"] is False and kind == MINIMISER:
            local = self._stopped_at_local_minimum(pi)
            if local:
                summary["notes"].append(local.pop("note"))
                summary.update(local)
        return summary

    def _stopped_at_local_minimum(self, pi: np.ndarray) -> dict:
        """Where training stopped short of the global minimum: the certified local minimum it sits in, if it
        sits in one (a non-convex objective; :func:`toy_tasks.exact.groups.local_minimum_near`)."""
        local = local_minimum_near(self.loss, self.trained, self.task.reference, self.task.lengths, beta=self.beta,
                                   log_pi=np.log(pi))
        if local is None:
            return {}
        tv = total_variation(pi, local["policy"], self.task.prompt_weights)
        if tv > self.tolerance or local["value"] <= self.optimum.value + 1e-9 * (1.0 + abs(self.optimum.value)):
            return {}
        note = (f"training stopped in a local minimum (certified: gradient {local['residual']:.2g}, the Hessian's "
                f"least eigenvalue {local['least_eigenvalue']:.3g} > 0) TV {tv:.2g} from the trained policy, its "
                f"loss {local['value']:.6g} above the global minimum's {self.optimum.value:.6g}: the objective is "
                "not convex and gradient descent from the reference does not reach its global minimum")
        return {"local_minimum": per_prompt(local["policy"]), "local_minimum_value": local["value"],
                "tv_to_local_minimum": tv, "note": note,
                "likely_fix": "none by tuning: the run sits in a local minimum of a non-convex objective "
                              "(local_minimum); start elsewhere or change the objective"}

    def table(self, summary: dict) -> str:
        lines = finite_policy_table(self.task, summary)
        tv = summary["tv_to_optimum"]
        lines.append(f"loss {summary['loss']:.6g}  {summary['optimum_kind']} {summary['optimum_value']:.6g}  "
                     f"tv_to_optimum {'-' if tv is None else f'{tv:.3g}'}  kl_to_reference "
                     f"{summary['kl_to_reference']:.4g}  ({summary['feedback']}, groups of {summary['group_size']}, "
                     f"{summary['n_groups']} groups)")
        if "tv_to_limit_policy" in summary:
            lines.append(f"no finite optimum: tv_to_limit_policy {summary['tv_to_limit_policy']:.3g} (the policy the "
                         "infimum is approached at, on the responses of limit_support)")
        lines.extend(f"note: {n}" for n in summary["notes"])
        return "\n".join(lines)


def group_set(task, groups: WeightedGroups, weighted: bool) -> GroupSet:
    """The tensors of ``groups``: reference log-probs cached once, lengths where the task has any."""
    x, members = groups.prompt[:, None], groups.members  # (N, 1), (N, G)
    lengths = np.asarray(task.lengths, dtype=np.float64)
    feedback = {k: torch.as_tensor(v, dtype=torch.long if k == "ranks" else DTYPE)
                for k, v in groups.feedback().items()}
    return GroupSet(prompt=torch.as_tensor(groups.prompt, dtype=torch.long), members=torch.as_tensor(members),
                    reference=torch.as_tensor(np.log(task.reference)[x, members], dtype=DTYPE),
                    mask=torch.ones(members.shape, dtype=torch.bool),
                    lengths=None if np.all(lengths == 1.0) else torch.as_tensor(lengths[x, members], dtype=DTYPE),
                    weight=torch.as_tensor(groups.weight, dtype=DTYPE) if weighted else None, **feedback)


def prepare(task, loss, *, feedback: str = "pairs", group_size: int = 2, beta: float, smoothing: float = 0.0,
            mode: str = "exact", n_pairs: int = 2000, seed: int = 0, run_dir=None) -> GroupSession:
    """Weighted groups and the exact target of ``task`` for training ``loss`` at ``beta`` on
    ``feedback`` groups of ``group_size``. ``n_pairs``: the groups drawn in sampled mode."""
    if mode not in MODES:
        raise ValueError(f"task.mode must be one of {', '.join(MODES)}, got {mode!r}")
    if smoothing:
        raise ValueError(f"loss.smoothing flips a pair's label; task.feedback={feedback} trains groups: set "
                         f"loss.smoothing=0.0, got {smoothing}")
    check_feedback(feedback, group_size)
    objective = registry.as_group_objective(loss)
    if not objective.reads_feedback(feedback):
        reads = ", ".join(k for k in FEEDBACK_FIELDS if objective.reads_feedback(k)) or "none"
        raise ValueError(f"loss {objective.name!r} cannot read task.feedback={feedback} "
                         f"(group.{FEEDBACK_FIELDS[feedback]}); "
                         f"it reads the feedback of: {reads}")
    population = population_groups(task, feedback, group_size)
    trained = population if mode == "exact" else sample_groups(population, n_pairs, seed)
    optimum = solve_groups(objective, trained, task.reference, task.lengths, beta=beta, rewards=task.rewards)
    return GroupSession(task, objective, beta, mode, feedback, trained, group_set(task, trained, weighted=True),
                        optimum)
