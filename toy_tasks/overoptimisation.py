"""The over-optimisation study on finite tasks, from exact targets (no training).

For a reward model learned from N sampled pairs, optimising it exactly gives

- best-of-n: the exact best-of-n distribution under the learned reward
  (:func:`toy_tasks.methods.best_of_n.best_of_n_distribution`), n = 1 .. 64;
- KL-regularised RL: pi* ∝ pi_ref e^{r_learned / beta} (the closed form of
  :func:`toy_tasks.methods.view.kl_optimum`), over a grid of beta;

and each is measured by its KL to the reference and its learned and true expected
rewards, both rewards in the reference-weighted mean-zero gauge (the reference
scores 0). Averaging over several reward models (seeds) per N gives the curves of
Gao et al., Scaling laws for reward model overoptimization, 2023: the learned
reward rises with KL, the true reward rises less and, for small N, turns down.
``polopt compare ... method.reward=PATH`` trains the same runs; ``bench/overoptimisation.py``
prints and plots these.
"""

from __future__ import annotations

import numpy as np

from toy_tasks.finite.task import FiniteTask
from toy_tasks.methods.best_of_n import best_of_n_distribution
from toy_tasks.methods.reward_fit import fit_task_reward, true_rewards
from toy_tasks.methods.view import kl_optimum

NS = (1, 2, 4, 8, 16, 32, 64)
BETAS = (4.0, 2.0, 1.0, 0.5, 0.25, 0.125, 0.0625)


def _measure(policy: np.ndarray, learned: np.ndarray, true: np.ndarray, task: FiniteTask) -> dict:
    w = task.prompt_weights
    return {"kl_to_reference": task.kl_to_reference(policy), "learned_reward": float(w @ (policy * learned).sum(1)),
            "true_reward": float(w @ (policy * true).sum(1))}


def exact_curves(task: FiniteTask, learned: np.ndarray, *, ns=NS, betas=BETAS) -> list[dict]:
    """Rows (method, knob, kl_to_reference, learned_reward, true_reward) of the exact targets under ``learned``."""
    true, _ = true_rewards(task)
    rows = [{"method": "best_of_n", "knob": float(n),
             **_measure(best_of_n_distribution(task.reference, learned, n), learned, true, task)} for n in ns]
    rows += [{"method": "rl", "knob": float(b), **_measure(kl_optimum(task.reference, learned, b), learned, true, task)}
             for b in betas]
    return rows


def study(task: FiniteTask, sizes, seeds, *, l2: float, ns=NS, betas=BETAS) -> list[dict]:
    """Per training-set size, the exact curves averaged over reward models fitted with each seed."""
    out = []
    for size in sizes:
        runs = []
        for seed in seeds:
            fitted = fit_task_reward(task, mode="sampled", n_pairs=int(size), seed=int(seed), l2=l2, heldout=0.0)
            runs.append(exact_curves(task, np.asarray(fitted["summary"]["rewards"]), ns=ns, betas=betas))
        for i, row in enumerate(runs[0]):
            mean = {k: float(np.mean([r[i][k] for r in runs])) for k in ("kl_to_reference", "learned_reward",
                                                                          "true_reward")}
            out.append({"group": f"{size} pairs", "method": row["method"], "knob": row["knob"], **mean})
    return out
