"""``polopt reward``: fit a Bradley–Terry reward model to a task's pairs and write it out.

    polopt reward task=bradley_terry task.mode=sampled task.n_pairs=2000 train.seed=0 hydra.run.dir=runs/rm

The same ``key=value`` overrides as ``polopt train`` (Hydra's compose API on
conf/config.yaml), plus the ``reward`` block (``reward.l2``, ``reward.heldout``,
``reward.bins``, ``reward.steps``, ``reward.lr``). The task does the fitting
(``task.fit_reward(...)``: a table on finite tasks, a scalar head on the tiny
transformer for the sequence task and pair files, a linear head on a local causal LM's last hidden
state for ``task=pairs model=local_lm``) and returns the summary and the file's fields;
this module writes ``reward.pt``, ``summary.json`` and ``config.yaml`` into the
output folder. Give ``method.reward=OUT/reward.pt`` to ``method=best_of_n`` or
``method=rl`` to optimise against it.

``reward.kind=preference`` fits P(y > y' | x) directly instead (no Bradley–Terry assumption:
:mod:`polopt.methods.preference_model`), writes ``preference.pt`` (give it to
``method=selfplay method.preference=PATH``) and reports its held-out accuracy beside that of the
Bradley–Terry fit on the same split.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

# what polopt reward reads: the task and its model, the fit's own block, the seed of the split, the threads
KEYS = ("task", "task.", "model", "model.", "reward.", "train.seed", "train.threads", "+experiment")
FINITE_UNUSED = ("reward.steps", "reward.lr")  # a finite task's table is a maximum-likelihood fit: no Adam


def fit(overrides: list[str], out: Path) -> dict:
    """Compose the config, fit the task's reward model, write the folder; return summary.json's content."""
    import torch
    from omegaconf import OmegaConf

    from polopt.checkpoints.store import atomic_write
    from polopt.commands.config import build_task, compose
    from polopt.commands.train import check_complete
    from polopt.methods.preference_model import check_fit_kind
    from polopt.methods.reward_model import save_reward_model
    from polopt.training.run_folder import write_json

    cfg = compose(overrides, command="polopt reward")  # every key checked; the task by the allow-list
    check_complete(cfg)
    task = build_task(cfg.task)
    if not hasattr(task, "fit_reward"):
        raise ValueError(f"task {cfg.task.get('_target_')!r} cannot fit a reward model; polopt reward takes a "
                         "finite task (bradley_terry, contextual, file, ...) or task=sequence")
    keys = OmegaConf.to_container(cfg.reward, resolve=True)
    kind = check_fit_kind(keys["kind"])
    if _fits_a_table(task):
        unused = [a for a in overrides if a.partition("=")[0].lstrip("+~") in FINITE_UNUSED
                  or a.partition("=")[0].lstrip("+~").partition(".")[0] == "model"]
        if unused:
            raise ValueError(f"{', '.join(unused)}: task {cfg.task.get('_target_', '?')!r} fits a table by maximum "
                             "likelihood (no model, no Adam steps) and would ignore it; model and reward.steps / "
                             "reward.lr apply to task=sequence and task=pairs")
    torch.set_num_threads(int(cfg.train.get("threads") or 1))  # tiny models: one thread (see train.threads)
    started = time.perf_counter()
    fitted = task.fit_reward(kind=kind, mode=cfg.task.mode, n_pairs=cfg.task.n_pairs, seed=int(cfg.train.seed),
                             l2=keys["l2"], heldout=keys["heldout"], bins=keys["bins"], steps=keys["steps"],
                             lr=keys["lr"], model=OmegaConf.to_container(cfg.model, resolve=True))
    summary, payload = fitted["summary"], dict(fitted["file"])
    summary["seconds"] = time.perf_counter() - started
    out.mkdir(parents=True, exist_ok=True)
    atomic_write(out / "config.yaml", OmegaConf.to_yaml(cfg, resolve=True).encode())
    name = "preference.pt" if kind == "preference" else "reward.pt"
    path = save_reward_model(out / name, payload.pop("kind"), payload.pop("identity"), payload.pop("state"),
                             **payload)
    summary["preference_model" if kind == "preference" else "reward_model"] = str(path)
    summary["screen"] = fitted["screen"]
    write_json(out / "summary.json", {k: v for k, v in summary.items() if k != "screen"})
    return summary


def _fits_a_table(task) -> bool:
    """Whether the task fits a table (a finite task: closed form or scipy) rather than a head with Adam."""
    from toy_tasks.finite.task import FiniteTask

    return isinstance(task, FiniteTask)


def main(argv: list[str]) -> int:
    """The ``polopt reward`` subcommand."""
    parser = argparse.ArgumentParser(
        prog="polopt reward",
        description="Fit a Bradley–Terry reward model by maximum likelihood to a task's pairs: a table of rewards per "
                    "prompt on finite tasks, a scalar head on the tiny transformer for task=sequence and task=pairs, "
                    "a linear head on a local causal LM's last hidden state for task=pairs model=local_lm. Writes "
                    "reward.pt (give it to method.reward=PATH) and summary.json (rewards, pair_counts, "
                    "heldout_accuracy, calibration_error, the distance to the true rewards). "
                    "reward.kind=preference fits P(y > y' | x) itself (a table on finite tasks, an antisymmetric "
                    "pair head otherwise), writes "
                    "preference.pt (give it to method=selfplay method.preference=PATH) and reports its held-out "
                    "accuracy beside the Bradley–Terry fit's on the same split.",
        epilog="example: polopt reward task=bradley_terry task.mode=sampled task.n_pairs=2000 train.seed=0 "
               "hydra.run.dir=runs/rm")
    parser.add_argument("overrides", nargs="*", help="key=value overrides as for 'polopt train' (and reward.kind, "
                                                     "reward.l2, reward.heldout, reward.bins, reward.steps, "
                                                     "reward.lr); "
                                                     "hydra.run.dir=DIR: the output folder (default "
                                                     "runs/reward/DATE/TIME)")
    args = parser.parse_intermixed_args(argv)
    from polopt.commands.config import only_keys, output_folder

    out, overrides = output_folder(args.overrides, "polopt reward", "reward")
    only_keys(overrides, KEYS, "polopt reward")
    summary = fit(overrides, out)  # a user error: one line by polopt.commands.errors
    print(summary["screen"])
    if "preference_model" in summary:
        hint = "  (give it to method=selfplay method.preference=PATH)" if summary["task"] != "pairs" else ""
        print(f"preference model: {summary['preference_model']}{hint}")
        return 0
    hint = "  (give it to method.reward=PATH)" if summary.get("rewards") is not None else ""
    print(f"reward model: {summary['reward_model']}{hint}")
    return 0
