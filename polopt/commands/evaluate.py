"""``polopt evaluate RUN [KEY=VALUE ...]``: did training help? The trained policy against its reference
on held-out prompts, scored by a reward model or a function of the user's.

    polopt evaluate runs/2026-12-04/10-00-00-logistic-pairs evaluate.prompts=heldout.jsonl \\
        evaluate.scorer=mypkg.judge:score evaluate.n=200 evaluate.max_new_tokens=64 train.seed=0

RUN is a finished ``model=local_lm`` run (its ``policy/`` written by ``save_pretrained``: a whole
model, or a peft adapter over the run's ``model.path``; :mod:`polopt.models.run_policy`). For each of
the first ``evaluate.n`` prompts of ``evaluate.prompts`` (JSONL, CSV or Parquet with a ``prompt``
column: a string, or a list of chat messages rendered with the tokenizer's chat template and the
generation prompt) one response is sampled from the policy and one from the reference
(:mod:`polopt.models.generation`, seeded with ``train.seed``: the run's own unless given), both are
scored (:mod:`polopt.methods.scorers`: ``evaluate.scorer=pkg.module:fn`` or ``evaluate.reward=PATH``)
and the policy wins a prompt when its response scores higher. The win-rate over the reference is the
share of wins among the decided prompts (ties apart), with a Wilson interval
(:func:`polopt.demo.winrates.ground_truth_win_rate`).

Writes ``evaluations.jsonl`` (one row per prompt: both responses, their scores and lengths, the
outcome) and ``evaluation.json`` (the figures) into RUN, or into ``hydra.run.dir=DIR`` (the output key of
every command); the run's own
``summary.json`` is never touched. Keys: :data:`KEYS`; an unknown ``evaluate.`` key or any other
config key but ``train.seed`` is refused. Imports no torch until it runs.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

# evaluate's own keys -> (default, what it is); "???": must be given
KEYS = {"evaluate.prompts": ("???", "held-out prompts: JSONL, CSV or Parquet with a prompt column"),
        "evaluate.n": (None, "how many of them, from the top (null: all)"),
        "evaluate.max_new_tokens": (64, "the longest sampled response, in tokens"),
        "evaluate.scorer": (None, "pkg.module:fn, a function of (prompt, response) -> float"),
        "evaluate.reward": (None, "a reward.pt of polopt reward task=pairs (instead of evaluate.scorer)")}
TRAIN_KEYS = ("train.seed",)  # polopt train's keys that evaluate reads
TABLE, FIGURES = "evaluations.jsonl", "evaluation.json"
BATCH = 16  # prompts per generate call


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="polopt evaluate",
        description="Sample one response from a model=local_lm run's trained policy and one from its reference for "
                    "each held-out prompt, score both, and report the win-rate over the reference with a Wilson "
                    "interval, the mean lengths of both, and the table of examples (evaluations.jsonl). Keys: " +
                    "; ".join(f"{k} ({text}; default {'required' if d == '???' else d})"
                              for k, (d, text) in KEYS.items()) +
                    "; train.seed (the sampling seed; default: the run's).",
        epilog="example:\n  polopt evaluate runs/my-run evaluate.prompts=heldout.jsonl "
               "evaluate.scorer=mypkg.judge:score evaluate.n=200",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("run", help="the run folder of a finished model=local_lm run (it holds policy/)")
    parser.add_argument("overrides", nargs="*", metavar="KEY=VALUE",
                        help="evaluate.* keys and train.seed; hydra.run.dir=DIR: where to write evaluations.jsonl "
                             "and evaluation.json (default: the run folder)")
    return parser


def _value(arg: str):
    """The typed value of one ``key=value`` (Hydra's override grammar: 5 is an int, null is None)."""
    from hydra.core.override_parser.overrides_parser import OverridesParser
    from hydra.errors import OverrideParseException

    try:
        override = OverridesParser.create().parse_overrides([arg])[0]
    except OverrideParseException as err:
        raise ValueError(f"cannot read {arg!r}: write key=value; {' '.join(str(err).split()[:12])}") from None
    if override.is_sweep_override():
        raise ValueError(f"{arg!r} is a list of values; polopt evaluate takes one value a key")
    return override.value()


def settings(overrides: list[str]) -> tuple[dict, int | None]:
    """evaluate's keys (:data:`KEYS`, defaults filled in, checked) and ``train.seed`` (None: not given)."""
    from polopt.commands import config

    given, others = {}, []
    for arg in overrides:
        key = arg.partition("=")[0].lstrip("+~")
        if key.startswith("evaluate.") or key == "evaluate":
            if key not in KEYS:
                raise ValueError(config.unknown_key_message(key, [*KEYS, *TRAIN_KEYS]))
            if "=" not in arg:
                raise ValueError(f"{key} needs a value: {key}=VALUE")
            given[key] = _value(arg)
        else:
            others.append(arg)
    cfg = config.compose(others, command="polopt evaluate")  # train's grammar and its one-line errors
    config.only_keys(others, (*TRAIN_KEYS, "evaluate."), "polopt evaluate")
    keys = {k: given.get(k, d) for k, (d, _) in KEYS.items()}
    check(keys)
    seed = int(cfg.train.seed) if any(a.partition("=")[0].lstrip("+") == "train.seed" for a in others) else None
    return keys, seed


def check(keys: dict) -> None:
    """One ValueError naming the key, what it takes and what was given."""
    if keys["evaluate.prompts"] in ("???", None, ""):
        raise ValueError("polopt evaluate needs evaluate.prompts=FILE, held-out prompts (JSONL, CSV or Parquet with "
                         "a prompt column)")
    for key, low in (("evaluate.n", 1), ("evaluate.max_new_tokens", 1)):
        value = keys[key]
        if key == "evaluate.n" and value is None:
            continue
        if isinstance(value, bool) or not isinstance(value, int) or value < low:
            raise ValueError(f"{key} must be an integer >= {low}{' or null (all)' if key == 'evaluate.n' else ''}, "
                             f"got {value!r}")
    for key in ("evaluate.prompts", "evaluate.scorer", "evaluate.reward"):
        if keys[key] is not None and not isinstance(keys[key], str):
            raise ValueError(f"{key} must be a string, got {keys[key]!r}")


def read_prompts(path: str, n: int | None) -> tuple[list, list[int], str]:
    """The first ``n`` prompts of the file, their locations and the locations' unit (line or index)."""
    from polopt.data.read import read_table
    from polopt.data.rows import Columns

    table = read_table(path, Columns(winner="prompt", loser="prompt", weight=None))
    if table.early_rejects:
        bad = table.early_rejects[0]
        raise ValueError(f"evaluate.prompts {path!r}: {table.unit} {bad.location} cannot be read ({bad.detail})")
    prompts, where = table.values["prompt"][:n], table.locations[:n]
    for value, at in zip(prompts, where, strict=True):
        ok = isinstance(value, str) and value.strip() or isinstance(value, list) and value and all(
            isinstance(m, dict) and isinstance(m.get("role"), str) and isinstance(m.get("content"), str)
            for m in value)
        if not ok:
            raise ValueError(f"evaluate.prompts {path!r}: {table.unit} {at}: a prompt must be non-empty text or a list "
                             f"of {{role, content}} messages, got {value!r:.60}")
    if not prompts:
        raise ValueError(f"evaluate.prompts {path!r} holds no prompt")
    return prompts, where, table.unit


def sample_both(models, prompts: list, where: list[int], unit: str, keys: dict, seed: int) -> dict:
    """One response per prompt from the policy and from the reference, each from the same seed."""
    from polopt.models.generation import prompt_ids, sample_responses

    ids = [prompt_ids(models.tokenizer, p, where=f"evaluate.prompts {unit} {at}") for p, at in zip(prompts, where,
                                                                                                  strict=True)]
    out = {}
    for which in ("policy", "reference"):
        with models.model(which) as model:
            out[which] = sample_responses(model, models.tokenizer, ids, max_new_tokens=keys["evaluate.max_new_tokens"],
                                          seed=seed, batch_size=BATCH)
    return out


def table_rows(prompts: list, where: list[int], samples: dict, scores: dict) -> list[dict]:
    """The rows of evaluations.jsonl: both responses, their scores, lengths (tokens) and the outcome."""
    rows = []
    for i, (prompt, at) in enumerate(zip(prompts, where, strict=True)):
        mine, theirs = scores["policy"][i], scores["reference"][i]
        row = {"row": at, "prompt": prompt, "outcome": "win" if mine > theirs else "defeat" if mine < theirs else "tie"}
        for which in ("policy", "reference"):
            s = samples[which][i]
            row.update({which: s.text, f"{which}_score": scores[which][i], f"{which}_tokens": len(s.ids),
                        f"{which}_ended": s.ended})
        rows.append(row)
    return rows


def evaluate_run(run: Path, keys: dict, seed: int | None) -> tuple[dict, list[dict]]:
    """The figures (evaluation.json) and the rows (evaluations.jsonl) of one evaluation."""
    from polopt.demo.winrates import ground_truth_win_rate
    from polopt.methods.scorers import build_scorer, score_rows
    from polopt.models.run_policy import load_run, policy_folder, run_config

    config = run_config(run)
    policy_folder(run, config)  # before anything heavy: a run without policy/ is one line
    prompts, where, unit = read_prompts(keys["evaluate.prompts"], keys["evaluate.n"])
    scorer = build_scorer(keys["evaluate.scorer"], keys["evaluate.reward"])
    seed = int(config.get("train", {}).get("seed", 0)) if seed is None else seed
    models = load_run(run)
    samples = sample_both(models, prompts, where, unit, keys, seed)
    scores, cut = {}, {}
    for which in samples:
        before = len(scorer.cut)
        scores[which] = score_rows(scorer, prompts, [s.text for s in samples[which]])
        cut[which] = scorer.cut[before:]  # prompts whose response was cut to fit the reward model
    # the scores stand in for the responses: the reward of a response is its score
    figures = ground_truth_win_rate(lambda _prompt, value: value, prompts, scores["policy"], scores["reference"])
    n = len(prompts)
    for which in ("policy", "reference"):
        figures[f"mean_length_{which}"] = sum(len(s.ids) for s in samples[which]) / n
        figures[f"ended_share_{which}"] = sum(s.ended for s in samples[which]) / n
    figures.update({"run": str(run), "adapter": models.adapter, "base_model": str(models.base),
                    "prompts": keys["evaluate.prompts"], "n": n, "max_new_tokens": keys["evaluate.max_new_tokens"],
                    "seed": seed, "scorer": scorer.name, "responses_cut_for_the_reward_model": cut,
                    "length_unit": "tokens of the model's tokenizer, the end token included where drawn"})
    return figures, table_rows(prompts, where, samples, scores)


def write(out: Path, figures: dict, rows: list[dict]) -> None:
    """evaluations.jsonl and evaluation.json, each written atomically."""
    from polopt.checkpoints.store import atomic_write
    from polopt.training.run_folder import json_ready, write_json

    out.mkdir(parents=True, exist_ok=True)
    atomic_write(out / TABLE, "".join(json.dumps(json_ready(r), ensure_ascii=False) + "\n" for r in rows).encode())
    write_json(out / FIGURES, figures)


def main(argv: list[str] | None = None) -> int:
    """The ``polopt evaluate`` subcommand."""
    args = build_parser().parse_intermixed_args(argv)  # before any import of torch: --help answers at once
    from polopt.commands.config import output_folder

    out, overrides = output_folder(args.overrides, "polopt evaluate", None)
    keys, seed = settings(overrides)
    run = Path(args.run)
    figures, rows = evaluate_run(run, keys, seed)
    out = out or run
    write(out, figures, rows)
    low, high = figures["win_rate_ci"]
    print(f"win-rate over the reference: {figures['win_rate']:.3f}  95% Wilson interval [{low:.3f}, {high:.3f}]  "
          f"({figures['wins']} wins, {figures['defeats']} defeats, {figures['ties']} ties of {figures['comparisons']} "
          f"prompts; scored by {figures['scorer']})")
    print(f"mean length: policy {figures['mean_length_policy']:.1f} tokens, reference "
          f"{figures['mean_length_reference']:.1f} tokens (at most {figures['max_new_tokens']})")
    print(f"wrote {out / TABLE} and {out / FIGURES}")
    return 0
