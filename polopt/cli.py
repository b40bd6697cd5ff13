"""``polopt``: the command line. ``python -m polopt`` does the same.

    polopt train [GROUP=OPTION ...] [KEY=VALUE ...]   train one loss on one task (Hydra overrides)
    polopt losses                                      list the registered losses
    polopt export TASK OUT.json [KEY=VALUE ...]        write a built-in task out as a task file
    polopt data FILE [--columns ...] [--max-length N]  check and summarise a preference-pair file
    polopt compare [GROUP=A,B ...] [KEY=VALUE ...]     several losses / methods side by side
    polopt checkpoints RUN_DIR                         verify a run folder's checkpoints (sizes, SHA-256, loading)

``polopt train --help`` lists the config groups and every key.
"""

from __future__ import annotations

import argparse
import sys

_GROUPS = ("loss", "task", "model", "optim", "method")


def _group_options(group: str) -> list[str]:
    from polopt.app import CONFIG_DIR

    return sorted(p.stem for p in (CONFIG_DIR / group).glob("*.yaml"))


def rewrite_overrides(args: list[str]) -> list[str]:
    """Check ``group=option`` overrides before Hydra sees them, so that a typo gets one
    line listing the options, and turn ``loss=pkg.module:name`` into
    ``loss=custom loss.name=pkg.module:name``."""
    out = []
    for arg in args:
        key, eq, value = arg.partition("=")
        if eq and key in _GROUPS and "," not in value:
            options = _group_options(key)
            if key == "loss" and ":" in value:
                out += ["loss=custom", f"loss.name={value}"]
                continue
            if value not in options:
                hint = "; or a dotted path pkg.module:name" if key == "loss" else ""
                raise ValueError(f"unknown {key} {value!r}; choose one of: {', '.join(options)}{hint}")
        out.append(arg)
    return out


def _train(argv: list[str]) -> int:
    from polopt.app import train_main

    try:
        overrides = rewrite_overrides(argv)
    except ValueError as err:
        print(f"polopt train: error: {err}", file=sys.stderr)
        return 2
    sys.argv = ["polopt train", *overrides]
    train_main()
    return 0


def _export(argv: list[str]) -> int:
    from hydra import compose, initialize_config_dir
    from hydra.utils import instantiate
    from omegaconf import OmegaConf

    from polopt.app import _TASK_RUN_KEYS, CONFIG_DIR

    parser = argparse.ArgumentParser(prog="polopt export",
                                     description="Write a task out as a finite-task JSON file, so that "
                                                 "anyone can check its optimum independently.")
    parser.add_argument("task", help=f"a task option: {', '.join(_group_options('task'))}")
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


def _data(argv: list[str]) -> int:
    from polopt.data.command import main as data_main

    return data_main(argv)


def _compare(argv: list[str]) -> int:
    from polopt.compare import main as compare_main

    return compare_main(argv)


def _list_losses(argv: list[str]) -> int:
    from polopt import losses  # imported here: torch loads in seconds, and `polopt data` needs none of it

    for name in losses.names():
        loss = losses.get(name)
        f0, d1, d2 = loss.derivatives_at(0.0)
        convex = {True: "convex", False: "not convex", None: "convexity unknown"}[loss.convex]
        print(f"{name:<20} f'(0)={d1:+.3f} f''(0)={d2:.3f}  {convex:<12} {loss.source}")
    return 0


def _checkpoints(argv: list[str]) -> int:
    from pathlib import Path

    from polopt.checkpoint import list_checkpoints

    parser = argparse.ArgumentParser(prog="polopt checkpoints",
                                     description="Verify every checkpoint of a run folder: size, SHA-256 and "
                                                 "torch.load(weights_only=True); the newest good one is what a "
                                                 "rerun resumes from.")
    parser.add_argument("run_dir", help="a run folder (hydra.run.dir of polopt train)")
    args = parser.parse_args(argv)
    folder = Path(args.run_dir) / "checkpoints"
    if not folder.is_dir():
        print(f"polopt checkpoints: error: {folder} does not exist; give the run folder of a polopt train run",
              file=sys.stderr)
        return 2
    entries = list_checkpoints(folder)
    for e in entries:
        print(f"{e['file']}  step {e['step']:>8}  {'ok' if e['ok'] else 'BAD: ' + e['problem']}")
    good = [e for e in entries if e["ok"]]
    print(f"resume point: {good[-1]['file'] if good else 'none (a rerun starts from step 0)'}")
    return 0 if len(good) == len(entries) else 1


COMMANDS = {
    "train": (_train, "train one loss on one task; Hydra overrides, see 'polopt train --help'"),
    "losses": (_list_losses, "list the registered losses with f'(0), f''(0) and their papers"),
    "export": (_export, "write a built-in task out as a finite-task JSON file"),
    "data": (_data, "check and summarise a preference-pair file (JSONL, CSV, Parquet, folder) without training"),
    "compare": (_compare, "several losses / methods on one task: one table and one plot"),
    "checkpoints": (_checkpoints, "verify a run folder's checkpoints and show the resume point"),
}


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if not argv or argv[0] in ("-h", "--help") or argv[0] not in COMMANDS:
        lines = ["usage: polopt COMMAND [ARGS ...]", "",
                 "Offline preference optimisation on small models, checked against exact optima.", "",
                 "commands:"]
        lines += [f"  {name:<11} {text}" for name, (_, text) in COMMANDS.items()]
        lines += ["", "'polopt COMMAND --help' explains each command."]
        known = not argv or argv[0] in ("-h", "--help")
        print("\n".join(lines), file=sys.stdout if known else sys.stderr)
        if not known:
            print(f"polopt: error: unknown command {argv[0]!r}", file=sys.stderr)
        return 0 if known else 2
    command, _ = COMMANDS[argv[0]]
    return command(argv[1:])


if __name__ == "__main__":
    sys.exit(main())
