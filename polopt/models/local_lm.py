"""A local ``transformers`` causal language model as a policy or a reference (``model=local_lm``, extra ``local-lm``).

``model=local_lm model.path=DIR`` names a folder written by ``save_pretrained``: the model is read with
``AutoModelForCausalLM.from_pretrained(DIR, local_files_only=True, use_safetensors=True)`` and its
tokenizer with ``AutoTokenizer.from_pretrained(DIR, local_files_only=True)``; nothing is ever downloaded.

Loading runs no code from the folder (:func:`model_folder` checks before transformers reads anything):
``trust_remote_code`` is never set, and a folder whose config.json (or tokenizer_config.json) names
custom code (``auto_map``) or an architecture transformers does not have built in is refused; weights are
read from safetensors only, so a folder holding only pickled weights (``pytorch_model.bin``: unpickling
can run code) is refused.

The model is wrapped (:class:`CausalLM`) to polopt's sequence-model interface, tokens (B, T) ->
logits (B, T, V), so that :class:`polopt.models.logprobs.SequencePolicy` packs, masks and sums
its log-probabilities as for the built-in models; a pair's winner and loser are scored over one
pass of their prompt through the model's key/value cache (``pair_logprobs``,
:mod:`polopt.models.prefix_scoring`; ``train.share_prompt=true``, the default).

Padding. Many causal-LM tokenizers have no pad token, or reuse the end token as one;
:func:`polopt.models.logprobs.pack` finds lengths by comparing with the pad id, so an end token inside
a response would be lost. Token rows are therefore padded with :data:`PAD` = -1, an id no vocabulary
has; :class:`CausalLM` feeds the model id 0 there and masks it out with the attention mask. (With right
padding and causal attention no real token attends to a pad anyway.)

On the enumerable sequence task (``task=sequence model=local_lm``) the task's own token ids are the
input, the model's vocabulary must hold them (``vocab_size`` at least the task's), and the next-token
distribution is restricted to the task's output tokens (the first ``output_size`` logits), so that the
enumerated responses carry all the probability, as with the built-in models.
"""

from __future__ import annotations

import contextlib
import json
import os
from pathlib import Path

import torch
from torch import nn

from polopt.models.logprobs import SequencePolicy

Tensor = torch.Tensor

PAD = -1  # the pad id of encoded text: outside every vocabulary
PICKLED = ("*.bin", "*.pt", "*.pth", "*.ckpt", "*.pkl")  # weight files a pickle may hide code in


def transformers_module():
    """The ``transformers`` package, or a one-line error saying which extra to install."""
    try:
        import transformers
    except ImportError:
        raise ValueError("model=local_lm needs the transformers package; install the extra: "
                         "pip install 'polopt[local-lm]'") from None
    return transformers


def _read_json(path: Path, field: str) -> dict:
    try:
        value = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as err:
        raise ValueError(f"{field}: {str(path)!r} cannot be read as JSON ({err})") from None
    if not isinstance(value, dict):
        raise ValueError(f"{field}: {str(path)!r} must hold a JSON object")
    return value


def model_folder(path, *, field: str = "model.path") -> Path:
    """``path`` as a folder a causal LM can be loaded from without running any of its code, else one ValueError.

    Refused: no folder or no config.json; an ``auto_map`` in config.json or tokenizer_config.json (custom
    code); a ``model_type`` that transformers does not have built in; no ``*.safetensors`` weights.
    """
    if path is None or str(path) in ("", "???"):
        raise ValueError(f"model=local_lm needs {field}=DIR, a local folder written by a transformers causal LM's "
                         "save_pretrained")
    directory = Path(path)
    if not (directory / "config.json").is_file():
        raise ValueError(f"{field} must be a local folder holding a transformers causal LM (config.json and its "
                         f"weights as safetensors, written by save_pretrained), got {str(path)!r} (no config.json); "
                         "nothing is downloaded")
    config = _read_json(directory / "config.json", field)
    for name in ("config.json", "tokenizer_config.json"):
        found = config if name == "config.json" else (_read_json(directory / name, field)
                                                       if (directory / name).is_file() else {})
        if "auto_map" in found:
            raise ValueError(f"{field} {str(path)!r}: {name} names custom code (auto_map: "
                             f"{sorted(found['auto_map'])}); polopt never runs code from a model folder "
                             "(trust_remote_code is never set): use an architecture built into transformers")
    from transformers.models.auto.configuration_auto import CONFIG_MAPPING

    if config.get("model_type") not in CONFIG_MAPPING:
        raise ValueError(f"{field} {str(path)!r}: config.json's model_type {config.get('model_type')!r} is not built "
                         "into transformers, and polopt never runs code from a model folder (trust_remote_code is "
                         "never set)")
    if not any(directory.glob("*.safetensors")):
        pickled = sorted(p.name for pattern in PICKLED for p in directory.glob(pattern))
        what = f"only pickled weights ({', '.join(pickled)})" if pickled else "no weights"
        raise ValueError(f"{field} {str(path)!r} holds {what}; polopt reads weights from safetensors only (a "
                         "pickle can run code): save the model with save_pretrained, which writes "
                         "model.safetensors")
    return directory


@contextlib.contextmanager
def quiet_transformers():
    """No progress bars from transformers while it loads (its global switch, restored after)."""
    from transformers.utils import logging

    was_enabled = logging.is_progress_bar_enabled()
    logging.disable_progress_bar()
    try:
        yield
    finally:
        if was_enabled:
            logging.enable_progress_bar()


def load_model(path, *, field: str = "model.path", dtype: torch.dtype = torch.float32) -> nn.Module:
    """``AutoModelForCausalLM.from_pretrained(path, local_files_only=True, use_safetensors=True)`` in
    ``dtype``, in eval mode (no dropout: deterministic log-probs), after :func:`model_folder`'s checks."""
    transformers = transformers_module()
    directory = model_folder(path, field=field)
    os.environ.setdefault("HF_HUB_OFFLINE", "1")  # belt and braces: local_files_only already forbids the hub
    with quiet_transformers():
        model = transformers.AutoModelForCausalLM.from_pretrained(str(directory), local_files_only=True,
                                                                  use_safetensors=True)
    return model.to(dtype).eval()


def load_tokenizer(path, *, field: str = "model.path"):
    """``AutoTokenizer.from_pretrained(path, local_files_only=True)``, after :func:`model_folder`'s checks."""
    transformers = transformers_module()
    directory = model_folder(path, field=field)
    with quiet_transformers():
        return transformers.AutoTokenizer.from_pretrained(str(directory), local_files_only=True)


def load_config(path, *, field: str = "model.path"):
    """``AutoConfig.from_pretrained(path, local_files_only=True)``, after :func:`model_folder`'s checks."""
    transformers = transformers_module()
    return transformers.AutoConfig.from_pretrained(str(model_folder(path, field=field)), local_files_only=True)


def positions(config) -> int | None:
    """The most input positions the model takes (``max_position_embeddings`` or ``n_positions``), None if unstated."""
    found = getattr(config, "max_position_embeddings", None) or getattr(config, "n_positions", None)
    return None if found is None else int(found)


class CausalLM(nn.Module):
    """A transformers causal LM as polopt's sequence model: tokens (B, T) -> logits (B, T, V_out).

    Positions holding ``pad_id`` are fed as id 0 and masked out by the attention mask;
    ``output_size`` keeps the first logits only (the task's output tokens), None keeps all.
    ``adapter_off``: the model is a peft model and this view runs it with its adapter switched off
    (peft's ``disable_adapter``): the base weights, the reference of a LoRA run.
    """

    def __init__(self, model: nn.Module, *, pad_id: int = PAD, output_size: int | None = None,
                 adapter_off: bool = False):
        super().__init__()
        self.model = model
        self.pad_id = pad_id
        self.output_size = output_size
        self.adapter_off = adapter_off

    @property
    def scores_pairs(self) -> bool:
        """Whether :meth:`pair_logprobs` applies: the full vocabulary is scored (no ``output_size``)."""
        return self.output_size is None

    def adapter_switch(self):
        """The context in which the model computes as this view says: its adapter off, or as it is."""
        return self.model.disable_adapter() if self.adapter_off else contextlib.nullcontext()

    def pair_logprobs(self, prompt: Tensor, winner: Tensor, loser: Tensor) -> tuple[Tensor, Tensor]:
        """``log pi(winner | prompt)`` and ``log pi(loser | prompt)`` (B,) each, every prompt computed once through
        the key/value cache (:func:`polopt.models.prefix_scoring.prompt_cached_pair_logprobs`; the values of
        separate scoring up to float rounding). Token tensors (B, T) right-padded with ``pad_id``."""
        from polopt.models.prefix_scoring import prompt_cached_pair_logprobs

        with self.adapter_switch():
            return prompt_cached_pair_logprobs(self.model, prompt, winner, loser, pad_id=self.pad_id)

    def forward(self, tokens: Tensor) -> Tensor:
        real = tokens != self.pad_id  # (B, T)
        ids = torch.where(real, tokens, 0)  # (B, T)
        with self.adapter_switch():
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
    most = positions(config)
    if most is not None and context_needed > most:
        raise ValueError(f"model.path {str(path)!r}: the model holds {most} positions but this task needs "
                         f"{context_needed}")
    policy = SequencePolicy(CausalLM(model, pad_id=pad_id, output_size=output_size), pad_id=pad_id)
    if frozen:
        policy.requires_grad_(False)
    return policy
