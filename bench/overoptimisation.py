"""Bench: over-optimisation of a learned Bradley–Terry reward, best-of-n over n and RL over beta.

    PYTHONPATH=. python bench/overoptimisation.py [--out docs/figures] [--seeds 10] [--compare]

The task is ``task=bradley_terry task.n_responses=50 task.reward_scale=1.0`` (50 invented
help-desk replies, a Dirichlet(2) reference, pairs drawn from it). For each training-set size
of the reward model (100, 300, 1000, 10000 sampled pairs, ``reward.l2`` 0.1 since the small
sets leave the maximum-likelihood fit undefined) and each seed, it fits the reward table as
``polopt reward`` does, then takes the *exact* targets under the learned reward: best-of-n for
n = 1..64 (the order-statistics distribution) and the KL-regularised RL optimum
pi_ref e^{r / beta} for beta = 4 .. 1/32. No training: the curves are those of the optima
themselves. It prints the table (means over seeds) and writes ``overoptimisation.txt`` and
``overoptimisation.png`` (true and learned reward against KL, Gao et al., Scaling laws for
reward model overoptimization, 2023).

``--compare`` also runs ``polopt compare`` (training, 2000 steps each) for the 300-pair reward
model of seed 0 over a few n and beta, and prints how far the trained runs end from the exact
figures. Figures only; nothing passes or fails.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np

from polopt.methods import overoptimisation
from polopt.methods.reward_model import save_reward_model
from toy_tasks.families import bradley_terry
from toy_tasks.methods.reward_fit import fit_task_reward
from toy_tasks.overoptimisation import BETAS, NS, exact_curves, study

SIZES = (100, 300, 1000, 10000)
L2 = 0.1
TASK = {"n_responses": 50, "reward_scale": 1.0, "seed": 0}
BETA_GRID = (*BETAS, 0.03125)


def compare_check(task, folder: Path) -> list[str]:
    """Trained runs of ``polopt compare`` against the exact figures of the same reward model."""
    from polopt.commands.compare import compare

    fitted = fit_task_reward(task, mode="sampled", n_pairs=300, seed=0, l2=L2, heldout=0.0)
    f = fitted["file"]
    path = save_reward_model(folder / "reward.pt", f["kind"], f["identity"], f["state"], gauge=f["gauge"])
    exact = {(r["method"], r["knob"]): r for r in exact_curves(task, np.asarray(fitted["summary"]["rewards"]))}
    keys = [f"task.{k}={v}" for k, v in TASK.items()]
    lines = []
    for overrides in (["method=best_of_n", "method.n=1,4,16,64"], ["method=rl", "beta=1,0.25,0.0625"]):
        result = compare([*overrides, *keys, f"method.reward={path}"], folder / overrides[0][7:], progress=False)
        for row in result["rows"]:
            knob = float(row["beta"]) if row["method"] == "rl" else float(row["run"].split("_")[-1].split()[0])
            e = exact[(row["method"], knob)]
            lines.append(f"{row['method']:<9} {knob:<7g} trained KL {row['kl_to_reference']:.4f} (exact "
                         f"{e['kl_to_reference']:.4f})  true {row['true_reward']:+.4f} ({e['true_reward']:+.4f})  "
                         f"learned {row['learned_reward']:+.4f} ({e['learned_reward']:+.4f})  tv_to_optimum "
                         f"{row['tv_to_optimum']:.2e}")
    return lines


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[1])
    parser.add_argument("--out", default="docs/figures", help="folder for overoptimisation.txt and .png")
    parser.add_argument("--seeds", type=int, default=10, help="reward models per training-set size")
    parser.add_argument("--compare", action="store_true", help="also train with polopt compare (slow)")
    args = parser.parse_args(argv)
    task = bradley_terry(**TASK)
    start = time.perf_counter()
    rows = study(task, SIZES, range(args.seeds), l2=L2, ns=NS, betas=BETA_GRID)
    seconds = time.perf_counter() - start
    title = (f"task=bradley_terry task.n_responses=50 task.reward_scale=1.0; reward models from sampled pairs, "
             f"reward.l2={L2}, mean over {args.seeds} seeds; exact targets (no training); rewards "
             "reference-weighted mean zero")
    table = overoptimisation.render(rows, title)
    load = os.getloadavg()[0]
    footer = f"{seconds:.1f} s for {len(SIZES) * args.seeds} reward models and their curves; load average {load:.1f}"
    print(table)
    print(footer)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "overoptimisation.txt").write_text(table + "\n" + footer + "\n", encoding="utf-8")
    overoptimisation.plot(rows, out / "overoptimisation.png", "50 responses, reward models by training pairs")
    print(f"wrote {out / 'overoptimisation.txt'} and {out / 'overoptimisation.png'}")
    if args.compare:
        with tempfile.TemporaryDirectory() as folder:
            for line in compare_check(task, Path(folder)):
                print(line)


if __name__ == "__main__":
    main()
