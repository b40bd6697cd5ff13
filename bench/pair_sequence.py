"""Bench: every built-in pair objective on the default sequence task, as a user runs it.

    PYTHONPATH=. python bench/pair_sequence.py [--jobs 2] [--only NAME,...] [--json out.json] [KEY=VALUE ...]

Runs ``polopt train task=sequence loss=NAME`` (364 responses per prompt, the tiny transformer
started at its reference, exact mode: every pair weighted as drawn from the reference) once per
built-in objective, ``--jobs`` runs at a time (one torch thread each), with the defaults the
configuration gives that objective (its ``conf/loss/NAME.yaml`` and ``conf/tuning/``) and any
``KEY=VALUE`` given here on top. Prints, per objective: beta, the steps run, the TV to the
exact optimum of the pair solver (toy_tasks/exact/pairs.py) at the end, whether the run says it
reached it (TV <= 0.05 for a sequence model), the population loss's gap to its optimum, and the
wall time of the whole command (the exact solve included). Figures only; nothing passes or fails.

``--fit-optimum STEPS`` asks instead whether the transformer can hold each objective's optimum at
all: it fits the same model, from the same start, directly to the exact optimum (Adam on the
cross-entropy ``-sum_y pi*(y) log pi(y)``, lr 0.003) and prints the TV after STEPS steps. A small
TV there and a large one after training says the objective is hard to optimise, not to represent.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def builtin_names() -> list[str]:
    sys.path.insert(0, str(ROOT))
    from polopt import losses

    return losses.builtin_names("pair")


def run_one(name: str, overrides: list[str], folder: Path) -> dict:
    """One ``polopt train`` in its own process; its summary.json and the command's seconds."""
    run_dir = folder / name
    command = [sys.executable, "-m", "polopt", "train", "task=sequence", f"loss={name}", "train.progress=false",
               "train.threads=1", f"hydra.run.dir={run_dir}", *overrides]
    began = time.perf_counter()
    done = subprocess.run(command, cwd=ROOT, capture_output=True, text=True,
                          env={**os.environ, "PYTHONPATH": str(ROOT)})
    seconds = time.perf_counter() - began
    if done.returncode != 0:
        return {"name": name, "error": done.stderr.strip().splitlines()[-1:], "seconds": seconds}
    summary = json.loads((run_dir / "summary.json").read_text())
    keys = ("beta", "steps", "tv_to_optimum", "reached_optimum", "loss_gap", "optimum_finite", "kl_to_reference")
    return {"name": name, **{k: summary.get(k) for k in keys}, "seconds": seconds}


def fit_optimum(name: str, beta: float, steps: int) -> dict:
    """The default task's transformer fitted by cross-entropy to ``name``'s exact optimum: TV after ``steps``."""
    import torch

    sys.path.insert(0, str(ROOT))
    from polopt import losses
    from toy_tasks.sequence.task import sequence_task

    torch.set_num_threads(1)
    objective = losses.resolve(name)
    session = sequence_task().prepare(objective, beta=beta)
    policy = session.build_policy(init="reference")
    start = session.finite.logratios(policy)
    target = torch.as_tensor(session.finite.task.policy_from_logratios(session.finite.optimum.aligned_to(start)))
    optimiser = torch.optim.Adam(policy.parameters(), lr=0.003)
    began = time.perf_counter()
    for _ in range(steps):
        loss = -(target * policy.log_distribution()).sum()
        optimiser.zero_grad()
        loss.backward()
        optimiser.step()
    return {"name": name, "beta": beta, "steps": steps, "tv_to_optimum": session.evaluate(policy)["tv_to_optimum"],
            "seconds": time.perf_counter() - began}


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--jobs", type=int, default=2, help="runs at a time, one thread each (default 2)")
    parser.add_argument("--only", default="", help="comma-separated objective names (default: every built-in)")
    parser.add_argument("--json", default=None, help="also write the rows to this file")
    parser.add_argument("--fit-optimum", type=int, default=0, metavar="STEPS",
                        help="fit the transformer to each optimum directly instead (cross-entropy, STEPS steps)")
    parser.add_argument("--beta", type=float, default=0.5, help="beta of --fit-optimum (default 0.5)")
    parser.add_argument("overrides", nargs="*", help="KEY=VALUE for every run, e.g. beta=2.0 train.steps=1000")
    args = parser.parse_args(argv)
    names = [n for n in args.only.split(",") if n] or builtin_names()
    if args.fit_optimum:
        for name in names:
            r = fit_optimum(name, args.beta, args.fit_optimum)
            print(f"{name:<28} beta {r['beta']:g}: fitted to its optimum by cross-entropy, TV {r['tv_to_optimum']:.4f} "
                  f"after {r['steps']} steps ({r['seconds']:.1f} s)", flush=True)
        return
    print(f"polopt train task=sequence loss=NAME {' '.join(args.overrides)}: {len(names)} objectives, "
          f"{args.jobs} at a time; load {os.getloadavg()[0]:.1f} at the start", flush=True)
    with tempfile.TemporaryDirectory() as tmp, ThreadPoolExecutor(args.jobs) as pool:
        rows = list(pool.map(lambda n: run_one(n, args.overrides, Path(tmp)), names))
    print(f"{'objective':<28}{'beta':>6}{'steps':>7}{'TV end':>10}  reached  {'loss gap':>9}{'seconds':>9}")
    for r in rows:
        if "error" in r:
            print(f"{r['name']:<28} failed: {' '.join(r['error'])}")
            continue
        tv = "-" if r["tv_to_optimum"] is None else f"{r['tv_to_optimum']:.4f}"
        print(f"{r['name']:<28}{r['beta']:>6g}{r['steps']:>7}{tv:>10}  {str(r['reached_optimum']):<7}  "
              f"{r['loss_gap']:>9.2g}{r['seconds']:>9.1f}")
    print(f"load {os.getloadavg()[0]:.1f} at the end")
    if args.json:
        Path(args.json).write_text(json.dumps(rows, indent=2))


if __name__ == "__main__":
    main()
