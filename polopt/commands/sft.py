"""``polopt sft FILE [KEY=VALUE ...]``: train the tiny transformer on plain text and save it as a reference
model (:mod:`polopt.training.sft` does the work). Its config keys are ``polopt train``'s (:data:`KEYS`), over
the defaults of :data:`DEFAULTS`; ``hydra.run.dir=DIR`` chooses the folder of ``reference.pt``, as for every
command (default ``runs/sft/DATE/TIME``). ``model=local_lm model.path=DIR`` fine-tunes a local causal LM
instead (:data:`LOCAL_LM_KEYS`) and saves it with ``save_pretrained`` in ``model/`` of that folder."""

from __future__ import annotations

import argparse

# polopt train's config keys sft reads -> its own setting; DEFAULTS: sft's values where a key is not given
KEYS = {"train.steps": "steps", "train.batch_size": "batch_size", "optim.lr": "lr", "model.width": "width",
        "model.layers": "layers", "model.heads": "heads", "model.context": "context", "train.seed": "seed",
        "task.tokenizer": "tokenizer", "train.progress": "progress"}
# model=local_lm: a local causal LM fine-tuned and saved with save_pretrained (in model/ of the output folder)
LOCAL_LM_KEYS = {"train.steps": "steps", "train.batch_size": "batch_size", "optim.lr": "lr", "train.seed": "seed",
                 "train.progress": "progress", "model.path": "path"}
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
                    "; model.context defaults to the longest example and at least 512 positions, room for the "
                    "pairs that follow (give more for longer pairs). model=local_lm model.path=DIR fine-tunes a local "
                    "causal LM instead (keys " + ", ".join(LOCAL_LM_KEYS) + ") and saves it with save_pretrained "
                    "in DIR/model, ready to be the next run's model.path.",
        epilog="examples:\n  polopt sft notes.txt hydra.run.dir=runs/ref\n"
               "  polopt sft dialogues.jsonl hydra.run.dir=runs/ref train.steps=600 model.width=64 model.context=128\n"
               "  polopt sft dialogues.jsonl hydra.run.dir=runs/sft model=local_lm model.path=my-model train.steps=50",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("file", help="a text file (one example per line) or a .jsonl file of "
                                     "{\"prompt\": ..., \"response\": ...} objects")
    parser.add_argument("overrides", nargs="*", metavar="KEY=VALUE", help="config keys as for polopt train")
    return parser


def settings(overrides: list[str]) -> dict:
    """sft's settings: :data:`DEFAULTS` with the given keys, checked against polopt train's config; ``model=local_lm``
    (with ``model.path``) fine-tunes a local causal LM and takes :data:`LOCAL_LM_KEYS` only."""
    from omegaconf import OmegaConf

    from polopt.commands import config

    groups = [o for o in overrides if o.partition("=")[0] == "model"]
    rest = [o for o in overrides if o not in groups]
    kind = groups[-1].partition("=")[2] if groups else "transformer"
    if kind not in ("transformer", "local_lm"):
        raise ValueError(f"polopt sft trains model=transformer or model=local_lm, got model={kind}")
    keys = [o.partition("=")[0] for o in rest]
    model = [f"model={kind}"] if groups or any(k.startswith("model.") for k in keys) else []
    task = ["task=pairs"] if any(k.startswith("task.") for k in keys) else []
    cfg = config.compose([*model, *task, *rest], command="polopt sft")
    allowed = KEYS if kind == "transformer" else LOCAL_LM_KEYS
    config.only_keys(rest, tuple(allowed), f"polopt sft{' model=local_lm' if kind == 'local_lm' else ''}")
    return {**DEFAULTS, "kind": kind, **{allowed[k]: OmegaConf.select(cfg, k) for k in keys}}


def main(argv: list[str] | None = None) -> int:
    """The ``polopt sft`` subcommand."""
    args = build_parser().parse_intermixed_args(argv)  # before the imports below: --help loads no torch
    from polopt.commands.config import output_folder
    from polopt.training.sft import read_examples

    out, overrides = output_folder(args.overrides, "polopt sft", "sft")
    s = settings(overrides)
    examples = read_examples(args.file)
    if s["kind"] == "local_lm":
        from polopt.training.sft import sft_local_lm

        result, path = sft_local_lm(s["path"], examples, out / "model", steps=s["steps"], lr=s["lr"],
                                    batch_size=s["batch_size"], seed=s["seed"], progress=bool(s["progress"]))
        use = f"model.path={path} or task.reference_checkpoint={path} with model=local_lm"
    else:
        result, path = sft_transformer(s, examples, out / "reference.pt", source=str(args.file))
        use = f"task.reference_checkpoint={path}"
    first, last = result.history[0]["loss"], result.final_loss
    print(f"{len(examples)} examples, {result.steps} steps in {result.seconds:.1f} s: next-token loss "
          f"{first:.3f} -> {last:.3f} nats per token")
    print(f"wrote {path} (use it as {use})")
    return 0


def sft_transformer(s: dict, examples: list, out, *, source: str):
    """The tiny transformer trained on ``examples`` and saved as a reference checkpoint: (SFTResult, path)."""
    from polopt.data.encoding import SequenceIds
    from polopt.data.tokenizer import load_tokenizer
    from polopt.models.transformer import default_context
    from polopt.training.sft import SFT_CONTEXT, build_model, context_needed, encode_examples, save_reference, train_sft

    tokenizer = load_tokenizer(s["tokenizer"])
    ids = SequenceIds.for_tokenizer(tokenizer)
    prompt, response = encode_examples(tokenizer, examples, ids)
    need = context_needed(prompt, response, pad_id=ids.pad)
    context = default_context(need, floor=SFT_CONTEXT) if s["context"] is None else s["context"]
    if context < need:
        raise ValueError(f"model.context must be at least {need} for this file (its longest example), got {context}")
    arch = {"vocab_size": ids.vocab_size, "context": context, "width": s["width"], "layers": s["layers"],
            "heads": s["heads"]}
    model = build_model(ids, context=context, width=s["width"], layers=s["layers"], heads=s["heads"], seed=s["seed"])
    result = train_sft(model, prompt, response, pad_id=ids.pad, steps=s["steps"], lr=s["lr"],
                       batch_size=s["batch_size"], seed=s["seed"], progress=bool(s["progress"]))
    path = save_reference(out, model, ids=ids, tokenizer=s["tokenizer"], architecture=arch,
                          history=result.history, source=source)
    return result, path
