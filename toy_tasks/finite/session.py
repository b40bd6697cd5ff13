"""A finite task prepared for one training run: pairs, optimum, metrics, summary.

This is the finite tasks' side of the trainer's interface (see
:class:`polopt.training.contracts.Session`): :func:`prepare` turns a task, a loss and beta into the
:class:`polopt.pairs.PairSet` to train on (``exact``: every ordered pair with
its win weight; ``sampled``: a seeded sample of labelled pairs), solves the
exact optimum of that very objective once, and then measures a policy against
it while training runs and at the end.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from polopt.losses.margin import MarginLoss
from polopt.models.tabular import build_policy
from polopt.pairs import PairSet
from polopt.training.contracts import TrainResult
from polopt.training.stopping import FINITE_TASK_TOL
from polopt.training.verdict import REACHED_TOLERANCE, verdict_fields
from toy_tasks.exact.margin import Optimum, smoothed_weights
from toy_tasks.exact.pairs import exact_optimum, objective_value
from toy_tasks.exact.traits import traits
from toy_tasks.measures import displacement_warning, loss_gaps, margin_growth, per_prompt, total_variation
from toy_tasks.methods.view import MethodView
from toy_tasks.tables import finite_policy_table

MODES = ("exact", "sampled")
DTYPE = torch.float64  # finite tasks are small: train them in double precision


@dataclass
class FiniteSession:
    task: object  # toy_tasks.finite.task.FiniteTask (imports this module to prepare itself)
    loss: MarginLoss
    beta: float
    smoothing: float
    mode: str
    weights: np.ndarray  # (X, K, K) the trained objective's win weights, smoothing applied
    population_weights: np.ndarray  # (X, K, K) the population's, smoothing applied
    pairs: PairSet
    optimum: Optimum  # of the trained objective
    population_optimum: Optimum  # of the population objective (the same object in exact mode)
    threads: int = 1  # the run's torch thread count unless the config sets `threads`
    tol: float = FINITE_TASK_TOL  # train.tol unless the config sets it: stop once converged (polopt.training.stopping)
    tolerance: float = REACHED_TOLERANCE  # TV within which reached_optimum is true (a sequence model's is wider)

    # ------------------------------------------------------------ model

    def build_policy(self, kind: str = "tabular", width: int = 16, seed: int = 0, **sequence_keys) -> torch.nn.Module:
        if sequence_keys:  # model=transformer or model=bigram: keys only sequence models take
            raise ValueError(f"model={kind} is a sequence model and needs a sequence task (task=sequence); "
                             "finite tasks take model=tabular or model=loglinear")
        return build_policy(kind, torch.as_tensor(np.log(self.task.reference), dtype=DTYPE), width=width, seed=seed,
                            score_scale=1.0 / self.beta)

    def for_method(self, name: str = "offline", **params):
        """This session as the ``method`` group's option ``name`` sees it (see :mod:`toy_tasks.methods.view`)."""
        return MethodView.build(self, name, **params)

    @staticmethod
    def logratios(policy) -> np.ndarray:
        """h = log pi - log pi_ref, (X, K)."""
        with torch.no_grad():
            return (policy.log_distribution() - policy.reference_logprobs).double().numpy()

    # ------------------------------------------------------------ measuring

    def distance(self, h: np.ndarray, optimum: Optimum) -> float | None:
        """TV between the policy of h and the optimum, in the gauge of h."""
        if not optimum.finite:
            return None
        target = self.task.policy_from_logratios(optimum.aligned_to(h))
        return total_variation(self.task.policy_from_logratios(h), target, self.task.prompt_weights)

    def evaluate(self, policy) -> dict:
        """Per-log-step metrics: KL to the reference and TV to the optimum where finite."""
        h = self.logratios(policy)
        out = {"kl_to_reference": self.task.kl_to_reference(self.task.policy_from_logratios(h))}
        if self.optimum.finite:
            out["tv_to_optimum"] = self.distance(h, self.optimum)
        return out

    def summarise(self, policy, result: TrainResult) -> dict:
        """The finite-task fields of summary.json (docs/reference/run-folder.md, plus diagnostics)."""
        h = self.logratios(policy)
        pi = self.task.policy_from_logratios(h)
        value = self.objective_value(self.weights, h)
        opt = self.optimum
        gap, relative = loss_gaps(value, opt.value)
        summary = {
            "task": self.task.name,
            "mode": self.mode,
            "loss_name": self.loss.name,
            "beta": self.beta,
            "smoothing": self.smoothing,
            "n_pairs": len(self.pairs) if self.mode == "sampled" else None,
            "loss": value,
            "policy": per_prompt(pi),
            "reference": per_prompt(self.task.reference),
            "responses": self.task.responses or None,
            "prompts": self.task.prompts or None,
            "optimum": per_prompt(self.task.policy_from_logratios(opt.aligned_to(h))) if opt.finite else None,
            "optimum_finite": opt.finite,
            "optimum_value": opt.value,
            "optimum_method": opt.method,
            "optimum_residual": opt.residual,
            "optimum_unique": opt.unique,
            "optimum_certified": opt.certified,
            "tv_to_optimum": self.distance(h, opt),
            "loss_gap": gap,
            "relative_loss_gap": relative,
            "kl_to_reference": self.task.kl_to_reference(pi),
            "steps": result.steps,
            "seconds": result.seconds,
            "notes": list(opt.notes),
        }
        summary.update(traits(self.task, self.weights, opt.logratios if opt.finite else None))
        summary.update(verdict_fields(summary, result.history, tolerance=self.tolerance))
        if self.mode == "sampled":
            pop = self.population_optimum
            pop_value = self.objective_value(self.population_weights, h)
            summary.update({
                "population_loss": pop_value,
                "population_optimum": per_prompt(self.task.policy_from_logratios(pop.aligned_to(h)))
                if pop.finite else None,
                "population_optimum_finite": pop.finite,
                "tv_to_population_optimum": self.distance(h, pop),
                "population_loss_gap": pop_value - pop.value,
            })
            summary["notes"].append("sampled mode: 'optimum' is the optimum of the empirical pair counts; "
                                    "'population_optimum' is the optimum of the task itself")
        if not opt.finite:
            summary["limit_support"] = opt.limit_support
            growth = margin_growth(result.history)
            summary["margin_growth"] = growth
            mass = [float(pi[x, support].sum()) for x, support in enumerate(opt.limit_support)]
            summary["notes"].append(
                f"no finite optimum exists for {self.loss.name} on this task: the infimum "
                f"{opt.value:.6g} is approached only as the log-ratios diverge; over the second half "
                f"of training margin_mean went from {growth['from']:.4g} to {growth['to']:.4g} "
                f"({'still growing' if growth['growing'] else 'levelling off'}); the policy puts mass "
                f"{', '.join(f'{m:.4f}' for m in mass)} on the responses that take it all in the limit "
                f"({opt.limit_support})")
        displacement = displacement_warning(result.history)
        if displacement:
            summary["notes"].append(displacement)
        return summary

    def objective_value(self, weights: np.ndarray, h: np.ndarray) -> float:
        """The population loss of the trained objective (margin loss or pair objective) at log-ratios h."""
        return objective_value(self.loss, weights, h, self.task.reference, self.task.lengths, beta=self.beta)

    def table(self, summary: dict) -> str:
        """The trained policy beside the reference and the exact optimum, as text."""
        lines = finite_policy_table(self.task, summary)
        tv = summary["tv_to_optimum"]
        lines.append(f"loss {summary['loss']:.6g}  optimum {summary['optimum_value']:.6g}  "
                     f"gap {summary['loss_gap']:.3g}  "
                     f"tv_to_optimum {'-' if tv is None else f'{tv:.3g}'}  "
                     f"kl_to_reference {summary['kl_to_reference']:.4g}  ({summary['optimum_method']})")
        if "tv_to_population_optimum" in summary and summary["tv_to_population_optimum"] is not None:
            lines.append(f"tv_to_population_optimum {summary['tv_to_population_optimum']:.3g} "
                         f"(n_pairs = {summary['n_pairs']})")
        lines.extend(f"note: {n}" for n in summary["notes"])
        return "\n".join(lines)


def pair_lengths(task, x: np.ndarray, i: np.ndarray, j: np.ndarray):
    """The lengths (N,) of the winners ``i`` and losers ``j`` of prompts ``x`` from the task's
    ``lengths`` (X, K); (None, None) where the task has none or every length is 1 (pair objectives
    then read 1, and the checkpoints' fingerprints stay those of tasks without lengths)."""
    lengths = getattr(task, "lengths", None)
    if lengths is None:
        return None, None
    lengths = np.broadcast_to(np.asarray(lengths, dtype=np.float64), task.reference.shape)  # (X, K)
    if np.all(lengths == 1.0):
        return None, None
    return torch.as_tensor(lengths[x, i], dtype=DTYPE), torch.as_tensor(lengths[x, j], dtype=DTYPE)


def prepare(task, loss: MarginLoss, *, beta: float, smoothing: float = 0.0, mode: str = "exact",
            n_pairs: int = 2000, seed: int = 0, run_dir=None) -> FiniteSession:
    """Pairs and exact optima of ``task`` for training ``loss`` at ``beta``. ``run_dir`` is
    unused: a finite task's reference log-probabilities are its table."""
    if mode not in MODES:
        raise ValueError(f"task.mode must be one of {', '.join(MODES)}, got {mode!r}")
    population = task.win_weights()
    if mode == "exact":
        x, i, j = np.nonzero(population)
        weights = population
        pair_weight = torch.as_tensor(population[x, i, j], dtype=DTYPE)
    else:
        sample = task.sample_pairs(n_pairs, seed)
        x, i, j = sample.prompt, sample.winner, sample.loser
        weights = task.empirical_win_weights(sample)
        pair_weight = None
    log_ref = np.log(task.reference)
    len_w, len_l = pair_lengths(task, x, i, j)
    pairs = PairSet(
        prompt=torch.as_tensor(x, dtype=torch.long), winner=torch.as_tensor(i, dtype=torch.long),
        loser=torch.as_tensor(j, dtype=torch.long),
        reference_winner=torch.as_tensor(log_ref[x, i], dtype=DTYPE),  # cached once, never recomputed
        reference_loser=torch.as_tensor(log_ref[x, j], dtype=DTYPE),
        weight=pair_weight, len_winner=len_w, len_loser=len_l,
    )
    closed_ok = smoothing == 0.0
    trained = smoothed_weights(weights, smoothing)
    pop = smoothed_weights(population, smoothing)
    optimum = exact_optimum(loss, trained, task=task, beta=beta, population=mode == "exact" and closed_ok)
    population_optimum = optimum if mode == "exact" else exact_optimum(loss, pop, task=task, beta=beta,
                                                                       population=closed_ok)
    return FiniteSession(task, loss, beta, smoothing, mode, trained, pop, pairs, optimum, population_optimum)
