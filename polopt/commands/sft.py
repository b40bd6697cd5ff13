"""``polopt sft FILE --out REF.pt``: train the tiny transformer on plain text and save it as a reference model
(:mod:`polopt.sft` does the work)."""

from __future__ import annotations

import argparse
import sys

from polopt.encoding import SequenceIds
from polopt.sft import build_model, context_needed, encode_examples, read_examples, save_reference, train_sft
from polopt.tokenizer import load_tokenizer


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="polopt sft",
        description="Train the tiny transformer on plain text by next-token cross-entropy and save it as the "
                    "reference model of a preference run (task=pairs task.reference_checkpoint=OUT).",
        epilog="examples:\n  polopt sft notes.txt --out runs/ref.pt\n"
               "  polopt sft dialogues.jsonl --out runs/ref.pt --steps 600 --width 64 --context 128",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("file", help="a text file (one example per line) or a .jsonl file of "
                                     "{\"prompt\": ..., \"response\": ...} objects")
    parser.add_argument("--out", required=True, help="the reference checkpoint to write (e.g. runs/ref.pt)")
    parser.add_argument("--tokenizer", default="byte", help="'byte' (default) or a local tokenizer directory")
    parser.add_argument("--steps", type=int, default=300, help="optimiser steps (default %(default)s)")
    parser.add_argument("--batch-size", type=int, default=64, help="examples per step (default %(default)s)")
    parser.add_argument("--lr", type=float, default=3e-3, help="peak learning rate (default %(default)s)")
    parser.add_argument("--width", type=int, default=64, help="model width (default %(default)s)")
    parser.add_argument("--layers", type=int, default=2, help="transformer blocks (default %(default)s)")
    parser.add_argument("--heads", type=int, default=4, help="attention heads (default %(default)s)")
    parser.add_argument("--context", type=int, default=None,
                        help="input positions (default: the longest example; give more to leave room for "
                             "longer pairs later)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the weights and the batches")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar")
    return parser


def main(argv: list[str] | None = None) -> int:
    """The ``polopt sft`` subcommand."""
    args = build_parser().parse_args(argv)
    try:
        tokenizer = load_tokenizer(args.tokenizer)
        ids = SequenceIds.for_tokenizer(tokenizer)
        examples = read_examples(args.file)
        prompt, response = encode_examples(tokenizer, examples, ids)
        need = context_needed(prompt, response, pad_id=ids.pad)
        context = need if args.context is None else args.context
        if context < need:
            raise ValueError(f"--context must be at least {need} for this file (its longest example), got {context}")
        arch = {"vocab_size": ids.vocab_size, "context": context, "width": args.width, "layers": args.layers,
                "heads": args.heads}
        model = build_model(ids, context=context, width=args.width, layers=args.layers, heads=args.heads,
                            seed=args.seed)
        result = train_sft(model, prompt, response, pad_id=ids.pad, steps=args.steps, lr=args.lr,
                           batch_size=args.batch_size, seed=args.seed, progress=not args.no_progress)
        path = save_reference(args.out, model, ids=ids, tokenizer=args.tokenizer, architecture=arch,
                              history=result.history, source=str(args.file))
    except (ValueError, TypeError, OSError) as err:
        print(f"polopt sft: error: {err}", file=sys.stderr)
        return 2
    first, last = result.history[0]["loss"], result.final_loss
    print(f"{len(examples)} examples, {result.steps} steps in {result.seconds:.1f} s: next-token loss "
          f"{first:.3f} -> {last:.3f} nats per token")
    print(f"wrote {path} (use it as task.reference_checkpoint={path})")
    return 0
