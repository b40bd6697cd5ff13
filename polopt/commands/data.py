"""``polopt data FILE [task.KEY=VALUE ...]``: check and summarise a preference-pair file without training.

A file may hold unpaired, ranking or scored rows instead of pairs (:mod:`polopt.data.group_rows`); the report
then names the kind and the responses per row.

    polopt data pairs.jsonl
    polopt data answers.csv 'task.columns={prompt: question, winner: good_reply, loser: other_reply}'
    polopt data pairs.parquet task.max_length=512 task.truncation=truncate_response --plot
    polopt data pairs_folder --json hydra.run.dir=runs/check-pairs
    polopt data chats.jsonl model=local_lm model.path=my-model

With ``model=local_lm model.path=DIR`` the file is read as ``polopt train ... model=local_lm`` reads it:
message rows allowed, every row turned into the model's tokens by the token convention (its chat
template, or ``task.chat_template``), lengths in those tokens against ``model.context`` (default the
model's own maximum) and ``task.max_length``.

The keys are those of ``polopt train task=pairs`` (task.columns, task.format, task.max_length,
task.truncation, task.duplicates, task.tokenizer, task.hub), so a file checked here reads the same in
training. Prints rows in / accepted / rejected by reason / truncated / duplicates, a text histogram of
pair lengths, and the first rejects. Writes into its folder (``hydra.run.dir=DIR``, as every command;
default ``runs/data/DATE/TIME``): ``report.json`` (the accounting), ``rejects.jsonl`` (every reject) and,
with ``--plot``, ``lengths.png``; never beside the input or in the working folder. A problem with the
file as a whole is one line ``polopt data: error: ...`` and exit code 2; bad rows are never an error.
"""

from __future__ import annotations

import argparse
import json

KEYS = ("task.columns", "task.format", "task.max_length", "task.truncation", "task.duplicates", "task.tokenizer",
        "task.hub")  # the task=pairs keys that say how a pair file is read
# with model=local_lm the file is read as training reads it for that model: its tokenizer, chat template, context
LOCAL_LM_KEYS = ("model.path", "model.context", "task.chat_template")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="polopt data", description=__doc__.split("\n\n")[0].split(": ", 1)[1],
        epilog="Keys (as for polopt train task=pairs): task.columns={prompt: COL, winner: COL, loser: COL[, "
               "weight: COL]} (default prompt, winner, loser and weight, used when present); task.format=auto|"
               "jsonl|csv|parquet|folder; task.max_length=N (tokens of task.tokenizer; default no limit); "
               "task.truncation=reject|truncate_response|truncate_prompt; task.duplicates=reject|keep; "
               "task.tokenizer=byte|DIR; task.hub=true (FILE may name a hub data set: downloads). "
               "Row numbers: 1-based line (where the record starts) for JSONL and CSV, 0-based row index for "
               "Parquet and saved folders. Lengths are bytes of UTF-8 with the built-in tokenizer. Rows may be "
               "pairs (prompt, winner, loser) or of one other kind: unpaired (response, label), ranking "
               "(responses, ranking: the rank of each response, 0 = best) or scored (responses, scores). Reasons: "
               "invalid_utf8, invalid_json, not_an_object, wrong_field_count, missing, not_a_string, empty, "
               "bad_weight, identical, too_long, duplicate, bad_label, not_a_list, too_few_responses, "
               "length_mismatch, not_a_permutation, bad_score, repeated_response; with model=local_lm "
               "model.path=DIR (keys model.context, task.chat_template) also bad_messages, template_mismatch, "
               "template_error.")
    parser.add_argument("file", help="a .jsonl/.csv/.tsv/.parquet file or a folder written by datasets' save_to_disk")
    parser.add_argument("overrides", nargs="*", metavar="task.KEY=VALUE",
                        help=f"how to read the file, as for polopt train task=pairs: {', '.join(KEYS)}; "
                             "hydra.run.dir=DIR: the folder of report.json and rejects.jsonl (default "
                             "runs/data/DATE/TIME)")
    parser.add_argument("--plot", action="store_true", help="also write the length histogram, lengths.png")
    parser.add_argument("--json", action="store_true", help="print the accounting as JSON instead of the text report")
    return parser


def main(argv: list[str]) -> int:
    """The ``polopt data`` subcommand."""
    args = build_parser().parse_intermixed_args(argv)  # before the imports below: --help loads no torch
    from omegaconf import OmegaConf

    from polopt.commands import config
    from polopt.data import PairFileSpec, plot_lengths, read_pair_file, summary_text, write_rejects
    from polopt.training.run_folder import write_json

    out, overrides = config.output_folder(args.overrides, "polopt data", "data")
    groups = [o for o in overrides if o.partition("=")[0] == "model"]
    overrides = [o for o in overrides if o not in groups]
    local = bool(groups) and groups[-1].partition("=")[2] == "local_lm"
    if groups and not local:
        raise ValueError(f"polopt data reads a file for model=local_lm or for task.tokenizer, got {groups[-1]}")
    cfg = config.compose(["task=pairs", *groups, *overrides], command="polopt data")
    config.only_keys(overrides, KEYS + LOCAL_LM_KEYS if local else KEYS,
                     "polopt data model=local_lm" if local else "polopt data")
    task = OmegaConf.to_container(cfg.task, resolve=True)
    spec = PairFileSpec(args.file, **{k: task[k] for k in ("columns", "format", "max_length", "truncation",
                                                           "duplicates", "tokenizer", "hub")})
    if local:  # measured in the model's tokens, by the token convention of training (polopt.data.chat)
        from polopt.pairfile.local_lm import read_for_model

        data = read_for_model(spec, path=cfg.model.path, context=cfg.model.context,
                              chat_template=task["chat_template"])[0]
    else:
        data = read_pair_file(spec, tokenizer=task["tokenizer"])
    rejects = write_rejects(data.rejects, out / "rejects.jsonl")
    plot = plot_lengths(data, out / "lengths.png") if args.plot else None
    report = data.accounting | {"rejects_file": str(rejects), "plot": plot and str(plot)}
    write_json(out / "report.json", report)
    if args.json:
        print(json.dumps(report, indent=1))
    else:
        print(summary_text(data, rejects))
        if plot is not None:
            print(f"  length plot: {plot}")
        print(f"  report: {out / 'report.json'}")
    return 0
