"""LoRA adapters on a local causal LM through peft (``model.adapter=lora``, ``model.lora.*``).

LoRA (Hu et al., LoRA: Low-Rank Adaptation of Large Language Models, 2021) freezes the weights W of
the chosen linear layers and trains a low-rank update: ``W x + (alpha / r) B A x`` with A (r, d_in),
B (d_out, r), B starting at zero, so the adapted model starts exactly at the base model. peft does the
work: :func:`with_lora` is ``peft.get_peft_model(model, peft.LoraConfig(...))``. Its reference is the
same module with the adapter switched off (peft's ``disable_adapter``;
:class:`polopt.models.local_lm.CausalLM` with ``adapter_off``), so one copy of the base weights is held.

Targets (``model.lora.targets``): null takes peft's own choice for the architecture (its table by
``model_type``: e.g. ``q_proj, v_proj`` for Llama, ``c_attn`` for GPT-2); an architecture peft has no
entry for gets every linear layer of its attention blocks. Named targets are matched against the
names of the model's linear layers first, so a name the model does not have is one line.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import torch
from torch import nn

ADAPTERS = ("lora",)  # model.adapter; null: full fine-tuning


@dataclass(frozen=True)
class LoraSettings:
    """``model.lora``: rank ``r``, scale ``alpha`` (the update is scaled by alpha / r), ``dropout`` on the
    adapter's input, ``targets`` (layer names; None: see the module docstring)."""

    r: int = 8
    alpha: float = 16
    dropout: float = 0.0
    targets: tuple[str, ...] | None = None

    @classmethod
    def from_config(cls, lora: dict | None) -> LoraSettings:
        """From the ``model.lora`` mapping, checked (one ValueError naming the key)."""
        values = dict(lora or {})
        unknown = sorted(set(values) - {"r", "alpha", "dropout", "targets"})
        if unknown:
            raise ValueError(f"model.lora has the keys r, alpha, dropout, targets; got model.lora.{unknown[0]}")
        r, alpha, dropout = values.get("r", 8), values.get("alpha", 16), values.get("dropout", 0.0)
        targets = values.get("targets")
        if isinstance(r, bool) or not isinstance(r, int) or r < 1:
            raise ValueError(f"model.lora.r must be a positive integer (the adapter's rank), got {r!r}")
        if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or alpha <= 0:
            raise ValueError(f"model.lora.alpha must be a number > 0 (the update is scaled by alpha / r), "
                             f"got {alpha!r}")
        if isinstance(dropout, bool) or not isinstance(dropout, (int, float)) or not 0 <= dropout < 1:
            raise ValueError(f"model.lora.dropout must be a number in [0, 1), got {dropout!r}")
        if isinstance(targets, str):
            targets = [targets]
        if targets is not None and (not isinstance(targets, (list, tuple)) or not targets
                                    or not all(isinstance(t, str) and t for t in targets)):
            raise ValueError(f"model.lora.targets must be null (peft's choice for the architecture) or a list of "
                             f"layer names, e.g. [q_proj, v_proj], got {targets!r}")
        return cls(r, float(alpha), float(dropout), None if targets is None else tuple(targets))


def linear_names(model: nn.Module) -> list[str]:
    """The last name of every linear layer (``nn.Linear``, and GPT-2's ``Conv1D``), sorted, without repeats."""
    from transformers.pytorch_utils import Conv1D

    return sorted({name.rpartition(".")[2] for name, module in model.named_modules()
                   if isinstance(module, (nn.Linear, Conv1D)) and name})


def attention_linear_names(model: nn.Module) -> list[str]:
    """The last names of the linear layers inside the model's attention blocks (a module class whose name
    ends with ``Attention``): LoRA's targets where peft has no choice for the architecture."""
    from transformers.pytorch_utils import Conv1D

    found = set()
    for module in model.modules():
        if type(module).__name__.endswith("Attention"):
            found.update(name.rpartition(".")[2] for name, child in module.named_modules()
                         if isinstance(child, (nn.Linear, Conv1D)) and name)
    return sorted(found)


def lora_targets(model: nn.Module, settings: LoraSettings) -> list[str] | None:
    """The targets to hand peft: the named ones (each checked against the model's linear layers), None for
    peft's own choice where it has one for this ``model_type``, else the attention's linear layers."""
    from peft.utils import TRANSFORMERS_MODELS_TO_LORA_TARGET_MODULES_MAPPING as PEFT_CHOICE

    if settings.targets is not None:
        have = linear_names(model)
        missing = [t for t in settings.targets if t not in have]
        if missing:
            raise ValueError(f"model.lora.targets: the model has no linear layer named {missing[0]!r}; its linear "
                             f"layers are named {', '.join(have)}")
        return list(settings.targets)
    if getattr(model.config, "model_type", None) in PEFT_CHOICE:
        return None
    found = attention_linear_names(model)
    if not found:
        raise ValueError(f"model.lora.targets: peft has no default for model_type {model.config.model_type!r} and "
                         f"no linear layer was found in an attention block; name them, from: "
                         f"{', '.join(linear_names(model))}")
    return found


def with_lora(model: nn.Module, settings: LoraSettings, *, seed: int = 0) -> nn.Module:
    """``peft.get_peft_model`` of ``model`` with a LoRA adapter as ``settings`` say; A's random start drawn
    from ``seed`` (B starts at 0, so the result computes exactly what ``model`` did). Only the adapter trains."""
    import peft

    config = peft.LoraConfig(r=settings.r, lora_alpha=settings.alpha, lora_dropout=settings.dropout,
                             target_modules=lora_targets(model, settings), task_type="CAUSAL_LM")
    with torch.random.fork_rng(devices=[]), warnings.catch_warnings():
        torch.manual_seed(seed)
        warnings.filterwarnings("ignore", message=".*fan_in_fan_out.*")  # GPT-2's Conv1D: peft sets it itself
        warnings.filterwarnings("ignore", message=".*is_gradient_checkpointing.*")  # peft asks an old name
        adapted = peft.get_peft_model(model, config)
    adapted.eval()  # no dropout in the base model: deterministic log-probs, as without an adapter
    adapter_dropout_on(adapted, settings)
    return adapted


def adapter_dropout_on(adapted: nn.Module, settings: LoraSettings) -> None:
    """The adapter's dropout layers in training mode when ``model.lora.dropout`` > 0 (the rest of the model
    stays in eval mode: the base model's own dropout stays off)."""
    if settings.dropout > 0:
        for name, module in adapted.named_modules():
            if name.rpartition(".")[2] == "lora_dropout":
                module.train()
