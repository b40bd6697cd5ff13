"""``polopt realign``: decoding-time realignment against retraining, over a grid of lambda.

    polopt realign +experiment=sequence loss=logistic --lambdas 0.25,0.5,1,2,4

One offline run at ``beta`` (its summary carries ``realigned``: for each lambda
the mixed policy and its TV to the optimum re-solved at beta / lambda, see
``method.realign``), then one ordinary run retrained at ``beta / lambda`` for
each lambda other than 0 and 1 (lambda = 1 is the run itself). The table
(realign.txt, .csv, .json) and the plot (realign.png) give, per lambda, the TV
to the exact optimum at beta / lambda of:

- ``geometric``: the sequence-level mixture pi_ref^{1 - lambda} pi^lambda / Z;
- ``per_token``: per-token mixing of the two models' logits (sequence tasks);
- ``per_token_exact``: per-token mixing of the exact optimum at beta, which has
  no training error: the error of per-token mixing itself (sequence tasks);
- ``retrained``: the policy trained at beta / lambda;

and the TV between the mixtures and the retrained policy. Every run is an
ordinary training run (:func:`polopt.commands.train.run`) in a sub-folder.
"""

from __future__ import annotations

import argparse
import contextlib
import io
from pathlib import Path

import numpy as np

from polopt.commands.compare import write_tables

COLUMNS = ("lambda", "beta_equivalent", "tv_geometric", "tv_per_token", "tv_per_token_exact", "tv_retrained",
           "tv_per_token_to_retrained", "tv_geometric_to_retrained", "kl_per_token", "kl_retrained")
SERIES = (("tv_geometric", "sequence-level mixture pi_ref^(1-lambda) pi^lambda / Z", "o-"),
          ("tv_per_token", "per-token mixing of the models' logits", "s-"),
          ("tv_per_token_exact", "per-token mixing of the exact optimum (no training error)", "^--"),
          ("tv_retrained", "retrained at beta / lambda", "d-"),
          ("tv_per_token_to_retrained", "per-token mixing vs retrained (TV between them)", "x:"))
PLOT_FLOOR = 1e-5  # TVs below this (the exact cases) are drawn on the floor line


def parse_lambdas(text: str) -> list[float]:
    """``"0.25,0.5,1"`` -> [0.25, 0.5, 1.0]; each a finite number >= 0."""
    try:
        values = [float(v) for v in text.split(",") if v.strip()]
    except ValueError:
        values = []
    if not values or not all(0.0 <= v < float("inf") for v in values):
        raise ValueError(f"--lambdas must be a comma list of finite numbers >= 0, e.g. 0.25,0.5,1,2,4; got {text!r}")
    return values


def tv(p, q, weights) -> float:
    """Prompt-weighted total variation between two per-prompt distributions (lists of lists)."""
    p, q = np.asarray(p, dtype=np.float64), np.asarray(q, dtype=np.float64)
    return float(np.asarray(weights) @ (0.5 * np.abs(p - q).sum(1)))


def rows(base: dict, retrained: dict[float, dict]) -> list[dict]:
    """One row per lambda from the base run's ``realigned`` entries and the retrained summaries."""
    weights = base["prompt_weights"]
    out = []
    for entry in base["realigned"]:
        lam = entry["lambda"]
        other = retrained.get(lam)
        if lam == 1.0:
            other = base
        elif lam == 0.0:
            other = {"policy": base["reference"], "tv_to_optimum": 0.0, "kl_to_reference": 0.0}
        per_token = entry.get("per_token_policy")
        out.append({
            "lambda": lam, "beta_equivalent": entry["beta_equivalent"],
            "tv_geometric": entry["tv_to_optimum"], "tv_per_token": entry.get("per_token_tv_to_optimum"),
            "tv_per_token_exact": entry.get("per_token_exact_tv_to_optimum"),
            "tv_retrained": None if other is None else other.get("tv_to_optimum"),
            "tv_per_token_to_retrained": None if other is None or per_token is None else tv(
                per_token, other["policy"], weights),
            "tv_geometric_to_retrained": None if other is None else tv(entry["policy"], other["policy"], weights),
            "kl_per_token": entry.get("per_token_kl_to_reference"),
            "kl_retrained": None if other is None else other.get("kl_to_reference")})
    return out


def _fmt(value) -> str:
    return "-" if value is None else f"{value:.3g}"


def render(table: list[dict], base: dict) -> str:
    head = ["lambda", "beta/lambda", "geometric", "per_token", "per_token_exact", "retrained", "per_token~retrained",
            "geometric~retrained"]
    body = [[f"{r['lambda']:g}", f"{r['beta_equivalent']:g}", *(_fmt(r[k]) for k in COLUMNS[2:8])] for r in table]
    widths = [max(len(line[c]) for line in [head, *body]) for c in range(len(head))]
    lines = [f"task {base.get('task')}  loss {base.get('loss_name')}  beta {base['beta']:g}: TV to the exact optimum "
             "at beta / lambda (a~b: TV between a and b)"]
    lines += ["  ".join(cell.ljust(w) for cell, w in zip(line, widths, strict=True)) for line in [head, *body]]
    return "\n".join(lines)


def plot(table: list[dict], path: Path, base: dict) -> Path:
    """TV per lambda, log axes: the mixtures and retraining against the exact optimum at beta / lambda."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    shown = [r for r in table if r["lambda"] > 0]
    fig, ax = plt.subplots(figsize=(7.5, 4.8))
    for key, text, style in SERIES:
        points = [(r["lambda"], r[key]) for r in shown if r[key] is not None]
        if points:
            ax.plot(*zip(*[(lam, max(v, PLOT_FLOOR)) for lam, v in points], strict=True), style, label=text)
    ax.axhline(PLOT_FLOOR, color="grey", linewidth=0.8)
    ax.annotate(f"below {PLOT_FLOOR:g} (exact: lambda = 1 is the trained policy itself)", (0.01, 0.02),
                xycoords="axes fraction", fontsize=7, color="grey")
    ax.set_xscale("log", base=2)
    lambdas = [r["lambda"] for r in shown]
    ax.set_xticks(lambdas, [f"{lam:g}" for lam in lambdas])
    ax.set_ylim(PLOT_FLOOR / 2, 1.5)  # TV lies in [0, 1]; set first, as all points may lie on the floor
    ax.set_yscale("log")
    ax.set_xlabel("lambda (emulates beta / lambda; 1: the trained policy)")
    ax.set_ylabel("total variation")
    ax.set_title(f"realignment on {base.get('task')} ({base.get('loss_name')}, beta={base['beta']:g}): "
                 "TV to the optimum at beta / lambda", fontsize=9)
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def realign_sweep(overrides: list[str], lambdas: list[float], out: Path, *, retrain: bool = True,
                  progress: bool = True) -> dict:
    """The base run, the retrained runs, the table and the plot under ``out``; returns the table."""
    from hydra import compose, initialize_config_dir
    from tqdm.auto import tqdm

    from polopt.commands.config import rewrite_overrides
    from polopt.commands.train import CONFIG_DIR, run

    out.mkdir(parents=True, exist_ok=True)
    listed = ",".join(repr(v) for v in lambdas)
    common = [*rewrite_overrides(overrides), "method=offline", "train.progress=false"]
    retrain_at = [lam for lam in lambdas if lam not in (0.0, 1.0)] if retrain else []
    summaries: dict[float, dict] = {}
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        bar = tqdm(total=1 + len(retrain_at), desc="realign", disable=not progress)
        cfg = compose("config", overrides=[*common, f"method.realign=[{listed}]"])
        beta = float(cfg.beta)
        with contextlib.redirect_stdout(io.StringIO()) as text:
            base = run(cfg, out / "base")
        (out / "base" / "report.txt").write_text(text.getvalue(), encoding="utf-8")
        bar.update()
        for lam in retrain_at:
            folder = out / f"beta_over_{lam:g}"
            cfg = compose("config", overrides=[*common, f"beta={beta / lam!r}"])
            with contextlib.redirect_stdout(io.StringIO()) as text:
                summaries[lam] = run(cfg, folder)
            (folder / "report.txt").write_text(text.getvalue(), encoding="utf-8")
            bar.update()
        bar.close()
    table = rows(base, summaries)
    text = render(table, base)
    result = {"task": base.get("task"), "loss": base.get("loss_name"), "beta": beta, "overrides": overrides,
              "rows": table}
    write_tables(out / "realign", text, table, COLUMNS, result)
    plot(table, out / "realign.png", base)
    return {**result, "table": text}


def main(argv: list[str]) -> int:
    """The ``polopt realign`` subcommand."""
    parser = argparse.ArgumentParser(
        prog="polopt realign",
        description="Decoding-time realignment against retraining: train once at beta, mix the reference and "
                    "the trained policy with weight lambda (the sequence-level mixture, and on sequence tasks "
                    "per-token mixing of the logits), retrain at beta / lambda, and tabulate and plot each one's "
                    "TV to the exact optimum at beta / lambda. Writes realign.txt/.csv/.json/.png.",
        epilog="example: polopt realign +experiment=sequence loss=logistic --lambdas 0.25,0.5,1,2,4")
    parser.add_argument("overrides", nargs="*", help="Hydra overrides as for 'polopt train' (no sweeps); "
                                                     "hydra.run.dir=DIR: the folder (default runs/realign/DATE/TIME)")
    parser.add_argument("--lambdas", default="0.25,0.5,1,2,4", help="comma list of lambdas (default %(default)s)")
    parser.add_argument("--no-retrain", action="store_true", help="only the mixtures, no retrained runs")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    args = parser.parse_intermixed_args(argv)
    from polopt.commands import config  # after parsing: --help loads no torch
    from polopt.commands.train import precheck

    out, overrides = config.output_folder(args.overrides, "polopt realign", "realign")
    lambdas = parse_lambdas(args.lambdas)
    precheck(config.compose_all(overrides, command="polopt realign")[0])  # before any folder is made
    result = realign_sweep(overrides, lambdas, out, retrain=not args.no_retrain, progress=not args.quiet)
    print(result["table"])
    print(f"realign folder: {out}")
    return 0
