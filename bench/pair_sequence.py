"""Every built-in pair objective on the enumerable sequence task: a tiny transformer trained in exact
mode against the exact optimum of the pair solver (toy_tasks/pair_solve.py). Prints, per objective,
the TV to the optimum at the start and after training, and the seconds; never passes or fails.

    PYTHONPATH=. python bench/pair_sequence.py [--steps 300] [--lr 0.01]
"""

from __future__ import annotations

import argparse
import os
import time

import torch

from polopt import objectives
from polopt.optim import OptimConfig
from polopt.train import TrainSettings, train
from toy_tasks.sequences import sequence_task

TASK = dict(n_symbols=3, max_length=3, n_prompts=2, reference_width=16, reference_layers=1, reference_heads=2,
            reference_sharpness=10.0, seed=0)
MODEL = dict(kind="transformer", width=16, layers=1, heads=2, context=8, seed=0)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=300)
    parser.add_argument("--lr", type=float, default=0.01)
    parser.add_argument("--only", default="", help="comma-separated objective names (default: every built-in)")
    args = parser.parse_args()
    torch.set_num_threads(1)
    task = sequence_task(**TASK)
    names = [n for n in args.only.split(",") if n] or objectives.builtin_names()
    print(f"sequence task {TASK['n_symbols']} symbols, up to {TASK['max_length']}: {task.n_responses} responses per "
          f"prompt, {TASK['n_prompts']} prompts; {args.steps} Adam steps at lr {args.lr}; "
          f"load {os.getloadavg()[0]:.1f}")
    for name in names:
        objective = objectives.resolve(name)
        session = task.prepare(objective, beta=0.5)
        policy = session.build_policy(**MODEL, init="reference")
        start = session.evaluate(policy).get("tv_to_optimum")
        began = time.perf_counter()
        settings = TrainSettings(beta=0.5, steps=args.steps, optim=OptimConfig(lr=args.lr),
                                 log_every=max(args.steps // 4, 1), progress=False)
        result = train(policy, session.pairs, objective, settings, evaluate=session.evaluate)
        tv = result.final.get("tv_to_optimum")
        print(f"{name:<26} finite optimum {session.finite.optimum.finite!s:<5}  TV start "
              f"{'-' if start is None else f'{start:.3f}'}  end {'-' if tv is None else f'{tv:.4f}'}  "
              f"({time.perf_counter() - began:.1f} s)", flush=True)


if __name__ == "__main__":
    main()
