"""``polopt export TASK OUT.json [task.KEY=VALUE ...]``: write a built-in task out as a finite-task JSON file."""

from __future__ import annotations

import argparse

from polopt.commands import config


def main(argv: list[str]) -> int:
    """The ``polopt export`` subcommand."""
    parser = argparse.ArgumentParser(prog="polopt export",
                                     description="Write a task out as a finite-task JSON file, so that "
                                                 "anyone can check its optimum independently.",
                                     epilog="example: polopt export bradley_terry bt.json task.n_responses=4")
    parser.add_argument("task", help=f"a task option: {', '.join(config.group_options('task'))}")
    parser.add_argument("out", help="the JSON file to write")
    parser.add_argument("overrides", nargs="*", metavar="task.KEY=VALUE",
                        help="task keys as for polopt train, e.g. task.n_responses=10 task.seed=3")
    args = parser.parse_intermixed_args(argv)
    cfg = config.compose([f"task={args.task}", *args.overrides], command="polopt export")
    config.only_keys(args.overrides, ("task.",), "polopt export")
    path = config.build_task(cfg.task).save(args.out)
    print(f"wrote {path}")
    return 0
