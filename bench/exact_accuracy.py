"""How close the trainer gets to the exact optimum, per loss and task (exact mode, default settings).

    python bench/exact_accuracy.py [--steps 2000] [--seeds 3] [--tol 1e-12] [--json out.json]

Prints one row per (task, loss, beta): TV to the optimum, the relative loss gap, the solver's
gradient residual, the steps run (``train.tol``: early stopping, the finite tasks' default; 0:
every step) and the seconds of training. Random tasks of 50 responses are drawn per seed.
Figures, not a pass/fail test.
"""

import argparse
import json

import numpy as np
import torch

from polopt import losses
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig
from polopt.training.stopping import FINITE_TASK_TOL
from toy_tasks import families
from toy_tasks.finite.task import make_task


def random_task(seed: int, k: int, kind: str):
    rng = np.random.default_rng(seed)
    reference = rng.dirichlet(np.ones(k))
    if kind == "bt":
        return make_task(reference, rewards=rng.normal(0.0, 2.0, k), name=f"random_bt{k}")
    upper = rng.random((k, k))
    pref = np.triu(upper, 1) + np.triu(1.0 - upper, 1).T + 0.5 * np.eye(k)
    return make_task(reference, pref, name=f"random_P{k}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=2000)
    parser.add_argument("--seeds", type=int, default=3)
    parser.add_argument("--tol", type=float, default=FINITE_TASK_TOL, help="train.tol (0: every step)")
    parser.add_argument("--json", default=None, help="also write the rows here")
    args = parser.parse_args()
    torch.set_num_threads(1)  # as polopt train does for finite tasks
    tasks = [families.bradley_terry(), families.noisy_labels(), families.nontransitive(), families.contextual()]
    tasks += [random_task(s, 50, kind) for s in range(args.seeds) for kind in ("bt", "P")]
    rows = []
    print(f"{'task':<14} {'loss':<20} {'beta':>5} {'tv_to_optimum':>14} {'rel_loss_gap':>13} {'residual':>9} "
          f"{'steps':>5} {'s':>5}")
    for task in tasks:
        for name in losses.names("margin"):
            for beta in (0.1, 1.0):
                loss = losses.resolve_margin(name)
                session = task.prepare(loss, beta=beta, mode="exact")
                policy = session.build_policy()
                result = train(policy, session.pairs, loss,
                               TrainSettings(beta=beta, steps=args.steps, optim=OptimConfig(), progress=False,
                                             log_every=args.steps, tol=args.tol))
                s = session.summarise(policy, result)
                row = {"task": task.name, "loss": name, "beta": beta, "tv_to_optimum": s["tv_to_optimum"],
                       "relative_loss_gap": s["relative_loss_gap"], "residual": s["optimum_residual"],
                       "seconds": s["seconds"], "steps": result.steps, "unique": s["optimum_unique"],
                       "finite": s["optimum_finite"]}
                rows.append(row)
                tv = "no optimum" if row["tv_to_optimum"] is None else f"{row['tv_to_optimum']:.2e}"
                gap = "-" if row["relative_loss_gap"] is None else f"{row['relative_loss_gap']:.2e}"
                res = "-" if row["residual"] is None else f"{row['residual']:.0e}"
                print(f"{task.name:<14} {name:<20} {beta:>5} {tv:>14} {gap:>13} {res:>9} {row['steps']:>5} "
                      f"{row['seconds']:>5.1f}", flush=True)
    smooth = [r for r in rows if r["finite"] and r["unique"] and r["loss"] != "savage"]
    hinge = [r for r in rows if r["loss"] == "hinge" and r["relative_loss_gap"] is not None]
    print(f"\nworst TV, convex members with a unique optimum: {max(r['tv_to_optimum'] for r in smooth):.2e}")
    print(f"worst relative loss gap, hinge: {max(r['relative_loss_gap'] for r in hinge):.2e}")
    if args.json:
        with open(args.json, "w", encoding="utf-8") as f:
            json.dump(rows, f, indent=1)


if __name__ == "__main__":
    main()
