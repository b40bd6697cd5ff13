"""Responses sampled from a local causal LM: prompts as token ids, transformers' ``generate`` with a seed.

Prompt ids follow the token convention of ``model=local_lm`` (docs/guides/evaluate-your-model.md):

- a list of messages ``{"role", "content"}``: ``apply_chat_template(prompt,
  add_generation_prompt=True, tokenize=False)``, then ``tokenizer(text, add_special_tokens=False)``;
- a string: ``tokenizer(prompt)``, with the tokenizer's own special tokens.

Sampling is ancestral from the model's own next-token distribution (``do_sample=True``, temperature
1, no top-k or top-p cut; the settings saved with the model in generation_config.json are set aside,
as transformers would otherwise fill every unset setting from them), batched with
left padding (common practice for decoder-only generation), on the CPU. ``torch.manual_seed(seed)``
runs right before each model's first batch, so the same prompts, seed and batch size give the same
responses, and a policy and its reference draw from the same random stream.

A response is the new ids up to and including the first end token (``eos_token_id``), or
``max_new_tokens`` ids where none came; its text is ``tokenizer.decode(ids, skip_special_tokens=True)``
and its length is its number of ids.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from dataclasses import dataclass

import torch
from torch import nn

Tensor = torch.Tensor


@dataclass(frozen=True)
class Sample:
    """One sampled response: its text, its ids (end token included where drawn), whether it ended."""

    text: str
    ids: tuple[int, ...]
    ended: bool


def prompt_ids(tokenizer, prompt, *, where: str = "prompt") -> list[int]:
    """The ids of one prompt, a string or a list of messages (see the module docstring)."""
    if isinstance(prompt, list):
        if not getattr(tokenizer, "chat_template", None):
            raise ValueError(f"{where} is a list of messages but the model's tokenizer has no chat template; "
                             "give plain-text prompts, or a model whose tokenizer_config.json has a chat_template")
        text = tokenizer.apply_chat_template(prompt, add_generation_prompt=True, tokenize=False)
        ids = list(tokenizer(text, add_special_tokens=False)["input_ids"])
    elif isinstance(prompt, str):
        ids = list(tokenizer(prompt)["input_ids"])
    else:
        raise TypeError(f"{where} must be a string or a list of {{role, content}} messages, got "
                        f"{type(prompt).__name__}")
    if not ids:
        raise ValueError(f"{where} has no tokens, so nothing conditions the response")
    return ids


def left_padded(tokenizer, rows: list[list[int]], pad_id: int) -> tuple[Tensor, Tensor]:
    """Ids (N, T) padded on the left with ``pad_id`` (``tokenizer.pad``) and the attention mask (N, T)."""
    if tokenizer.pad_token_id is None:  # common practice: pad with the end token; the mask hides it
        tokenizer.pad_token_id = pad_id
    batch = tokenizer.pad({"input_ids": rows}, padding=True, padding_side="left", return_tensors="pt")
    return batch["input_ids"], batch["attention_mask"]


def generation_settings(tokenizer, max_new_tokens: int):
    """``GenerationConfig`` for plain ancestral sampling: temperature 1, no top-k or top-p cut."""
    from transformers import GenerationConfig

    if tokenizer.eos_token_id is None:
        raise ValueError("the model's tokenizer has no end-of-sequence token (eos_token), so a sampled response "
                         "never ends before evaluate.max_new_tokens; save the tokenizer with an eos_token")
    pad = tokenizer.pad_token_id if tokenizer.pad_token_id is not None else tokenizer.eos_token_id
    return GenerationConfig(do_sample=True, max_new_tokens=int(max_new_tokens), temperature=1.0, top_k=0,
                            top_p=1.0, eos_token_id=tokenizer.eos_token_id, pad_token_id=pad)


def cut_at_end(new: list[int], eos_id: int) -> tuple[list[int], bool]:
    """The ids up to and including the first ``eos_id``, and whether it was there."""
    if eos_id in new:
        return new[: new.index(eos_id) + 1], True
    return new, False


@contextlib.contextmanager
def saved_settings_off(model: nn.Module) -> Iterator[None]:
    """The model's own ``generation_config`` (from its generation_config.json) replaced by transformers'
    defaults for the ``with`` block: ``generate`` fills every setting left unset from it (a repetition
    penalty, a minimum length, suppressed tokens), which would change what "sampling from the model" means."""
    from transformers import GenerationConfig

    owner = model.get_base_model() if hasattr(model, "get_base_model") else model  # peft: the wrapped model's
    saved = owner.generation_config
    owner.generation_config = GenerationConfig()
    try:
        yield
    finally:
        owner.generation_config = saved


@torch.no_grad()
def sample_responses(model: nn.Module, tokenizer, prompts: list[list[int]], *, max_new_tokens: int, seed: int,
                     batch_size: int = 16) -> list[Sample]:
    """One response per prompt (ids from :func:`prompt_ids`), by ``model.generate`` (see the module docstring)."""
    settings = generation_settings(tokenizer, max_new_tokens)
    was_training = model.training
    model.eval()
    torch.manual_seed(seed)
    out = []
    for start in range(0, len(prompts), batch_size):
        ids, mask = left_padded(tokenizer, prompts[start:start + batch_size], settings.pad_token_id)  # (b, T)
        with saved_settings_off(model):
            drawn = model.generate(input_ids=ids, attention_mask=mask, generation_config=settings)  # (b, T + L)
        for row in drawn[:, ids.shape[1]:].tolist():  # the new ids only
            kept, ended = cut_at_end(row, settings.eos_token_id)
            out.append(Sample(tokenizer.decode(kept, skip_special_tokens=True), tuple(kept), ended))
    model.train(was_training)
    return out
