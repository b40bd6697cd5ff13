"""``polopt``: the command line. ``python -m polopt`` does the same.

    polopt train [GROUP=OPTION ...] [KEY=VALUE ...]   train one loss on one task (Hydra overrides)
    polopt losses                                      list the registered losses
    polopt export TASK OUT.json [KEY=VALUE ...]        write a built-in task out as a task file
    polopt data FILE [--columns ...] [--max-length N]  check and summarise a preference-pair file
    polopt compare [GROUP=A,B ...] [KEY=VALUE ...]     several losses / methods side by side
    polopt reward [KEY=VALUE ...] [--out DIR]        fit a Bradley–Terry reward model to a task's pairs
    polopt realign [KEY=VALUE ...] [--lambdas L,...]   realignment by lambda against retraining at beta / lambda
    polopt checkpoints RUN_DIR                         verify a run folder's checkpoints (sizes, SHA-256, loading)
    polopt check LOSS [--beta B] [--json] [--plot P]   unit-test a loss against the analytic optimum

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


def _sft(argv: list[str]) -> int:
    from polopt.sft import main as sft_main

    return sft_main(argv)


def _demo(argv: list[str]) -> int:
    from polopt.demo import main as demo_main

    return demo_main(argv)


def _compare(argv: list[str]) -> int:
    from polopt.compare import main as compare_main

    return compare_main(argv)


def _reward(argv: list[str]) -> int:
    from polopt.reward_command import main as reward_main

    return reward_main(argv)


def _realign(argv: list[str]) -> int:
    from polopt.realign_sweep import main as realign_main

    return realign_main(argv)


CHECK_TASKS = ("bradley_terry", "noisy_labels", "nontransitive", "deterministic")


def _parse_params(items: list[str]) -> dict:
    """``--param delta=0.5`` -> {"delta": 0.5}; values are Python literals, else strings."""
    import ast

    params = {}
    for item in items:
        key, eq, value = item.partition("=")
        if not eq or not key:
            raise ValueError(f"--param must look like KEY=VALUE (e.g. --param delta=0.5), got {item!r}")
        try:
            params[key] = ast.literal_eval(value)
        except (ValueError, SyntaxError):
            params[key] = value
    return params


def _check_tasks(names: list[str]) -> tuple[list, dict]:
    """The finite tasks of ``polopt check`` from conf/task (Hydra compose + ``_target_``),
    and the run defaults of conf/config.yaml (beta, train.steps, optim)."""
    from hydra import compose, initialize_config_dir
    from omegaconf import OmegaConf

    from polopt.app import CONFIG_DIR, build_task

    options = _group_options("task")
    tasks = []
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        defaults = compose("config")
        for name in names:
            if name not in options or name in ("file", "pairs"):
                allowed = [o for o in options if o not in ("file", "pairs")]
                raise ValueError(f"--tasks: unknown task {name!r}; choose from: {', '.join(allowed)}")
            tasks.append((name, build_task(compose("config", overrides=[f"task={name}"]).task)))
    return tasks, {"beta": float(defaults.beta), "steps": int(defaults.train.steps),
                   "optim": OmegaConf.to_container(defaults.optim, resolve=True)}


def _check(argv: list[str]) -> int:
    import json
    import re
    import textwrap

    from polopt import check
    from polopt.app import json_ready
    from polopt.train import OptimConfig

    parser = argparse.ArgumentParser(
        prog="polopt check",
        description=textwrap.fill(
            "Unit-test a loss f against the analytic optimum before a big run: elementwise and finite, "
            "f'(0) < 0, convexity, Taylor coefficients and the GPO ratio f''(0)/|f'(0)| with the "
            "equal-regularisation beta of every built-in, the per-pair optimum x*(p) and p = 1, "
            "whether f is a rescaled built-in, and the exact population optimum of small finite tasks "
            "against what the trainer reaches in exact mode. FAIL: the loss cannot do its job; WARN: it "
            "works, but not as one would likely assume (not convex; a rescaled built-in). Exit code 1 on "
            "any failure, 2 on a usage error.", 78),
        epilog="examples:\n  polopt check logistic\n  polopt check huber --param delta=0.5 --beta 0.1\n"
               "  polopt check mypkg.losses:my_loss --json > report.json\n  polopt check mypkg.losses:my_loss "
               "--quick --plot my_loss.png",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    from polopt import losses

    parser.add_argument("loss", help=f"a registered loss ({', '.join(losses.names())}) or a dotted path "
                                     "pkg.module:name to an elementwise f(x)")
    parser.add_argument("--beta", type=float, default=None, help="beta (default: conf/config.yaml's beta)")
    parser.add_argument("--param", action="append", default=[], metavar="KEY=VALUE",
                        help="a loss parameter, e.g. --param delta=0.5 (repeatable)")
    parser.add_argument("--tasks", default=",".join(CHECK_TASKS),
                        help="comma-separated finite tasks for the population check (default: %(default)s)")
    parser.add_argument("--quick", action="store_true", help="skip the population check (no training)")
    parser.add_argument("--steps", type=int, default=None, help="training steps per task "
                                                                "(default: conf/config.yaml's train.steps)")
    parser.add_argument("--tol", type=float, default=1e-3,
                        help="largest TV to the exact optimum (relative loss gap where the optimum is not unique) "
                             "that passes (default: %(default)s)")
    parser.add_argument("--json", action="store_true", help="print the report as JSON (the same facts) instead")
    parser.add_argument("--plot", default=None, metavar="PATH",
                        help="PNG of f, x*(p) and trained vs exact optima (default: check-LOSS.png)")
    parser.add_argument("--no-plot", action="store_true", help="write no PNG")
    args = parser.parse_args(argv)
    try:
        params = _parse_params(args.param)
        loss = check.as_loss(args.loss, **params)
        names = [] if args.quick else [t for t in args.tasks.split(",") if t and t != "none"]
        tasks, defaults = _check_tasks(names)
        beta = defaults["beta"] if args.beta is None else args.beta
        steps = defaults["steps"] if args.steps is None else args.steps
        if not beta > 0:
            raise ValueError(f"--beta must be > 0, got {beta}")
        if steps < 1:
            raise ValueError(f"--steps must be a positive integer, got {steps}")
        if not args.tol > 0:
            raise ValueError(f"--tol must be > 0, got {args.tol}")
    except (ValueError, TypeError) as err:
        print(f"polopt check: error: {err}", file=sys.stderr)
        return 2
    report = check.run_checks(loss, beta=beta, tasks=tasks, steps=steps, optim=OptimConfig(**defaults["optim"]),
                              tol=args.tol, progress=None)
    plot = None
    if not args.no_plot:
        from polopt.report import plot_report

        plot = args.plot or "check-" + re.sub(r"[^A-Za-z0-9_-]+", "_", loss.name) + ".png"
        plot = str(plot_report(report, loss, plot))
    if args.json:
        print(json.dumps(json_ready({**report.to_dict(), "plot": plot, "steps": steps}), indent=1))
    else:
        print(check.format_report(report))
        if plot:
            print(f"plot: {plot}")
    return 1 if report.failures else 0


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
    "sft": (_sft, "train the tiny transformer on plain text and save it as a reference model (task.reference)"),
    "demo": (_demo, "the end-to-end walk-through: SFT, sampled pairs, a biased judge, training, win-rates, plots"),
    "compare": (_compare, "several losses / methods on one task: one table and one plot"),
    "reward": (_reward, "fit a Bradley–Terry reward model to a task's pairs (method.reward=PATH optimises it)"),
    "realign": (_realign, "decoding-time realignment against retraining over a grid of lambda: table and plot"),
    "checkpoints": (_checkpoints, "verify a run folder's checkpoints and show the resume point"),
    "check": (_check, "unit-test a loss against the analytic optimum; exit code 1 on any failure"),
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
