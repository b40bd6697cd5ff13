"""``polopt check LOSS [loss.KEY=VALUE] [beta=B] [train.steps=N] [optim.KEY=VALUE]``: the command line of the
loss battery (:mod:`polopt.checks.margin` holds the checks). Its config keys are ``polopt train``'s; flags only for
what is not a config key (``--tasks``, ``--quick``, ``--tol``, ``--json``, ``--plot``)."""

from __future__ import annotations

import argparse
import sys
import textwrap
import time

from polopt.commands import config

CHECK_TASKS = ("bradley_terry", "noisy_labels", "nontransitive", "deterministic")
CHECK_TASKS_DEFAULT = ",".join(CHECK_TASKS)
GROUP_TASK = "bradley_terry task.n_responses=4"  # a group objective's population checks (seconds per solve)
KEYS = ("loss", "loss.", "beta", "train.steps", "optim", "optim.")  # the config keys the check reads


def check_tasks(names: list[str]) -> list[tuple[str, object]]:
    """The finite tasks of ``polopt check`` from conf/task, built by :func:`polopt.commands.config.build_task`."""
    allowed = [o for o in config.group_options("task") if o not in ("file", "pairs")]
    tasks = []
    for name in names:
        if name not in allowed:
            raise ValueError(f"--tasks: unknown task {name!r}; choose from: {', '.join(allowed)}")
        tasks.append((name, config.build_task(config.compose([f"task={name}"]).task)))
    return tasks


def group_check_tasks() -> tuple[object, object]:
    """The finite tasks of a group objective's population checks: :data:`GROUP_TASK` (rewards, so every
    feedback kind has a population) and the same task with every reward equal (no signal)."""
    overrides = [f"task={GROUP_TASK.split()[0]}", *GROUP_TASK.split()[1:]]
    signal = config.build_task(config.compose(overrides).task)
    silent = config.build_task(config.compose([*overrides, "task.reward_scale=0"]).task)
    return signal, silent


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="polopt check",
        description=textwrap.fill(
            "Unit-test a loss f against the analytic optimum before a big run: elementwise and finite, "
            "f'(0) < 0, convexity, Taylor coefficients and the GPO ratio f''(0)/|f'(0)| with the "
            "equal-regularisation beta of every built-in, the per-pair optimum x*(p) and p = 1, "
            "whether f is a rescaled built-in, and the exact population optimum of small finite tasks "
            "against what the trainer reaches in exact mode. A group objective f(group, beta) gets the checks "
            "that apply, per feedback kind it reads: one loss per group, finite, the pull towards the reference "
            "with no signal, the reward of better responses, its exact optimum or stationary point on a noisy "
            "task, and where gradient descent from the reference ends (a non-convex objective's local minimum "
            "warns; a wrong-sign one fails). FAIL: the loss cannot do its job; WARN: it "
            "works, but not as one would likely assume (not convex; a rescaled built-in). Config keys as for "
            "polopt train: loss.KEY=VALUE (the loss's parameters), beta=, train.steps=, optim.KEY=. "
            "A progress line per check goes to stderr. Exit code 1 on any failure, 2 on a usage error.", 78),
        epilog="examples:\n  polopt check logistic\n  polopt check huber loss.delta=0.5 beta=0.1\n"
               "  polopt check ranking_likelihood\n"
               "  polopt check mypkg.losses:my_loss --json > report.json\n  polopt check mypkg.losses:my_loss "
               "--quick --plot my_loss.png",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    builtins = [o for o in config.group_options("loss") if o != "custom"]
    parser.add_argument("loss", help=f"a loss option ({', '.join(builtins)}) or a dotted path "
                                     "pkg.module:name to an elementwise f(x)")
    parser.add_argument("overrides", nargs="*", metavar="KEY=VALUE",
                        help="config keys as for polopt train: loss.KEY (e.g. loss.delta=0.5; a parameter of "
                             "your own loss: +loss.KEY=VALUE), beta, train.steps, optim.KEY")
    parser.add_argument("--tasks", default=CHECK_TASKS_DEFAULT,
                        help="comma-separated finite tasks for the population check (default: %(default)s)")
    parser.add_argument("--quick", action="store_true", help="skip the population check (no training)")
    parser.add_argument("--tol", type=float, default=1e-3,
                        help="largest TV to the exact optimum (relative loss gap where the optimum is not unique) "
                             "that passes (default: %(default)s)")
    parser.add_argument("--json", action="store_true", help="print the report as JSON (the same facts) instead")
    parser.add_argument("--plot", default=None, metavar="PATH",
                        help="PNG of f, x*(p) and trained vs exact optima (default: check-LOSS.png)")
    parser.add_argument("--no-plot", action="store_true", help="write no PNG")
    return parser


def _progress(start: float):
    """One stderr line per finished check: its name, status and the elapsed time."""
    def log(result, seconds: float) -> None:
        total = time.perf_counter() - start
        print(f"  {result.name:<28} {result.status.upper():<5} {seconds:6.1f} s  (total {total:.1f} s)",
              file=sys.stderr, flush=True)
    return log


def main(argv: list[str]) -> int:
    """The ``polopt check`` subcommand."""
    args = build_parser().parse_intermixed_args(argv)  # before the imports below: --help loads no torch
    import json
    import re

    from omegaconf import OmegaConf

    from polopt import losses
    from polopt.checks import margin as check
    from polopt.losses.group_objective import GroupObjective
    from polopt.losses.reduce import validate_hyperparameters
    from polopt.training.optim import OptimConfig
    from polopt.training.run_folder import json_ready

    if args.loss.startswith("method="):
        raise ValueError(f"polopt check takes a loss, got {args.loss!r}: a method's check is its run against its exact "
                         "target, polopt train METHOD task=bradley_terry (summary.json: optimum, tv_to_optimum, "
                         "reached_optimum; method=group adds kl_regularised_optimum), or several side by side with "
                         "polopt compare (docs/guides/feedback-beyond-pairs.md)")
    loss_arg = args.loss.removeprefix("loss=")
    cfg = config.compose([f"loss={loss_arg}", *args.overrides], command="polopt check")
    config.only_keys(args.overrides, KEYS, "polopt check")
    params = {k: v for k, v in OmegaConf.to_container(cfg.loss, resolve=True).items() if k not in ("name", "smoothing")}
    loss = losses.resolve(cfg.loss.name, **params)
    group = isinstance(loss, GroupObjective)
    if group and args.tasks != CHECK_TASKS_DEFAULT:
        raise ValueError(f"--tasks chooses the pair tasks of margin and pair losses; group objective {loss.name!r} is "
                         f"checked on {GROUP_TASK} (with rewards, and with every reward equal): leave --tasks out, "
                         f"got --tasks {args.tasks}")
    beta, steps = float(cfg.beta), cfg.train.steps
    validate_hyperparameters(beta)
    if not isinstance(steps, int) or steps < 1:
        raise ValueError(f"train.steps must be a positive integer, got {steps!r}")
    if not args.tol > 0:
        raise ValueError(f"--tol must be > 0, got {args.tol}")
    tasks = check_tasks([] if args.quick or group else [t for t in args.tasks.split(",") if t and t != "none"])
    pair = getattr(loss, "margin", True) is None  # a pair objective (not a margin loss)
    noisy = check_tasks(["noisy_labels"])[0][1] if pair and not group else None  # its optimum's finiteness
    group_tasks = None if args.quick or not group else group_check_tasks()
    count = 2 + 4 * len(loss.reads) if group_tasks else 2 if group else 7 + len(tasks)
    start = time.perf_counter()
    print(f"polopt check: {loss.name} at beta = {beta:g}: {count} checks", file=sys.stderr, flush=True)
    report = check.run_checks(loss, beta=beta, tasks=tasks, steps=steps,
                              optim=OptimConfig(**OmegaConf.to_container(cfg.optim, resolve=True)),
                              tol=args.tol, progress=False, on_check=_progress(start),
                              noisy_task=noisy, group_tasks=group_tasks)
    plot = None
    if not args.no_plot and not pair and not group:  # the plot draws f(x) and x*(p): margin losses only
        from polopt.checks.plot import plot_report

        plot = args.plot or "check-" + re.sub(r"[^A-Za-z0-9_-]+", "_", loss.name) + ".png"
        plot = str(plot_report(report, loss, plot))
    if args.json:
        print(json.dumps(json_ready({**report.to_dict(), "plot": plot, "steps": steps}), indent=1))
    else:
        print(check.format_report(report))
        if plot:
            print(f"plot: {plot}")
    return 1 if report.failures else 0
