"""``polopt sft FILE [KEY=VALUE ...]``: train the tiny transformer on plain text and save it as a reference
model (:mod:`polopt.training.sft` does the work). Its config keys are ``polopt train``'s (:data:`KEYS`), over
the defaults of :data:`DEFAULTS`; ``hydra.run.dir=DIR`` chooses the folder of ``reference.pt``, as for every
command (default ``runs/sft/DATE/TIME``)."""

from __future__ import annotations

import argparse

# polopt train's config keys sft reads -> its own setting; DEFAULTS: sft's values where a key is not given
KEYS = {"train.steps": "steps", "train.batch_size": "batch_size", "optim.lr": "lr", "model.width": "width",
        "model.layers": "layers", "model.heads": "heads", "model.context": "context", "train.seed": "seed",
        "task.tokenizer": "tokenizer", "train.progress": "progress"}
DEFAULTS = {"steps": 300, "batch_size": 64, "lr": 3e-3, "width": 64, "layers": 2, "heads": 4, "context": None,
            "seed": 0, "tokenizer": "byte", "progress": True}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="polopt sft",
        description="Train the tiny transformer on plain text by next-token cross-entropy and save it as the "
                    "reference model of a preference run (task=pairs task.reference_checkpoint=DIR/reference.pt). "
                    "hydra.run.dir=DIR chooses its folder (default runs/sft/DATE/TIME). Config keys "
                    "as for "
                    "polopt train: " + ", ".join(f"{k} (default {DEFAULTS[v]})" for k, v in KEYS.items()) +
                    "; model.context defaults to the longest example (give more to leave room for longer pairs).",
        epilog="examples:\n  polopt sft notes.txt hydra.run.dir=runs/ref\n"
               "  polopt sft dialogues.jsonl hydra.run.dir=runs/ref train.steps=600 model.width=64 model.context=128",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("file", help="a text file (one example per line) or a .jsonl file of "
                                     "{\"prompt\": ..., \"response\": ...} objects")
    parser.add_argument("overrides", nargs="*", metavar="KEY=VALUE", help="config keys as for polopt train")
    return parser


def settings(overrides: list[str]) -> dict:
    """sft's settings: :data:`DEFAULTS` with the given keys, checked against polopt train's config."""
    from omegaconf import OmegaConf

    from polopt.commands import config

    keys = [o.partition("=")[0] for o in overrides]
    model = ["model=transformer"] if any(k.startswith("model.") for k in keys) else []
    task = ["task=pairs"] if any(k.startswith("task.") for k in keys) else []
    cfg = config.compose([*model, *task, *overrides], command="polopt sft")
    config.only_keys(overrides, tuple(KEYS), "polopt sft")
    return {**DEFAULTS, **{KEYS[k]: OmegaConf.select(cfg, k) for k in keys}}


def main(argv: list[str] | None = None) -> int:
    """The ``polopt sft`` subcommand."""
    args = build_parser().parse_intermixed_args(argv)  # before the imports below: --help loads no torch
    from polopt.commands.config import output_folder
    from polopt.data.encoding import SequenceIds
    from polopt.data.tokenizer import load_tokenizer
    from polopt.training.sft import (
        build_model,
        context_needed,
        encode_examples,
        read_examples,
        save_reference,
        train_sft,
    )

    out, overrides = output_folder(args.overrides, "polopt sft", "sft")
    s = settings(overrides)
    tokenizer = load_tokenizer(s["tokenizer"])
    ids = SequenceIds.for_tokenizer(tokenizer)
    examples = read_examples(args.file)
    prompt, response = encode_examples(tokenizer, examples, ids)
    need = context_needed(prompt, response, pad_id=ids.pad)
    context = need if s["context"] is None else s["context"]
    if context < need:
        raise ValueError(f"model.context must be at least {need} for this file (its longest example), got {context}")
    arch = {"vocab_size": ids.vocab_size, "context": context, "width": s["width"], "layers": s["layers"],
            "heads": s["heads"]}
    model = build_model(ids, context=context, width=s["width"], layers=s["layers"], heads=s["heads"], seed=s["seed"])
    result = train_sft(model, prompt, response, pad_id=ids.pad, steps=s["steps"], lr=s["lr"],
                       batch_size=s["batch_size"], seed=s["seed"], progress=bool(s["progress"]))
    path = save_reference(out / "reference.pt", model, ids=ids, tokenizer=s["tokenizer"], architecture=arch,
                          history=result.history, source=str(args.file))
    first, last = result.history[0]["loss"], result.final_loss
    print(f"{len(examples)} examples, {result.steps} steps in {result.seconds:.1f} s: next-token loss "
          f"{first:.3f} -> {last:.3f} nats per token")
    print(f"wrote {path} (use it as task.reference_checkpoint={path})")
    return 0
