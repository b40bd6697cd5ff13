"""``polopt export TASK OUT.json [KEY=VALUE ...]``: write a built-in task out as a finite-task JSON file."""

from __future__ import annotations

import argparse
import sys

from polopt.commands.config import group_options, rewrite_overrides


def main(argv: list[str]) -> int:
    """The ``polopt export`` subcommand."""
    from hydra import compose, initialize_config_dir
    from hydra.utils import instantiate
    from omegaconf import OmegaConf

    from polopt.commands.train import _TASK_RUN_KEYS, CONFIG_DIR

    parser = argparse.ArgumentParser(prog="polopt export",
                                     description="Write a task out as a finite-task JSON file, so that "
                                                 "anyone can check its optimum independently.")
    parser.add_argument("task", help=f"a task option: {', '.join(group_options('task'))}")
    parser.add_argument("out", help="the JSON file to write")
    parser.add_argument("overrides", nargs="*", help="task keys, e.g. task.n_responses=10 task.seed=3")
    args = parser.parse_args(argv)
    try:
        rewrite_overrides([f"task={args.task}"])
        with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
            cfg = compose("config", overrides=[f"task={args.task}", *args.overrides])
        builder = {k: v for k, v in OmegaConf.to_container(cfg.task).items() if k not in _TASK_RUN_KEYS}
        path = instantiate(builder, _convert_="all").save(args.out)
    except Exception as err:  # config and builder errors alike: one line
        cause = err.__cause__ or err
        print(f"polopt export: error: {cause}", file=sys.stderr)
        return 2
    print(f"wrote {path}")
    return 0
