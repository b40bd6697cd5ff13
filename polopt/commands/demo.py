"""``polopt demo [KEY=VALUE ...]``: the command line of the end-to-end walk-through
(:mod:`polopt.demo.pipeline` does the work). Its config keys are ``polopt train``'s (:data:`KEYS`);
``hydra.run.dir=DIR`` chooses the folder, as for every command; flags only for what is not a key
(``--betas``, ``--bias``, ``--quick``, ...). Imports no torch until it runs."""

from __future__ import annotations

import argparse
import dataclasses

# polopt train's config keys the demo reads -> the DemoConfig field each sets
KEYS = {"loss": "loss", "beta": "beta", "train.steps": "steps", "train.batch_size": "batch_size", "train.seed": "seed",
        "optim.lr": "lr", "optim.warmup_steps": "warmup_steps", "task.n_pairs": "n_pairs", "model.width": "width",
        "model.layers": "layers", "model.heads": "heads", "train.threads": "threads", "train.progress": "progress"}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="polopt demo",
        description="The end-to-end walk-through on an invented weather-station bot: SFT reference -> sample "
                    "pairs from it -> label them with a position-biased judge -> train with any loss -> win-rate "
                    "(ground truth, with a Wilson interval), judge win-rate without and with order swapping, KL, "
                    "and a KL vs win-rate frontier across beta. Config keys as for polopt train: "
                    + ", ".join(KEYS) + ".",
        epilog="examples:\n  polopt demo\n  polopt demo loss=squared hydra.run.dir=runs/demo-squared\n"
               "  polopt demo loss=hinge train.steps=100 --betas 0.1,0.3\n  polopt demo --quick   # seconds, "
               "checks the mechanics only", formatter_class=argparse.RawDescriptionHelpFormatter)
    from polopt.demo.settings import DemoConfig

    d = DemoConfig()
    parser.add_argument("overrides", nargs="*", metavar="KEY=VALUE",
                        help=f"config keys as for polopt train (defaults: loss={d.loss} beta={d.beta} "
                             f"train.steps={d.steps} optim.lr={d.lr} task.n_pairs={d.n_pairs} train.threads=1); "
                             "hydra.run.dir=DIR: the output folder (default runs/demo/DATE/TIME)")
    parser.add_argument("--betas", default=",".join(f"{b:g}" for b in d.betas),
                        help="comma-separated betas of the frontier (default %(default)s)")
    parser.add_argument("--bias", type=float, default=d.bias, help="the judge's position bias (default %(default)s)")
    for name, help_text in (("sft_steps", "SFT steps"), ("sft_examples", "SFT examples"),
                            ("eval_samples", "comparisons per evaluation")):
        parser.add_argument(f"--{name.replace('_', '-')}", dest=name, type=int, default=getattr(d, name),
                            help=f"{help_text} (default %(default)s)")
    parser.add_argument("--quick", action="store_true", help="a reduced configuration that runs in seconds "
                                                             "(mechanics only; its figures mean little)")
    return parser


def _given(overrides: list[str]) -> dict:
    """The DemoConfig fields the user's ``key=value`` overrides set, checked against polopt train's config."""
    from omegaconf import OmegaConf

    from polopt.commands import config

    keys = [o.partition("=")[0] for o in overrides]
    model = ["model=transformer"] if any(k.startswith("model.") for k in keys) else []
    cfg = config.compose([*model, *overrides], command="polopt demo")
    config.only_keys(overrides, tuple(KEYS), "polopt demo")
    values = {}
    for key in keys:
        value = cfg.loss.name if key == "loss" else OmegaConf.select(cfg, key)
        values[KEYS[key]] = value
    return values


def config_from_args(args: argparse.Namespace) -> tuple:
    """The demo's config (a DemoConfig) and the run keys (threads, progress) from the command line."""
    from polopt.demo.settings import QUICK, DemoConfig

    try:
        betas = tuple(float(b) for b in args.betas.split(",") if b.strip())
    except ValueError:
        raise ValueError(f"--betas must be comma-separated numbers, e.g. 0.1,0.3, got {args.betas!r}") from None
    given = _given(args.overrides)
    run_keys = {"threads": given.pop("threads", 1), "progress": given.pop("progress", True)}
    flags = {k: getattr(args, k) for k in ("bias", "sft_steps", "sft_examples", "eval_samples")}
    cfg = DemoConfig(**{**flags, "betas": betas, **given})
    if args.quick:
        defaults = DemoConfig()
        quick = {k: v for k, v in QUICK.items() if getattr(cfg, k) == getattr(defaults, k)}  # given keys win
        cfg = dataclasses.replace(cfg, **quick)
    return cfg, run_keys


def main(argv: list[str] | None = None) -> int:
    """The ``polopt demo`` subcommand."""
    args = build_parser().parse_intermixed_args(argv)  # before the imports below: --help loads no torch
    import torch

    from polopt.commands.config import output_folder
    from polopt.demo.pipeline import check_config, run_demo

    out, args.overrides = output_folder(args.overrides, "polopt demo", "demo")
    cfg, run_keys = config_from_args(args)
    check_config(cfg)
    if run_keys["threads"]:
        torch.set_num_threads(int(run_keys["threads"]))
    summary = run_demo(cfg, out, progress=bool(run_keys["progress"]))
    lo, hi = summary["win_rate_ci"]
    print(f"win_rate {summary['win_rate']:.3f} [{lo:.3f}, {hi:.3f}] over the reference (ground truth, "
          f"{summary['wins']} wins, {summary['defeats']} defeats, {summary['ties']} ties); "
          f"judge_win_rate_policy_first {summary['judge_win_rate_policy_first']:.3f}, "
          f"judge_win_rate_both_orders {summary['judge_win_rate_both_orders']:.3f}; "
          f"kl_to_reference {summary['kl_to_reference']:.3f}; {summary['seconds']:.0f} s")
    print(f"output folder: {out} (summary.json, training_curves.png, frontier.png)")
    return 0
