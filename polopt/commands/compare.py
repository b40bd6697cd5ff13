"""``polopt compare``: several losses and methods on one task, one table and one plot.

    polopt compare task=nontransitive loss=logistic,squared,hinge method=offline,selfplay beta=0.5

Comma lists (and Hydra's other sweep forms, e.g. ``range()``) expand to their
Cartesian product, as with ``polopt train -m``. Each combination is one ordinary
training run (:func:`polopt.commands.train.run`) in a sub-folder of the comparison folder;
then one table (comparison.txt, .csv, .json) and one plot (comparison.png) hold
for every run: KL to the reference, the win rate over the reference
P(pi > pi_ref), the expected reward where the task has rewards, the TV distance
to the run's own exact optimum and to the Nash equilibrium of the regularised
preference game (tau = beta / 2), whether the run reached its optimum, and what
the optimum does: the winners' mean log-ratio (likelihood displacement) and the
mean response length against the reference's (length exploitation); steps and
seconds. Pair objectives compare as margin losses do: ``loss=divergence_forward_kl,length_normalised_free``.
Group objectives and feedback kinds too (``task.feedback=ranking loss=ranking_likelihood,flip_corrected_logistic``),
each run against its own minimiser or stationary point (``optimum_kind``); ``method=group`` runs add the TV from
the update's stationary point to ``pi_ref e^{r / beta}`` (``tv_optimum_to_kl_regularised_optimum``). A group
session measures no win rate and no equilibrium: those cells stay empty.

A pair file (``task=pairs``, with the built-in transformer or ``model=local_lm``) has no exact optimum,
no population to measure a win rate on and no sample of the policy to estimate a KL from: when no run
has those measures the table shows what every pair run's summary.json holds instead (:data:`PAIR_SHOWN`:
the final loss over every accepted pair, ``margin_mean``, ``pair_accuracy``, the winners' and losers'
mean log-ratios, steps, seconds), and the plot those (``polopt evaluate RUN`` samples from a local LM
run's policy).

Why a loop over Hydra's compose API rather than Hydra's multirun sweeper: the
table needs every run's summary in one process, which the sweeper's launcher
does not hand back to the app; the loop also skips duplicate runs (methods other
than ``offline`` do not read the ``loss`` group, so ``loss=a,b method=rl`` is
one rl run). Hydra's own override parser expands the sweeps, so they mean what
they mean to ``-m``.
"""

from __future__ import annotations

import argparse
import contextlib
import csv
import io
import itertools
import json
from pathlib import Path

from polopt.methods import overoptimisation

# summary.json's own key names, so that the table, the CSV and the run folders say the same thing
COLUMNS = ("run", "method", "loss_name", "beta", "kl_to_reference", "win_rate_over_reference", "expected_reward",
           "optimum_kind", "tv_to_optimum", "tv_optimum_to_kl_regularised_optimum", "tv_to_equilibrium",
           "reached_optimum", "optimum_logratio_winner", "optimum_mean_length",
           "reference_mean_length", "steps", "seconds", "learned_reward", "true_reward", "reward_model")
# the table's columns as printed, with the number format of each
SHOWN = (("beta", "g"), ("kl_to_reference", ".4f"), ("win_rate_over_reference", ".4f"), ("expected_reward", ".4f"),
         ("optimum_kind", ""), ("tv_to_optimum", ".2e"), ("tv_optimum_to_kl_regularised_optimum", ".3g"),
         ("tv_to_equilibrium", ".2e"), ("reached_optimum", ""),
         ("optimum_logratio_winner", ".4f"), ("optimum_mean_length", ".3f"), ("reference_mean_length", ".3f"),
         ("steps", "d"), ("seconds", ".2f"))
# a pair file's runs (no exact target, no population): their summaries' own statistics over the accepted pairs
PAIR_COLUMNS = ("run", "method", "loss_name", "beta", "loss", "margin_mean", "pair_accuracy", "logratio_winner",
                "logratio_loser", "steps", "seconds")
PAIR_SHOWN = (("beta", "g"), ("loss", ".4f"), ("margin_mean", ".4f"), ("pair_accuracy", ".4f"),
              ("logratio_winner", ".4f"), ("logratio_loser", ".4f"), ("steps", "d"), ("seconds", ".2f"))
LEGEND = ("kl_to_reference: KL(pi || pi_ref); win_rate_over_reference: P(pi > pi_ref); optimum_kind: the run's "
          "exact target, a minimiser or a stationary point (a stop-gradient objective, method=group); tv_to_optimum: "
          "TV to the run's own exact target; tv_optimum_to_kl_regularised_optimum: method=group, TV from the update's "
          "stationary point to pi_ref e^{r / beta}; tv_to_equilibrium: TV to the Nash equilibrium at tau = beta / 2; "
          "optimum_logratio_winner: the optimum's mean log-ratio of preferred responses (below 0: they "
          "lose probability, likelihood displacement); optimum_mean_length, reference_mean_length: mean "
          "response length in tokens under the optimum and under the reference; reached_optimum: tv_to_optimum "
          "within the run's tolerance (summary.json)")
PAIR_LEGEND = ("over every accepted pair, with the final policy against the reference: loss: the run's loss; "
               "margin_mean: the mean margin log-ratio(winner) - log-ratio(loser); pair_accuracy: the share of "
               "pairs with a positive margin; logratio_winner, logratio_loser: the mean log pi/pi_ref of winners and "
               "of losers (winners below 0: likelihood displacement). A pair file has no exact optimum and no "
               "sample of the policy, so no TV or KL column: polopt evaluate RUN samples from a local LM run")
GROUP_ONLY = ("optimum_kind", "tv_optimum_to_kl_regularised_optimum")  # shown where a group run fills them
SHOWN_RESPONSES = 12  # equilibria over more responses (sequence tasks) are not written out in the notes
EQUILIBRIUM_TV = 1e-3  # a policy this close to the equilibrium (TV) is reported as the equilibrium


OFFLINE_ONLY = ("loss", "task.feedback", "task.group_size")  # what only method=offline reads


def expand(overrides: list[str]) -> list[list[str]]:
    """The Cartesian product of the sweep overrides, by Hydra's override grammar.

    ``["loss=a,b", "beta=1"]`` -> ``[["loss=a", "beta=1"], ["loss=b", "beta=1"]]``.
    """
    from hydra.core.override_parser.overrides_parser import OverridesParser

    axes = []
    for override in OverridesParser.create().parse_overrides(overrides):
        key = override.get_key_element()
        values = list(override.sweep_string_iterator()) if override.is_sweep_override() else [
            override.get_value_element_as_str()]
        axes.append([f"{key}={v}" for v in values])
    return [list(combo) for combo in itertools.product(*axes)]


def _value(combo: list[str], key: str) -> str | None:
    for item in combo:
        k, _, v = item.partition("=")
        if k == key:
            return v
    return None


def plan(overrides: list[str]) -> list[list[str]]:
    """The runs of a comparison: the expanded combinations, without the ``loss``, ``task.feedback`` and
    ``task.group_size`` overrides for methods that do not use them (the methods draw their own samples),
    duplicates removed (order kept)."""
    from polopt.methods.dispatch import METHODS

    runs, seen = [], set()
    for combo in expand(overrides):
        method = _value(combo, "method") or "offline"
        if method not in METHODS:
            raise ValueError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
        if method != "offline":
            combo = [item for item in combo if item.partition("=")[0] not in OFFLINE_ONLY]
        key = tuple(combo)
        if key not in seen:
            seen.add(key)
            runs.append(combo)
    return runs


def readable(runs: list[list[str]]) -> tuple[list[list[str]], list[str]]:
    """The runs whose registered group objective reads their ``task.feedback`` (a list of objectives over a
    list of feedback kinds pairs each objective with the kinds it reads), and a note on the others. Every run
    skipped: a ValueError naming the first pairing."""
    from polopt import losses

    kept, notes = [], []
    for combo in runs:
        name, feedback = _value(combo, "loss"), _value(combo, "task.feedback") or "pairs"
        if name in losses.names("group") and not losses.resolve(name).reads_feedback(feedback):
            notes.append(f"skipped loss={name} task.feedback={feedback}: the objective cannot read that feedback")
            continue
        kept.append(combo)
    if runs and not kept:
        raise ValueError(f"no combination of the comparison can run: {notes[0].removeprefix('skipped ')}; "
                         "polopt losses lists the feedback each objective reads")
    return kept, notes


def merge_notes(overrides: list[str]) -> list[str]:
    """One note per method other than offline that a ``loss`` list was given to: it does not read the
    ``loss`` group, so those combinations ran once (see :func:`plan`)."""
    notes = []
    combos = expand(overrides)
    for method in dict.fromkeys(_value(c, "method") or "offline" for c in combos):
        given = sorted({_value(c, "loss") for c in combos if (_value(c, "method") or "offline") == method} - {None})
        if method != "offline" and len(given) > 1:
            uses = "its own method.loss" if method == "selfplay" else "no preference loss"
            notes.append(f"method={method} ignores the loss group (it trains with {uses}): its runs for "
                         f"loss={','.join(given)} were merged into one")
        feedback = sorted({_value(c, "task.feedback") for c in combos if (_value(c, "method") or "offline") == method}
                          - {None})
        if method != "offline" and feedback:
            notes.append(f"method={method} draws its own samples and ignores task.feedback and task.group_size: its "
                         f"runs for task.feedback={','.join(feedback)} ran on the task itself")
    return notes


def label(summary: dict) -> str:
    method = summary.get("method", "offline")
    if method == "offline" and summary.get("feedback", "pairs") != "pairs":  # a group session
        return f"offline {summary['loss_name']} ({summary['feedback']}, G={summary['group_size']})"
    if method == "offline":
        return f"offline {summary['loss_name']}"
    if method == "group":
        keys = summary["method_config"]
        advantage, kl = keys.get("advantage", "standardised"), keys.get("kl", "estimator")
        return f"group G={keys.get('group_size', 4)} {advantage} {kl}"
    if method == "selfplay":
        return f"selfplay {summary['method_config'].get('loss', 'squared')}"
    if method == "best_of_n":
        return f"best_of_{summary['method_config'].get('n', 4)}"
    return method


def row(name: str, summary: dict, columns: tuple[str, ...] = COLUMNS) -> dict:
    method = summary.get("method", "offline")
    loss = summary.get("loss_name") if method == "offline" else summary.get("method_config", {}).get("loss")
    return {"run": name, "method": method, "loss_name": loss, "beta": summary["beta"],
            **{k: summary.get(k) for k in columns[4:]}}


def on_pair_file(summaries: list[dict]) -> bool:
    """Whether every run trained on a pair file with none of the exact measures (see the module docstring)."""
    exact = ("kl_to_reference", "win_rate_over_reference", "tv_to_optimum")
    return all("margin_mean" in s and all(s.get(k) is None for k in exact) for s in summaries)


def equilibrium_notes(rows: list[dict], summaries: list[dict]) -> list[str]:
    """Per beta: the equilibrium, which runs end at it, and how far offline squared ends from it."""
    notes = []
    for beta in sorted({r["beta"] for r in rows}):
        members = [(r, s) for r, s in zip(rows, summaries, strict=True) if r["beta"] == beta]
        eq = members[0][1].get("equilibrium")
        if eq is None:
            continue
        shown = "; ".join("[" + ", ".join(f"{v:.4f}" for v in p) + "]" for p in eq) if len(eq[0]) <= SHOWN_RESPONSES \
            else f"a distribution over {len(eq[0])} responses per prompt (in each run's summary.json)"
        at = [r["run"] for r, _ in members if r["tv_to_equilibrium"] is not None
              and r["tv_to_equilibrium"] <= EQUILIBRIUM_TV]
        notes.append(f"beta={beta:g}: the Nash equilibrium of the regularised preference game "
                     f"(tau = beta / 2 = {beta / 2:g}) is {shown}; "
                     + (f"at it (TV <= {EQUILIBRIUM_TV:g}): {', '.join(at)}" if at else "no run ends at it"))
        for r, _ in members:
            if r["method"] == "offline" and r["loss_name"] == "squared":
                where = "also at the equilibrium" if r["tv_to_equilibrium"] <= EQUILIBRIUM_TV else "elsewhere"
                notes.append(f"beta={beta:g}: {r['run']} ends {where}: TV {r['tv_to_equilibrium']:.3g} from the "
                             f"equilibrium, TV {_fmt(r['tv_to_optimum'])} from its own optimum "
                             "pi_ref exp(P(y > mu) / tau), which is the equilibrium only when mu is")
    return notes


def _fmt(value, spec: str = ".3g") -> str:
    return "-" if value is None else format(value, spec)


def render(rows: list[dict], notes: list[str], task: str, *, shown=SHOWN, legend: str = LEGEND) -> str:
    shown = [(k, spec) for k, spec in shown if k not in GROUP_ONLY or any(r[k] is not None for r in rows)]
    head = ["run", *(key for key, _ in shown)]
    body = [[r["run"], *(_cell(r[key], spec) for key, spec in shown)] for r in rows]
    widths = [max(len(line[c]) for line in [head, *body]) for c in range(len(head))]
    lines = [f"task {task}"] + ["  ".join(cell.ljust(w) for cell, w in zip(line, widths, strict=True))
                                for line in [head, *body]]
    lines += ["", legend]
    lines += [f"note: {n}" for n in notes]
    return "\n".join(lines)


def _cell(value, spec: str) -> str:
    if isinstance(value, bool):
        return str(value).lower()
    return _fmt(value, spec)


def plot(rows: list[dict], path: Path, task: str) -> Path:
    """One PNG: KL against win rate over the reference, and the distances to optimum and equilibrium."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (left, right, third) = plt.subplots(1, 3, figsize=(18, 4.5))
    for r in (r for r in rows if r["win_rate_over_reference"] is not None):  # group sessions measure no win rate
        left.scatter(r["kl_to_reference"], r["win_rate_over_reference"], s=40)
        left.annotate(f"{r['run']} (beta={r['beta']:g})", (r["kl_to_reference"], r["win_rate_over_reference"]),
                      textcoords="offset points", xytext=(5, 4), fontsize=8)
    left.set_xlabel("KL(pi || pi_ref)")
    left.set_ylabel("win rate over the reference P(pi > pi_ref)")
    left.set_title(f"{task}: gain against drift")
    left.grid(alpha=0.3)
    floor = 1e-16  # zero distances drawn at the bottom of the log axis
    x = range(len(rows))
    width = 0.4
    for offset, key, text in ((-width / 2, "tv_to_optimum", "TV to own optimum"),
                              (width / 2, "tv_to_equilibrium", "TV to Nash equilibrium")):
        right.bar([i + offset for i in x], [max(r[key], floor) if r[key] is not None else floor for r in rows],
                  width, label=text)
    right.axhline(EQUILIBRIUM_TV, color="grey", linestyle="--", linewidth=1, label=f"TV {EQUILIBRIUM_TV:g}")
    right.set_yscale("log")
    right.set_xticks(list(x), [f"{r['run']}\nbeta={r['beta']:g}" for r in rows], rotation=30, ha="right",
                     fontsize=8)
    right.set_ylabel("total variation")
    right.set_title("distance to the exact targets")
    right.legend(fontsize=8)
    _plot_traits(third, rows)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def plot_pairs(rows: list[dict], path: Path, task: str) -> Path:
    """One PNG for a pair file's runs: each run's pair accuracy, and its winners' against its losers' log-ratio."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (left, right) = plt.subplots(1, 2, figsize=(12, 4.5))
    x = range(len(rows))
    left.bar(list(x), [r["pair_accuracy"] for r in rows])
    left.set_xticks(list(x), [f"{r['run']}\nbeta={r['beta']:g}" for r in rows], rotation=30, ha="right", fontsize=8)
    left.set_ylim(0, 1)
    left.set_ylabel("pair_accuracy (margin > 0)")
    left.set_title(f"{task}: pairs the policy orders as the file does")
    for r in rows:
        right.scatter(r["logratio_loser"], r["logratio_winner"], s=40)
        right.annotate(r["run"], (r["logratio_loser"], r["logratio_winner"]), textcoords="offset points",
                       xytext=(5, 4), fontsize=8)
    right.axhline(0.0, color="grey", linewidth=1)
    right.axvline(0.0, color="grey", linewidth=1)
    right.set_xlabel("logratio_loser: mean log pi/pi_ref of losers")
    right.set_ylabel("logratio_winner: mean log pi/pi_ref of winners")
    right.set_title("where the margin comes from")
    right.grid(alpha=0.3)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def _plot_traits(ax, rows: list[dict]) -> None:
    """Each run's optimum: mean length against the reference's (x) and the winners' log-ratio (y)."""
    shown = [r for r in rows if r.get("optimum_mean_length") is not None]
    for r in shown:
        shift = r["optimum_mean_length"] - r["reference_mean_length"]
        ax.scatter(shift, r["optimum_logratio_winner"], s=40)
        ax.annotate(r["run"], (shift, r["optimum_logratio_winner"]), textcoords="offset points", xytext=(5, 4),
                    fontsize=8)
    ax.axhline(0.0, color="grey", linewidth=1)
    ax.axvline(0.0, color="grey", linewidth=1)
    ax.set_xlabel("optimum_mean_length - reference_mean_length (tokens)")
    ax.set_ylabel("optimum_logratio_winner")
    ax.set_title("length exploitation and likelihood displacement" if shown else "no finite optimum to show")
    ax.grid(alpha=0.3)


def compare(overrides: list[str], out: Path, *, progress: bool = True) -> dict:
    """Run every combination, write the table and the plot under ``out``, return the table."""
    from hydra import compose, initialize_config_dir
    from tqdm.auto import tqdm

    from polopt.commands.config import rewrite_overrides
    from polopt.commands.train import CONFIG_DIR, run

    runs, skipped = readable(plan(overrides))
    out.mkdir(parents=True, exist_ok=True)
    summaries, task = [], ""
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        for number, combo in enumerate(tqdm(runs, desc="compare", disable=not progress)):
            cfg = compose("config", overrides=[*rewrite_overrides(combo), "train.progress=false"])
            with contextlib.redirect_stdout(io.StringIO()) as text:
                summary = run(cfg, out / f"{number:02d}")
            (out / f"{number:02d}" / "report.txt").write_text(text.getvalue(), encoding="utf-8")
            task = summary.get("task", "")
            summaries.append(summary)
    pairs_only = on_pair_file(summaries)
    columns = PAIR_COLUMNS if pairs_only else COLUMNS
    rows = [row(label(s), s, columns) for s in summaries]
    names = [r["run"] for r in rows]
    for r in rows:  # runs that differ in something else than method and loss get their folder number
        if names.count(r["run"]) > 1:
            r["run"] = f"{r['run']} #{rows.index(r):02d}"
    notes = merge_notes(overrides) + skipped + ([] if pairs_only else equilibrium_notes(rows, summaries))
    table = render(rows, notes, task, **({"shown": PAIR_SHOWN, "legend": PAIR_LEGEND} if pairs_only else {}))
    result = {"task": task, "overrides": overrides, "runs": [" ".join(c) for c in runs], "rows": rows,
              "notes": notes}
    write_tables(out / "comparison", table, rows, columns, result)
    (plot_pairs if pairs_only else plot)(rows, out / "comparison.png", task)
    learned = overoptimisation.rows_of_runs(rows, summaries)  # runs with method.reward=PATH
    if learned:
        table += "\n\n" + overoptimisation.render(learned, f"{task}: true and learned reward against KL")
        (out / "comparison.txt").write_text(table + "\n", encoding="utf-8")
        overoptimisation.plot(learned, out / "overoptimisation.png", task)
    return {**result, "table": table}


def write_tables(stem: Path, text: str, rows: list[dict], columns: list[str] | tuple[str, ...], result: dict) -> None:
    """One table three ways: ``stem.txt`` (as printed), ``stem.csv`` (``columns``) and ``stem.json``."""
    stem.with_suffix(".txt").write_text(text + "\n", encoding="utf-8")
    with stem.with_suffix(".csv").open("w", newline="", encoding="utf-8") as f:
        writer = csv.DictWriter(f, fieldnames=columns)
        writer.writeheader()
        writer.writerows(rows)
    stem.with_suffix(".json").write_text(json.dumps(result, indent=1) + "\n", encoding="utf-8")


def main(argv: list[str]) -> int:
    """The ``polopt compare`` subcommand."""
    parser = argparse.ArgumentParser(
        prog="polopt compare",
        description="Train several losses / methods on one task and tabulate them side by side: KL to the "
                    "reference, win rate over the reference, expected reward, TV to each run's exact optimum "
                    "and to the Nash equilibrium, steps, seconds (on a pair file, task=pairs: loss, margin_mean, "
                    "pair_accuracy, winner and loser log-ratios, steps, seconds). Writes "
                    "comparison.txt/.csv/.json/.png.",
        epilog="example: polopt compare task=nontransitive loss=logistic,squared,hinge "
               "method=offline,selfplay beta=0.5")
    parser.add_argument("overrides", nargs="*", help="Hydra overrides as for 'polopt train'; comma lists sweep; "
                                                     "hydra.run.dir=DIR: the comparison folder (default "
                                                     "runs/compare/DATE/TIME)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    args = parser.parse_intermixed_args(argv)
    from polopt.commands import config  # after parsing: --help loads no torch
    from polopt.commands.train import precheck

    out, overrides = config.output_folder(args.overrides, "polopt compare", "compare")
    for cfg in config.compose_all(overrides, sweep=True, command="polopt compare"):
        precheck(cfg)  # every combination checked before any folder is made
    result = compare(overrides, out, progress=not args.quiet)
    print(result["table"])
    print(f"comparison folder: {out}")
    return 0
