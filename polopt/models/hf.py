"""A local ``transformers`` causal language model as a policy or a reference (the ``hf`` extra).

``model=local_lm model.path=DIR`` names a directory written by ``save_pretrained``: the
model is read with ``AutoModelForCausalLM.from_pretrained(DIR, local_files_only=True)``
and its tokenizer with ``AutoTokenizer.from_pretrained(DIR, local_files_only=True)``;
nothing is ever downloaded. The model is wrapped to the same
``logprobs(prompt, response) -> (B,)`` interface as :class:`polopt.models.logprobs.SequencePolicy`,
with the same packing and masking (:func:`polopt.models.logprobs.pack`: prompt then
response, right padding, prompt and padding masked out of the sum).

Padding. Many causal-LM tokenizers have no pad token, or reuse the end token as
one; :func:`polopt.models.logprobs.pack` finds lengths by comparing with the pad id, so an
end token inside a response would be lost. Text pairs are therefore padded with
:data:`PAD` = -1, an id no vocabulary has; :class:`CausalLM` feeds the model id 0
there and masks it out with the attention mask. (With right padding and causal
attention no real token attends to a pad anyway.)

Text to tokens (:func:`encode`): the prompt as the tokenizer encodes it with its
special tokens (a beginning-of-sequence token where it adds one), the response
without them and followed by the end token, so that the model also scores where a
response stops. Prompt and response are tokenised apart, so a merge across their
boundary never happens (common practice).

On the enumerable sequence task (``task=sequence model=local_lm``) the task's own token
ids are the input, the model's vocabulary must hold them (``vocab_size`` at least
the task's), and the next-token distribution is restricted to the task's output
tokens (the first ``output_size`` logits), so that the enumerated responses carry
all the probability, as with the built-in models.
"""

from __future__ import annotations

import os
from pathlib import Path

import torch
from torch import nn

from polopt.models.logprobs import SequencePolicy, batched_logprobs, lengths, real_tokens
from polopt.pairs import PairSet

Tensor = torch.Tensor

PAD = -1  # the pad id of encoded text: outside every vocabulary


def _transformers():
    try:
        import transformers
    except ImportError:
        raise ValueError("model=local_lm needs the transformers package; install the extra: "
                         "pip install 'polopt[local-lm]'") from None
    return transformers


def _directory(path) -> Path:
    if path is None or path == "???":
        raise ValueError("model=local_lm needs model.path=DIR, a local directory saved by a transformers causal LM")
    directory = Path(path)
    if not (directory / "config.json").is_file():
        raise ValueError(f"model.path must be a local directory holding a transformers causal LM (config.json and "
                         f"its weights, written by save_pretrained), got {str(path)!r}; nothing is downloaded")
    return directory


def load_model(path, *, dtype: torch.dtype = torch.float32) -> nn.Module:
    """``AutoModelForCausalLM.from_pretrained(path, local_files_only=True)`` in ``dtype``, training mode off."""
    transformers = _transformers()
    os.environ.setdefault("HF_HUB_OFFLINE", "1")  # belt and braces: local_files_only already forbids the hub
    model = transformers.AutoModelForCausalLM.from_pretrained(str(_directory(path)), local_files_only=True)
    return model.to(dtype).eval()  # deterministic log-probs: no dropout (a policy that wants it calls .train())


def load_tokenizer(path):
    """``AutoTokenizer.from_pretrained(path, local_files_only=True)``."""
    transformers = _transformers()
    return transformers.AutoTokenizer.from_pretrained(str(_directory(path)), local_files_only=True)


class CausalLM(nn.Module):
    """A transformers causal LM as polopt's sequence model: tokens (B, T) -> logits (B, T, V_out).

    Positions holding ``pad_id`` are fed as id 0 and masked out by the attention mask;
    ``output_size`` keeps the first logits only (the task's output tokens), None keeps all.
    """

    def __init__(self, model: nn.Module, *, pad_id: int = PAD, output_size: int | None = None):
        super().__init__()
        self.model = model
        self.pad_id = pad_id
        self.output_size = output_size

    def forward(self, tokens: Tensor) -> Tensor:
        real = tokens != self.pad_id  # (B, T)
        ids = torch.where(real, tokens, 0)  # (B, T)
        logits = self.model(input_ids=ids, attention_mask=real.long()).logits  # (B, T, V)
        return logits if self.output_size is None else logits[..., : self.output_size]  # (B, T, V_out)


def causal_lm_policy(path, *, pad_id: int = PAD, output_size: int | None = None, vocab_needed: int = 0,
                     context_needed: int = 0, frozen: bool = False) -> SequencePolicy:
    """The model in ``path`` as a :class:`SequencePolicy` (``frozen``: no gradients, for a reference).

    ``vocab_needed``/``context_needed``: the token ids and positions the caller will feed it."""
    model = load_model(path)
    config = model.config
    if vocab_needed > config.vocab_size:
        raise ValueError(f"model.path {str(path)!r}: the model's vocab_size is {config.vocab_size} but this task "
                         f"uses {vocab_needed} token ids; save a model with vocab_size >= {vocab_needed}")
    positions = getattr(config, "max_position_embeddings", None) or getattr(config, "n_positions", None)
    if positions is not None and context_needed > positions:
        raise ValueError(f"model.path {str(path)!r}: the model holds {positions} positions but this task needs "
                         f"{context_needed}")
    policy = SequencePolicy(CausalLM(model, pad_id=pad_id, output_size=output_size), pad_id=pad_id)
    if frozen:
        policy.requires_grad_(False)
    return policy


def encode(tokenizer, texts: list[str], *, response: bool) -> Tensor:
    """Right-padded ids (N, T) of ``texts`` (padding :data:`PAD`); see the module docstring for
    which special tokens a prompt and a response get."""
    rows = []
    for text in texts:
        ids = list(tokenizer(text, add_special_tokens=not response)["input_ids"])
        if response:
            if tokenizer.eos_token_id is None:
                raise ValueError("the tokenizer has no end-of-sequence token (eos_token); a response must end "
                                 "with one so that the model scores where it stops")
            ids.append(tokenizer.eos_token_id)
        elif not ids:
            if tokenizer.bos_token_id is None:
                raise ValueError(f"the prompt {text!r} has no tokens and the tokenizer has no bos_token to "
                                 "stand for it")
            ids = [tokenizer.bos_token_id]
        rows.append(ids)
    width = max((len(r) for r in rows), default=0)
    out = torch.full((len(rows), width), PAD, dtype=torch.long)  # (N, T)
    for i, r in enumerate(rows):
        out[i, : len(r)] = torch.as_tensor(r, dtype=torch.long)
    return out


def text_pairs(reference: SequencePolicy, tokenizer, prompt: list[str], winner: list[str], loser: list[str],
               weight: list[float] | None = None, *, batch_size: int = 64, progress: bool = False) -> PairSet:
    """Text pairs as a :class:`polopt.pairs.PairSet` for the trainer, with the reference's
    log-probabilities computed once over the dataset (winners and losers in one pass, no gradients)."""
    p = encode(tokenizer, prompt, response=False)  # (N, T_p)
    w = encode(tokenizer, winner, response=True)  # (N, T_w)
    lo = encode(tokenizer, loser, response=True)  # (N, T_l)
    width = max(w.shape[1], lo.shape[1])
    w, lo = (torch.nn.functional.pad(t, (0, width - t.shape[1]), value=PAD) for t in (w, lo))  # (N, T_r)
    both = batched_logprobs(reference.model, torch.cat([p, p]), torch.cat([w, lo]), pad_id=PAD,
                            batch_size=batch_size, progress=progress, desc="reference log-probs")  # (2N,)
    ref_w, ref_l = both.double().chunk(2)
    tokens = real_tokens(p, w, pad_id=PAD) + real_tokens(p, lo, pad_id=PAD)  # (N,)
    weights = None if weight is None else torch.as_tensor(weight, dtype=torch.float64)
    return PairSet(p, w, lo, ref_w, ref_l, weights, tokens=tokens, len_winner=lengths(w, pad_id=PAD),
                   len_loser=lengths(lo, pad_id=PAD))  # (N,) each: response tokens for pair objectives
