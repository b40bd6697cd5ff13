"""A finished ``model=local_lm`` run's trained policy and its reference, loaded for sampling.

A run folder RUN of ``model=local_lm`` holds ``config.yaml`` (the resolved config) and ``policy/``,
written by ``save_pretrained`` when training ends:

- a whole model (``config.json`` and safetensors weights): the policy is
  ``AutoModelForCausalLM.from_pretrained(RUN/policy)`` and the reference the model at the run's
  ``model.path`` (or at ``task.reference_checkpoint`` where the run named a local model folder there);
- a peft adapter (``adapter_config.json``, ``adapter_model.safetensors``): the policy is
  ``peft.PeftModel.from_pretrained(base, RUN/policy)`` over the model at ``model.path``, and the
  reference is the same model with the adapter switched off (peft's ``disable_adapter``), as in
  training: one copy of the base weights.

The tokenizer is the one saved in ``policy/`` where there is one, else the base model's. Everything
is read from local folders only (``local_files_only``); weights from safetensors only.
"""

from __future__ import annotations

import contextlib
import os
import warnings
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

from torch import nn

from polopt.models import local_lm

POLICY_DIR = "policy"
ADAPTER_CONFIG = "adapter_config.json"  # what peft's save_pretrained writes beside the adapter's weights
ADAPTER_WEIGHTS = "adapter_model.safetensors"


@dataclass
class RunModels:
    """The policy, the reference (None: the policy with its adapter off) and the tokenizer of one run."""

    policy: nn.Module
    reference: nn.Module | None
    tokenizer: object
    base: Path
    adapter: bool

    @contextlib.contextmanager
    def model(self, which: str) -> Iterator[nn.Module]:
        """The model to sample ``which`` (``policy`` or ``reference``) from, for the ``with`` block."""
        if which == "policy":
            yield self.policy
        elif self.reference is not None:
            yield self.reference
        else:
            with self.policy.disable_adapter():  # peft: the base weights alone, the reference of training
                yield self.policy


def run_config(run: Path) -> dict:
    """RUN/config.yaml as a plain dict; one ValueError where RUN is not a run folder."""
    from omegaconf import OmegaConf

    if not run.is_dir():
        raise ValueError(f"RUN must be a run folder (polopt train's output), got {str(run)!r}: no such folder")
    path = run / "config.yaml"
    if not path.is_file():
        raise ValueError(f"{str(run)!r} is not a run folder: it has no config.yaml (every polopt train run writes "
                         "its resolved config there)")
    return OmegaConf.to_container(OmegaConf.load(path), resolve=False)


def policy_folder(run: Path, config: dict) -> Path:
    """RUN/policy, checked: the run is a ``model=local_lm`` run and the folder is there."""
    kind = (config.get("model") or {}).get("kind")
    if kind != "local_lm":
        raise ValueError(f"{str(run)!r} was trained with model={kind}; polopt evaluate samples from the policy/ "
                         "folder of a model=local_lm run (a transformers model saved with save_pretrained)")
    folder = run / POLICY_DIR
    if not folder.is_dir():
        raise ValueError(f"{str(run)!r} has no {POLICY_DIR}/ folder: a model=local_lm run writes its trained policy "
                         "there with save_pretrained when training ends; was the run interrupted?")
    return folder


def reference_folder(config: dict) -> Path:
    """The reference's model folder: ``task.reference_checkpoint`` where it is a local model folder, else
    ``model.path``."""
    named = (config.get("task") or {}).get("reference_checkpoint")
    if named and (Path(str(named)) / "config.json").is_file():
        return Path(str(named))
    return Path(str(config["model"].get("path")))


def policy_tokenizer(folder: Path):
    """The tokenizer saved in ``policy/`` (None: there is none). An adapter's folder has no config.json, so it is
    read with ``AutoTokenizer`` directly: local files only, and ``trust_remote_code`` left off, so a tokenizer
    that names custom code is refused by transformers itself."""
    if not (folder / "tokenizer_config.json").is_file():
        return None
    from transformers import AutoTokenizer

    return AutoTokenizer.from_pretrained(str(folder), local_files_only=True)


def load_run(run) -> RunModels:
    """The policy, reference and tokenizer of the finished run in folder ``run`` (see the module docstring)."""
    with local_lm.quiet_transformers():
        return _load_run(Path(run))


def _load_run(run: Path) -> RunModels:
    config = run_config(run)
    folder = policy_folder(run, config)
    base = Path(str(config["model"].get("path")))
    if not base.is_dir():
        raise ValueError(f"{str(run / 'config.yaml')!r} names model.path {str(base)!r}, which is not a folder here "
                         "(a relative path is read from the folder polopt evaluate runs in): run it from the folder "
                         "the run was trained in")
    os.environ.setdefault("HF_HUB_OFFLINE", "1")  # nothing is downloaded: every path below is a local folder
    tokenizer = policy_tokenizer(folder) or local_lm.load_tokenizer(base)
    if (folder / ADAPTER_CONFIG).is_file():
        if not (folder / ADAPTER_WEIGHTS).is_file():
            raise ValueError(f"{str(folder)!r} holds a peft adapter without {ADAPTER_WEIGHTS}; polopt reads weights "
                             "from safetensors only (save the adapter with save_pretrained)")
        import peft

        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=".*is_gradient_checkpointing.*")  # peft asks an old name
            policy = peft.PeftModel.from_pretrained(local_lm.load_model(base), str(folder), is_trainable=False)
        return RunModels(policy.eval(), None, tokenizer, base, adapter=True)
    return RunModels(local_lm.load_model(folder), local_lm.load_model(reference_folder(config)), tokenizer, base,
                     adapter=False)
