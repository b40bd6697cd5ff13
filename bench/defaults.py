"""Bench: the defaults of issue 14 against their exact targets.

    PYTHONPATH=. python bench/defaults.py [--skip-sequence] [--betas 0.01,0.03,0.1,0.3,1]

Prints, for ``polopt train task=sequence`` with nothing else set (model, learning rate, warm-up and steps
all from the defaults): the first logged step with tv_to_optimum <= 0.05, its seconds, the final TV and
the run's seconds; then, for ``method=selfplay`` with its defaults on the non-transitive and the
Bradley–Terry task at each beta, the final TV to the Nash equilibrium, the first logged step with TV
<= 1e-3 and the seconds, beside gradient self-play (``method.update=gradient``, the previous default).
Each run goes through :func:`polopt.commands.train.run`, as ``polopt train`` does. Figures only; nothing
passes or fails. Prints the machine's load average, since the seconds move with it.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import os
import tempfile
from pathlib import Path

from hydra import compose, initialize_config_dir

from polopt.commands.train import CONFIG_DIR, run


def one(overrides: list[str]) -> tuple[dict, list[dict]]:
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=[*overrides, "train.progress=false"])
    with tempfile.TemporaryDirectory() as folder, contextlib.redirect_stdout(io.StringIO()):
        summary = run(cfg, Path(folder))
        history = [json.loads(line) for line in (Path(folder) / "metrics.jsonl").read_text().splitlines()]
    return summary, history


def first_within(history: list[dict], key: str, bound: float) -> str:
    hit = next((r for r in history if r.get(key) is not None and r[key] <= bound), None)
    return "never" if hit is None else f"step {hit['step']} ({hit['seconds']:.1f} s)"


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--skip-sequence", action="store_true")
    parser.add_argument("--betas", default="0.01,0.03,0.1,0.3,1")
    args = parser.parse_args()
    print(f"load average at start: {os.getloadavg()[0]:.1f} (1 min)")
    if not args.skip_sequence:
        summary, history = one(["task=sequence"])
        print(f"task=sequence (model {summary.get('n_responses')} responses/prompt, {summary['steps']} steps): "
              f"TV <= 0.05 at {first_within(history, 'tv_to_optimum', 0.05)}; final TV "
              f"{summary['tv_to_optimum']:.3g}; {summary['seconds']:.1f} s training; "
              f"reached_optimum {summary['reached_optimum']} (tolerance {summary['reached_optimum_tolerance']:g})")
    print("method=selfplay defaults (fixed_point) | gradient self-play; TV to the equilibrium after the default "
          "2000 steps")
    for task in ("nontransitive", "bradley_terry"):
        for beta in args.betas.split(","):
            new, history = one([f"task={task}", f"beta={beta}", "method=selfplay"])
            old, _ = one([f"task={task}", f"beta={beta}", "method=selfplay", "method.update=gradient"])
            print(f"  {task:<14} beta {beta:<5} fixed_point TV {new['tv_to_equilibrium']:.2g}, TV <= 1e-3 at "
                  f"{first_within(history, 'tv_to_optimum', 1e-3)}, {new['seconds']:.1f} s | gradient TV "
                  f"{old['tv_to_equilibrium']:.2g}")


if __name__ == "__main__":
    main()
