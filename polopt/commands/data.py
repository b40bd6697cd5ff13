"""``polopt data FILE``: check and summarise a preference-pair file without training.

    polopt data pairs.jsonl
    polopt data answers.csv --columns prompt=question,winner=good_reply,loser=other_reply
    polopt data pairs.parquet --max-length 512 --truncation truncate_response --plot lengths.png
    polopt data pairs_folder --json

Prints rows in / accepted / rejected by reason / truncated / duplicates, a text
histogram of pair lengths, and the first rejects; writes every reject to a
JSON Lines file (``--rejects``). A problem with the file as a whole is one line
``polopt data: error: ...`` and exit code 2; bad rows are never an error.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from polopt.data import DUPLICATES, FORMATS, TRUNCATION, load_pairs, plot_lengths, summary_text, write_rejects


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="polopt data", description=__doc__.split("\n\n")[0].split(": ", 1)[1],
        epilog="Row numbers: 1-based line (where the record starts) for JSONL and CSV, 0-based row index for "
               "Parquet and saved folders. Lengths are bytes of UTF-8 with the built-in tokenizer. Reasons: "
               "invalid_utf8, invalid_json, not_an_object, wrong_field_count, missing, not_a_string, empty, "
               "bad_weight, identical, too_long, duplicate.")
    parser.add_argument("file", help="a .jsonl/.csv/.tsv/.parquet file or a folder written by datasets' save_to_disk")
    parser.add_argument("--columns", default=None,
                        help="our field=the file's column, e.g. prompt=question,winner=good_reply,loser=other_reply"
                             "[,weight=w]; default prompt, winner, loser and weight (used when present)")
    parser.add_argument("--format", default="auto", choices=[f for f in FORMATS if f != "hub"],
                        help="the file's format (default: from the suffix)")
    parser.add_argument("--max-length", type=int, default=None,
                        help="longest pair (prompt + longer response) in tokens of --tokenizer; default no limit")
    parser.add_argument("--truncation", default="reject", choices=list(TRUNCATION),
                        help="what to do with a pair longer than --max-length: " +
                             "; ".join(f"{k}: {v}" for k, v in TRUNCATION.items()))
    parser.add_argument("--duplicates", default="reject", choices=list(DUPLICATES),
                        help="exact repeats of an accepted row: reject the later ones (default) or keep and count them")
    parser.add_argument("--tokenizer", default="byte",
                        help="'byte' (built-in, lengths in bytes) or a local tokenizer directory "
                             "(needs polopt[local-lm])")
    parser.add_argument("--rejects", default=None, type=Path,
                        help="where to write the rejects (JSON Lines); default NAME.rejects.jsonl here")
    parser.add_argument("--plot", default=None, type=Path, help="also write the length histogram as a PNG")
    parser.add_argument("--json", action="store_true", help="print the accounting as JSON instead of the text report")
    parser.add_argument("--hub", action="store_true",
                        help="allow FILE to be a data set name on the hub when it is not a local path (downloads)")
    return parser


def main(argv: list[str]) -> int:
    args = build_parser().parse_args(argv)
    try:
        data = load_pairs(args.file, columns=args.columns, format=args.format, max_length=args.max_length,
                          truncation=args.truncation, duplicates=args.duplicates, tokenizer=args.tokenizer,
                          hub=args.hub)
        rejects = args.rejects or Path(f"{Path(args.file).name or 'pairs'}.rejects.jsonl")
        write_rejects(data.rejects, rejects)
        plot = plot_lengths(data, args.plot) if args.plot is not None else None
    except (ValueError, TypeError, OSError) as err:
        print(f"polopt data: error: {err}", file=sys.stderr)
        return 2
    if args.json:
        print(json.dumps(data.accounting | {"rejects_file": str(rejects), "plot": plot and str(plot)}, indent=1))
    else:
        print(summary_text(data, rejects))
        if plot is not None:
            print(f"  length plot: {plot}")
    return 0
