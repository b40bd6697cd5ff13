"""Supervised fine-tuning: plain text in, a reference model checkpoint out (``polopt sft``).

A preference run starts from a model that already writes the kind of text the
pairs hold: the reference pi_ref. This module trains the tiny causal
transformer (:class:`polopt.models.transformer.TinyTransformer`) on examples by next-token
cross-entropy over the response tokens,

    L = - (1 / sum_i |y_i|) sum_i sum_t log pi(y_{i,t} | x_i, y_{i,<t})

(torch.nn.functional.cross_entropy over the masked positions), and owns the
reference checkpoint file that ``task=pairs`` (``task.reference_checkpoint=PATH``) and
``polopt demo`` load: a plain dict of the state dict, the architecture, the
tokenizer and the special ids, read back with ``torch.load(weights_only=True)``.

Examples come from a text file (one example per line: the whole line is the
response to an empty prompt) or a JSON Lines file of ``{"prompt": ..., "response": ...}``
objects (``{"text": ...}`` also works). Run ``polopt sft --help``.

``model=local_lm`` (:func:`sft_local_lm`): the same loss on a local causal LM, its examples tokenised by the
plain-row convention of :mod:`polopt.data.chat`, the result saved with ``save_pretrained`` in a folder that
is the next run's ``model.path`` or ``task.reference_checkpoint``.
"""

from __future__ import annotations

import io
import json
import os
import shutil
import time
from dataclasses import dataclass, field
from pathlib import Path

import torch
import torch.nn.functional as F
from tqdm.auto import tqdm

from polopt.checkpoints.store import atomic_write
from polopt.data.encoding import SequenceIds, encode_prompts, encode_responses
from polopt.models.logprobs import pack
from polopt.models.transformer import TinyTransformer
from polopt.training.optim import OptimConfig, make_optimiser

Tensor = torch.Tensor

CHECKPOINT_KIND = "polopt-reference-model"
SFT_CONTEXT = 512  # model.context=null in polopt sft: at least this many positions, room for the pairs that follow
ARCHITECTURE_KEYS = ("vocab_size", "context", "width", "layers", "heads")


@dataclass
class SFTResult:
    steps: int
    seconds: float
    history: list[dict] = field(default_factory=list)  # {"step", "loss", "lr"} every log step

    @property
    def final_loss(self) -> float:
        return self.history[-1]["loss"]


def read_examples(path: str | Path) -> list[tuple[str, str]]:
    """(prompt, response) pairs of a text file (one per non-blank line, empty prompt) or a
    ``.jsonl`` file (objects with ``prompt`` and ``response``, or ``text``)."""
    path = Path(path)
    if not path.is_file():
        raise ValueError(f"SFT data file not found: {str(path)!r}")
    lines = path.read_text(encoding="utf-8").splitlines()
    out = []
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        if path.suffix not in (".jsonl", ".ndjson"):
            out.append(("", line))
            continue
        try:
            obj = json.loads(line)
        except json.JSONDecodeError as err:
            raise ValueError(f"{path}: line {number}: not valid JSON ({err.msg})") from None
        if not isinstance(obj, dict):
            raise ValueError(f"{path}: line {number}: expected an object with prompt and response, got "
                             f"{type(obj).__name__}")
        response = obj.get("response", obj.get("text"))
        prompt = obj.get("prompt", "")
        if not isinstance(response, str) or not response or not isinstance(prompt, str):
            raise ValueError(f"{path}: line {number}: needs a non-empty string 'response' (or 'text') and an "
                             f"optional string 'prompt', got keys {sorted(obj)}")
        out.append((prompt, response))
    if not out:
        raise ValueError(f"{path}: no examples (the file is empty)")
    return out


def build_model(ids: SequenceIds, *, context: int, width: int = 64, layers: int = 2, heads: int = 4,
                seed: int = 0) -> TinyTransformer:
    """The tiny transformer over the tokenizer's ids (input and output vocabularies alike)."""
    return TinyTransformer(ids.vocab_size, context=context, width=width, layers=layers, heads=heads, seed=seed)


def next_token_loss(model: torch.nn.Module, prompt: Tensor, response: Tensor, *, pad_id: int) -> Tensor:
    """Mean cross-entropy of the response tokens given everything before them: a scalar.

    prompt (B, T_p) and response (B, T_r) right-padded; prompt tokens and padding are not scored.
    """
    tokens, mask = pack(prompt, response, pad_id=pad_id)  # (B, T), (B, T)
    logits = model(tokens[:, :-1])  # (B, T-1, V)
    scored = mask[:, 1:]  # (B, T-1): position t's logits score token t + 1
    return F.cross_entropy(logits[scored].float(), tokens[:, 1:][scored])


def train_sft(model: torch.nn.Module, prompt: Tensor, response: Tensor, *, pad_id: int, steps: int = 300,
              lr: float = 3e-3, batch_size: int = 64, warmup_steps: int = 20, seed: int = 0, log_every: int = 10,
              progress: bool = True) -> SFTResult:
    """Adam(W) on :func:`next_token_loss` over seeded shuffled batches, cosine learning-rate decay."""
    if not isinstance(steps, int) or steps < 1:
        raise ValueError(f"sft steps must be a positive integer, got {steps!r}")
    if not isinstance(batch_size, int) or batch_size < 1:
        raise ValueError(f"sft batch size must be a positive integer, got {batch_size!r}")
    generator = torch.Generator().manual_seed(seed)
    optimiser, scheduler = make_optimiser(model.parameters(), OptimConfig(
        name="adamw", lr=lr, warmup_steps=min(warmup_steps, steps - 1), grad_clip=1.0), steps)
    model.train()
    n = len(prompt)
    order, cursor = torch.randperm(n, generator=generator), 0
    history: list[dict] = []
    start = time.perf_counter()
    bar = tqdm(range(1, steps + 1), desc="sft", disable=not progress, leave=False)
    for step in bar:
        lr_now = optimiser.param_groups[0]["lr"]
        if cursor + batch_size > n:
            order, cursor = torch.randperm(n, generator=generator), 0
        index = order[cursor:cursor + batch_size]
        cursor += batch_size
        value = next_token_loss(model, prompt[index], response[index], pad_id=pad_id)
        optimiser.zero_grad(set_to_none=True)
        value.backward()
        torch.nn.utils.clip_grad_norm_(model.parameters(), 1.0)
        optimiser.step()
        scheduler.step()
        if step % log_every == 0 or step in (1, steps):
            history.append({"step": step, "loss": float(value.detach()), "lr": lr_now})
            bar.set_postfix(loss=f"{history[-1]['loss']:.3f}")
    bar.close()
    model.eval()
    return SFTResult(steps, time.perf_counter() - start, history)


def encode_examples(tokenizer, examples: list[tuple[str, str]], ids: SequenceIds) -> tuple[Tensor, Tensor]:
    """(prompt (N, T_p), response (N, T_r)) of (prompt, response) text pairs."""
    return (encode_prompts(tokenizer, [p for p, _ in examples], ids),
            encode_responses(tokenizer, [r for _, r in examples], ids))


def context_needed(prompt: Tensor, response: Tensor, *, pad_id: int) -> int:
    """Input positions a model needs for these rows: the longest prompt + response, minus one."""
    n = (prompt != pad_id).sum(1) + (response != pad_id).sum(1)  # (N,)
    return int(n.max()) - 1 if len(n) else 1


# ------------------------------------------------------------ the reference checkpoint


def save_reference(path: str | Path, model: TinyTransformer, *, ids: SequenceIds, tokenizer: str,
                   architecture: dict, history: list[dict] | None = None, source: str | None = None) -> Path:
    """Write the reference checkpoint (atomically) and return its path."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    state = {"kind": CHECKPOINT_KIND, "state_dict": model.state_dict(),
             "architecture": {k: int(architecture[k]) for k in ARCHITECTURE_KEYS},
             "tokenizer": str(tokenizer), "ids": {"pad": ids.pad, "bos": ids.bos, "eos": ids.eos},
             "history": list(history or []), "source": source}
    buffer = io.BytesIO()
    torch.save(state, buffer)
    atomic_write(path, buffer.getvalue())
    return path


def load_reference(path: str | Path) -> tuple[TinyTransformer, dict]:
    """The frozen reference model (eval mode, no gradients) and the checkpoint's other fields."""
    path = Path(path)
    if not path.is_file():
        raise ValueError(f"task.reference_checkpoint must be a reference checkpoint written by polopt sft, "
                         f"got {str(path)!r} (no such file)")
    try:
        state = torch.load(path, weights_only=True)
    except Exception as err:  # a truncated or foreign file: say which
        raise ValueError(f"task.reference_checkpoint {str(path)!r} cannot be read as a checkpoint: {err}") from None
    if not isinstance(state, dict) or state.get("kind") != CHECKPOINT_KIND:
        raise ValueError(f"task.reference_checkpoint {str(path)!r} is not a reference checkpoint written by polopt sft")
    arch = state["architecture"]
    model = TinyTransformer(arch["vocab_size"], context=arch["context"], width=arch["width"],
                            layers=arch["layers"], heads=arch["heads"])
    model.load_state_dict(state["state_dict"])
    model.requires_grad_(False).eval()
    return model, state


# ------------------------------------------------------------ a local causal LM (model=local_lm)


def encode_lm_examples(tokenizer, examples: list[tuple[str, str]]) -> tuple[Tensor, Tensor]:
    """(prompt (N, T_p), response (N, T_r)) ids of (prompt, response) texts by the plain-row convention of
    :mod:`polopt.data.chat`, padded with :data:`polopt.models.local_lm.PAD`; an empty prompt (a line of a text
    file) that the tokenizer gives no token is its beginning-of-sequence token, which scores the first token."""
    from polopt.data.chat import plain_ids
    from polopt.models.local_lm import PAD

    if tokenizer.eos_token_id is None:
        raise ValueError("the tokenizer has no end-of-sequence token (eos_token); a response must end with one")
    rows = [plain_ids(tokenizer, p, r) for p, r in examples]
    if any(not p for p, _ in rows) and tokenizer.bos_token_id is None:
        raise ValueError("an example has an empty prompt and the tokenizer has no bos_token to start it with")
    rows = [(p or [tokenizer.bos_token_id], r) for p, r in rows]
    width_p, width_r = (max(len(row[k]) for row in rows) for k in (0, 1))
    prompt = torch.full((len(rows), width_p), PAD, dtype=torch.long)  # (N, T_p)
    response = torch.full((len(rows), width_r), PAD, dtype=torch.long)  # (N, T_r)
    for i, (p, r) in enumerate(rows):
        prompt[i, : len(p)], response[i, : len(r)] = torch.tensor(p), torch.tensor(r)
    return prompt, response


def sft_local_lm(path, examples: list[tuple[str, str]], out, *, steps: int = 300, lr: float = 3e-3,
                 batch_size: int = 64, seed: int = 0, progress: bool = True) -> tuple[SFTResult, Path]:
    """The local causal LM of ``path`` fine-tuned on ``examples`` (:func:`train_sft`, every weight) and saved with
    ``save_pretrained`` (model and tokenizer) in the folder ``out``: (the result, the folder). ``out`` may be a
    model folder of an earlier run (replaced) but no other existing path."""
    from polopt.models.local_lm import PAD, CausalLM, load_model, load_tokenizer, positions, quiet_transformers

    out = Path(out)
    if out.exists() and not (out / "config.json").is_file():
        raise ValueError(f"--out {str(out)!r} exists and is not a model folder; give a new folder to save the model in")
    model, tokenizer = load_model(path), load_tokenizer(path)
    prompt, response = encode_lm_examples(tokenizer, examples)
    need, most = context_needed(prompt, response, pad_id=PAD), positions(model.config)
    if most is not None and need > most:
        raise ValueError(f"the longest example needs {need} input positions but the model at model.path holds {most}")
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)  # the model's own dropout while it trains
        result = train_sft(CausalLM(model), prompt, response, pad_id=PAD, steps=steps, lr=lr, batch_size=batch_size,
                           seed=seed, progress=progress)
    tmp = out.with_name(f".{out.name}.tmp")
    shutil.rmtree(tmp, ignore_errors=True)
    with quiet_transformers():
        model.save_pretrained(tmp)
        tokenizer.save_pretrained(tmp)
    shutil.rmtree(out, ignore_errors=True)
    os.replace(tmp, out)
    return result, out


# ------------------------------------------------------------ polopt sft
