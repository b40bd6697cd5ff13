"""``polopt check LOSS``: the command line of the loss battery (:mod:`polopt.check` holds the checks)."""

from __future__ import annotations

import argparse
import sys

from polopt.commands.config import group_options

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


def check_tasks(names: list[str]) -> tuple[list, dict]:
    """The finite tasks of ``polopt check`` from conf/task (Hydra compose + ``_target_``),
    and the run defaults of conf/config.yaml (beta, train.steps, optim)."""
    from hydra import compose, initialize_config_dir
    from omegaconf import OmegaConf

    from polopt.commands.train import CONFIG_DIR, build_task

    options = group_options("task")
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


def main(argv: list[str]) -> int:
    """The ``polopt check`` subcommand."""
    import json
    import re
    import textwrap

    from polopt import check
    from polopt.optim import OptimConfig
    from polopt.run_folder import json_ready

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
        tasks, defaults = check_tasks(names)
        pair = getattr(loss, "margin", True) is None  # a pair objective (not a margin loss)
        noisy = check_tasks(["noisy_labels"])[0][0][1] if pair else None  # its optimum's finiteness
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
                              tol=args.tol, progress=None, noisy_task=noisy)
    plot = None
    if not args.no_plot and not pair:  # the plot draws f(x) and x*(p): margin losses only
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
