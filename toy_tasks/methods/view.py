"""A finite task seen by the methods beyond the offline losses: their environment, exact targets, metrics.

:meth:`toy_tasks.finite.session.FiniteSession.for_method` builds a :class:`MethodView`.
It hands :mod:`polopt.methods` a :class:`polopt.methods.environment.FiniteEnvironment`
(tensors only) and computes every method's exact target here, independently of
the trainer:

- ``rl``: pi* ∝ pi_ref e^{r / beta} (the KL-regularised optimum, a closed form);
- ``selfplay``: the Nash equilibrium of the regularised preference game at
  tau = beta / 2 (:mod:`toy_tasks.methods.equilibrium`), for the squared loss; with
  ``method.preference=PATH`` (a preference model from ``polopt reward reward.kind=preference``)
  the game is played on the learned P, and the target is that game's equilibrium;
- ``best_of_n``: the exact best-of-n distribution (:mod:`toy_tasks.methods.best_of_n`);
- ``group``: the stationary point of the expected group-relative update
  (:mod:`toy_tasks.methods.group_target`), beside pi_ref e^{r / beta};
- ``offline``: the session's optimum (:mod:`toy_tasks.exact.margin`), plus realignment
  by lambda checked against the optimum re-solved at beta / lambda.

Every summary also carries the fields ``polopt compare`` tabulates:
``kl_to_reference``, ``win_rate_over_reference`` (P(pi > pi_ref)),
``expected_reward`` (where the task has rewards), ``tv_to_equilibrium``.

Rewards (``method.reward``): ``task`` uses the task's Bradley–Terry rewards;
``win_rate`` uses r(y) = P(y > mu), the win rate against the sampling
distribution, which every task has; a path is a reward model file written by
``polopt reward`` for this task: the method optimises that learned reward, its
exact target is computed from it, and the summary adds the learned and the true
reward of the result, the target and the reference (:mod:`toy_tasks.methods.reward_fit`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.special
import torch

from polopt.methods.dispatch import METHODS
from polopt.methods.environment import FiniteEnvironment
from polopt.methods.group import MAX_TUPLES, check_group_method
from polopt.methods.realign import equivalent_beta, realign
from polopt.training.contracts import TrainResult
from polopt.training.verdict import REACHED_TOLERANCE, verdict_fields
from toy_tasks.exact.margin import solve
from toy_tasks.measures import per_prompt, total_variation
from toy_tasks.methods.best_of_n import best_of_n_distribution, kl_formula
from toy_tasks.methods.equilibrium import Equilibrium, duality_gap, nash_equilibrium, tau_of_beta
from toy_tasks.methods.group_target import group_update_target, lumped_classes, lumped_group_target
from toy_tasks.methods.preference_fit import learned_preference
from toy_tasks.methods.reward_fit import learned_reward_fields, learned_rewards
from toy_tasks.tables import finite_policy_table, method_footer

REWARDS = ("task", "win_rate")


def task_rewards(task, kind: str = "task") -> np.ndarray | None:
    """(X, K) rewards by ``method.reward``; None for ``task`` when the task has none."""
    if kind == "task":
        return task.rewards
    if kind == "win_rate":
        return np.einsum("xij,xj->xi", task.preference, task.sampling)  # P(y > mu)
    if isinstance(kind, str) and kind:  # a reward model file from polopt reward
        return learned_rewards(task, kind)
    raise ValueError(f"method.reward must be one of {', '.join(REWARDS)} or a reward model file from polopt reward, "
                     f"got {kind!r}")


def kl_optimum(reference: np.ndarray, rewards: np.ndarray, beta: float) -> np.ndarray:
    """pi* ∝ pi_ref e^{r / beta}, (X, K)."""
    return scipy.special.softmax(np.log(reference) + rewards / beta, axis=1)


def win_rate(policy: np.ndarray, opponent: np.ndarray, task) -> float:
    """Prompt-weighted P(pi > opponent) = sum_x w_x pi_x^T P_x opponent_x."""
    return float(task.prompt_weights @ np.einsum("xi,xij,xj->x", policy, task.preference, opponent))


@dataclass
class MethodView:
    """One finite session as one method sees it. Build with :meth:`build`."""

    session: object  # toy_tasks.finite.session.FiniteSession
    method: dict
    rewards: np.ndarray | None  # (X, K) the method's rewards
    target: np.ndarray | None  # (X, K) the method's exact target policy, None where unknown
    target_method: str
    equilibrium: Equilibrium
    preference: np.ndarray | None = None  # (X, K, K) the P the method plays on; None: the task's

    @classmethod
    def build(cls, session, name: str = "offline", **params) -> MethodView:
        if name not in METHODS:
            raise ValueError(f"method must be one of {', '.join(METHODS)}, got {name!r}")
        task = session.task  # a toy_tasks.finite.task.FiniteTask
        method = {"name": name, **params}
        rewards = task_rewards(task, params.get("reward", "task"))
        beta = session.beta
        equilibrium = nash_equilibrium(task.reference, task.preference, tau=tau_of_beta(beta))
        target, how, played = None, "", None
        if name == "rl":
            if rewards is None:
                raise ValueError(f"method=rl needs rewards and task {task.name!r} has none; use a task with "
                                 "rewards (bradley_terry, contextual) or method.reward=win_rate")
            target, how = kl_optimum(task.reference, rewards, beta), "closed form pi_ref e^{r / beta}"
        elif name == "selfplay":
            if params.get("preference") is not None:  # the game on a learned P (Munos et al. 2023)
                played = learned_preference(task, params["preference"])
                learned = nash_equilibrium(task.reference, played, tau=tau_of_beta(beta))
                target, how = learned.policy, f"Nash equilibrium of the learned P at tau = beta / 2: {learned.method}"
                if params.get("loss", "squared") != "squared":
                    target, how = None, ("none known: the Nash equilibrium is self-play's fixed point for the squared "
                                         "loss only")
            elif params.get("loss", "squared") == "squared":
                target, how = equilibrium.policy, f"Nash equilibrium at tau = beta / 2: {equilibrium.method}"
            else:
                how = "none known: the Nash equilibrium is self-play's fixed point for the squared loss only"
        elif name == "group":
            if rewards is None:
                raise ValueError(f"method=group needs rewards and task {task.name!r} has none; use a task with "
                                 "rewards (bradley_terry, contextual) or method.reward=win_rate")
            env = FiniteEnvironment(torch.as_tensor(np.log(task.reference)), torch.as_tensor(task.prompt_weights),
                                    torch.as_tensor(rewards, dtype=torch.float64))
            g = params.get("group_size", 4)
            check_group_method(g, params.get("advantage", "standardised"), params.get("kl", "estimator"),
                               params.get("estimator", "exact"), task.n_responses)
            keys = dict(beta=beta, group_size=g, advantage=params.get("advantage", "standardised"),
                        kl=params.get("kl", "estimator"))
            if task.n_responses**g > MAX_TUPLES and lumped_classes(env, g) <= MAX_TUPLES:  # few distinct rewards
                target, how, notes = lumped_group_target(env, **keys)
            elif task.n_responses**g > MAX_TUPLES:  # the exact expected update is out of reach: no target
                how, notes = (f"none computed: the exact expected update sums over {task.n_responses}^{g} groups "
                              f"({lumped_classes(env, g)} groups of reward classes), more than {MAX_TUPLES}; a "
                              "smaller method.group_size has one"), []
            else:
                target, how, notes = group_update_target(env, **keys)
            method["target_notes"] = notes
        elif name == "best_of_n":
            if rewards is None:
                raise ValueError(f"method=best_of_n needs rewards and task {task.name!r} has none; use a task "
                                 "with rewards or method.reward=win_rate")
            target = best_of_n_distribution(task.reference, rewards, params.get("n", 4))
            how = f"exact best-of-{params.get('n', 4)} distribution (order statistics, ties shared)"
        return cls(session, method, rewards, target, how, equilibrium, played)

    # ------------------------------------------------------------ what the method sees

    @property
    def task(self):  # the toy_tasks.finite.task.FiniteTask
        return self.session.task

    def environment(self) -> FiniteEnvironment:
        dtype = torch.float64  # finite tasks train in double precision
        return FiniteEnvironment(
            reference=torch.as_tensor(np.log(self.task.reference), dtype=dtype),
            prompt_weights=torch.as_tensor(self.task.prompt_weights, dtype=dtype),
            rewards=None if self.rewards is None else torch.as_tensor(self.rewards, dtype=dtype),
            preference=torch.as_tensor(self.task.preference if self.preference is None else self.preference,
                                       dtype=dtype))

    def target_tensor(self) -> torch.Tensor | None:
        return None if self.target is None else torch.as_tensor(self.target, dtype=torch.float64)

    # ------------------------------------------------------------ measuring

    def policy_of(self, policy) -> np.ndarray:
        with torch.no_grad():
            return policy.log_distribution().exp().double().numpy()

    def evaluate(self, policy) -> dict:
        pi = self.policy_of(policy)
        out = {"kl_to_reference": self.task.kl_to_reference(pi)}
        if self.target is not None:
            out["tv_to_optimum"] = total_variation(pi, self.target, self.task.prompt_weights)
        return out

    def comparison_fields(self, pi: np.ndarray) -> dict:
        """The fields every method's summary carries for ``polopt compare``."""
        task, eq = self.task, self.equilibrium
        out = {
            "method": self.method["name"],
            "prompt_weights": [float(w) for w in task.prompt_weights],
            "kl_to_reference": task.kl_to_reference(pi),
            "win_rate_over_reference": win_rate(pi, task.reference, task),
            "expected_reward": None if task.rewards is None else float(
                task.prompt_weights @ (pi * task.rewards).sum(1)),
            "equilibrium": per_prompt(eq.policy),
            "equilibrium_tau": eq.tau,
            "equilibrium_gap": eq.gap,
            "tv_to_equilibrium": total_variation(pi, eq.policy, task.prompt_weights),
            "duality_gap": float(task.prompt_weights @ duality_gap(pi, task.reference, task.preference, eq.tau)),
        }
        return out

    def extend_offline(self, summary: dict, policy) -> dict:
        """Add the comparison fields and the realignment sweep to an offline run's summary."""
        pi = self.policy_of(policy)
        summary.update(self.comparison_fields(pi))
        lambdas = self.method.get("realign") or []
        if lambdas:
            summary["realigned"] = self.realignment(policy, lambdas)
        return summary

    def realignment(self, policy, lambdas) -> list[dict]:
        """For each lambda: pi_lambda, and its TV to the optimum re-solved at beta / lambda."""
        session, task = self.session, self.task
        with torch.no_grad():
            trained = policy.log_distribution().double()
        reference = torch.as_tensor(np.log(task.reference), dtype=torch.float64)
        out = []
        for lam in lambdas:
            pi = realign(reference, trained, float(lam)).exp().numpy()
            beta_eq = equivalent_beta(session.beta, float(lam))
            if np.isfinite(beta_eq):
                optimum = solve(session.loss, session.weights, beta=beta_eq, rewards=task.rewards,
                                sampling=task.sampling, preference=task.preference,
                                population=session.mode == "exact" and session.smoothing == 0.0)
                h = np.log(pi) - np.log(task.reference)
                target = task.policy_from_logratios(optimum.aligned_to(h)) if optimum.finite else None
            else:
                target = task.reference  # beta -> inf: the reference itself
            out.append({"lambda": float(lam), "beta_equivalent": beta_eq, "policy": per_prompt(pi),
                        "optimum": None if target is None else per_prompt(target),
                        "tv_to_optimum": None if target is None else total_variation(pi, target,
                                                                                     task.prompt_weights),
                        "kl_to_reference": task.kl_to_reference(pi)})
        return out

    def summarise(self, policy, result: TrainResult) -> dict:
        """summary.json of a method run: the offline runs' fields where they apply, plus the method's own."""
        task, name, beta = self.task, self.method["name"], self.session.beta
        pi = self.policy_of(policy)
        summary = {"task": task.name, "method": name, "method_config": dict(self.method), "beta": beta,
                   "loss": result.final.get("loss"), "policy": per_prompt(pi), "reference": per_prompt(task.reference),
                   "responses": task.responses or None, "prompts": task.prompts or None,
                   "optimum": None if self.target is None else per_prompt(self.target),
                   "optimum_finite": self.target is not None, "optimum_method": self.target_method,
                   "tv_to_optimum": None if self.target is None else total_variation(pi, self.target,
                                                                                     task.prompt_weights),
                   "steps": result.steps, "seconds": result.seconds, "notes": []}
        summary.update(self.comparison_fields(pi))
        if name == "rl":
            gain = (pi * self.rewards).sum(1) - beta * scipy.special.rel_entr(pi, task.reference).sum(1)
            best = (self.target * self.rewards).sum(1) - beta * scipy.special.rel_entr(self.target,
                                                                                     task.reference).sum(1)
            summary.update({"objective": float(task.prompt_weights @ gain),
                            "optimum_objective": float(task.prompt_weights @ best),
                            "loss_gap": float(task.prompt_weights @ (best - gain))})
        elif name == "selfplay" and self.preference is not None:
            summary.update(self.learned_preference_fields(pi))
        elif name == "selfplay":
            summary["loss_gap"] = summary["duality_gap"]
            summary["notes"].append(
                f"the Nash equilibrium of the regularised preference game (tau = beta / 2 = {self.equilibrium.tau:g})"
                f" is {self._format(self.equilibrium.policy)}; self-play ends at TV "
                f"{summary['tv_to_equilibrium']:.2g} from it")
            if self.target is not None and summary["tv_to_optimum"] > 1e-3 and self.method.get("update") == "gradient":
                summary["notes"].append(
                    "gradient self-play has not converged (TV > 1e-3): at small beta the game's cyclic part "
                    "dominates its regularisation and gradient steps circle the equilibrium; the default "
                    "method.update=fixed_point does not (or lower optim.lr roughly in proportion to beta and raise "
                    "train.steps)")
        elif name == "group":
            summary.update(self.group_fields(pi))
        elif name == "best_of_n":
            n = self.method.get("n", 4)
            kl_bon = scipy.special.rel_entr(self.target, pi).sum(1)
            summary.update({"n": n, "kl_to_best_of_n": float(task.prompt_weights @ kl_bon),
                            "loss_gap": float(task.prompt_weights @ kl_bon),
                            "best_of_n_kl_to_reference": task.kl_to_reference(self.target),
                            "kl_formula": kl_formula(n)})
            summary["notes"].append(
                f"KL(best-of-{n} || reference) = {summary['best_of_n_kl_to_reference']:.4g} exactly; "
                f"log n - (n-1)/n = {kl_formula(n):.4g} is an upper bound on a finite set (Beirami et al. 2024)")
        if self.method.get("reward", "task") not in REWARDS:  # optimised against a learned reward
            summary.update(learned_reward_fields(pi, self.target, self.rewards, task, self.method["reward"]))
            summary["notes"].append(
                f"optimised against the learned reward of {self.method['reward']}: learned_reward "
                f"{summary['learned_reward']:.4f}, true_reward {summary['true_reward']:.4f} (the reference scores 0 "
                "under both: reference-weighted mean zero)")
        summary.update(verdict_fields(summary, result.history,
                                      tolerance=getattr(self.session, "tolerance", REACHED_TOLERANCE)))
        return summary

    def learned_preference_fields(self, pi: np.ndarray) -> dict:
        """method=selfplay method.preference=PATH: the game is the learned P's. ``optimum`` (the target) is its
        Nash equilibrium; beside it the true game's, and how far apart the two equilibria lie."""
        task, tau = self.task, self.equilibrium.tau
        gap = float(task.prompt_weights @ duality_gap(pi, task.reference, self.preference, tau))
        out = {"preference_model": str(self.method["preference"]), "optimum_kind": "Nash equilibrium of the learned P",
               "loss_gap": gap, "learned_duality_gap": gap,
               "tv_optimum_to_true_equilibrium": None if self.target is None else total_variation(
                   self.target, self.equilibrium.policy, task.prompt_weights)}
        if self.target is not None:
            trained = total_variation(pi, self.target, task.prompt_weights)
            out["notes"] = [f"played on the learned preference of {self.method['preference']}: its Nash equilibrium "
                            f"(tau = beta / 2 = {tau:g}) lies TV {out['tv_optimum_to_true_equilibrium']:.3g} from the "
                            f"true game's; self-play ends at TV {trained:.2g} from the learned one"]
        return out

    def group_fields(self, pi: np.ndarray) -> dict:
        """method=group: the KL-regularised optimum pi_ref e^{r / beta} beside the update's stationary
        point, and the TV between them (how far the group normalisation moves the answer)."""
        task = self.task
        regularised = kl_optimum(task.reference, self.rewards, self.session.beta)
        apart = None if self.target is None else total_variation(self.target, regularised, task.prompt_weights)
        notes = list(self.method.get("target_notes", []))
        if apart is not None:
            notes.append(f"the update's stationary point lies TV {apart:.3g} from pi_ref e^{{r / beta}} "
                         f"(method.advantage={self.method.get('advantage', 'standardised')}, "
                         f"method.kl={self.method.get('kl', 'estimator')})")
        return {"optimum_kind": "stationary point", "kl_regularised_optimum": per_prompt(regularised),
                "tv_optimum_to_kl_regularised_optimum": apart,
                "tv_to_kl_regularised_optimum": total_variation(pi, regularised, task.prompt_weights), "notes": notes}

    def _format(self, p: np.ndarray) -> str:
        return "; ".join("[" + ", ".join(f"{v:.4f}" for v in row) + "]" for row in p)

    def table(self, summary: dict) -> str:
        """Trained policy beside the reference and the method's target, as text."""
        return "\n".join(finite_policy_table(self.task, summary, target="target") + method_footer(summary))
