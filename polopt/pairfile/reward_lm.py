"""``polopt reward task=pairs model=local_lm``: a Bradley–Terry reward model on a local causal LM.

The file is read and encoded as ``polopt train task=pairs model=local_lm`` reads it
(:func:`polopt.pairfile.local_lm.read_for_model`: the model's tokenizer, chat rows by its chat template
or ``task.chat_template``, ``task.truncation`` within the context), a share ``reward.heldout`` of the
accepted pairs is held out by a permutation seeded with ``train.seed``, and a linear scalar head on the
frozen model's last hidden state at the last real token (:mod:`polopt.methods.lm_reward`) is fitted to
the rest by Adam (``reward.steps``, ``reward.lr``, ``reward.l2`` on the head's weights) under
Bradley–Terry. The model's weights are not trained, so ``model.adapter`` and ``model.lora.*`` are
refused; ``model.seed`` starts the head.
"""

from __future__ import annotations

import torch

from polopt.data.kinds import require_pairs
from polopt.methods.lm_reward import fit_head, hidden_features, lm_identity, new_head, pad_rows
from polopt.methods.reward_model import split_heldout
from polopt.models.local_lm import load_model, model_folder
from polopt.models.lora import LoraSettings
from polopt.pairfile.local_lm import context_of, read_for_model
from polopt.pairfile.reward import heldout_summary


def check_reward_keys(task, model: dict) -> None:
    """One ValueError for a key ``polopt reward ... model=local_lm`` would not read."""
    if task.stream:
        raise ValueError("task.stream=true is not read by polopt reward model=local_lm (it reads the file in memory): "
                         "set task.stream=false")
    if task.reference is not None:
        raise ValueError(f"task.reference_checkpoint is not read by polopt reward (a reward model has no reference), "
                         f"got {task.reference!r}: leave it out")
    if model.get("adapter") is not None or LoraSettings.from_config(model.get("lora")) != LoraSettings():
        raise ValueError(f"polopt reward model=local_lm trains a scalar head on the frozen model, so model.adapter "
                         f"and model.lora.* are not read; got model.adapter={model.get('adapter')!r}: leave them out")


def fit_lm_reward(task, *, mode: str, n_pairs: int | None, seed: int, model: dict, l2: float = 0.0,
                  heldout: float = 0.2, bins: int = 10, steps: int = 300, lr: float = 3e-3) -> dict:
    """Fit the head to the file's accepted pairs; return ``summary``, ``screen`` and ``file`` (see the module
    docstring). ``task``: a :class:`polopt.pairfile.task.PairTask`; ``model``: the ``model`` config."""
    if mode != "sampled":
        raise ValueError(f"task.mode must be sampled for task=pairs (a file holds sampled pairs), got {mode!r}")
    check_reward_keys(task, model)
    file = task.file
    data, token_ids, tokenizer = read_for_model(file, path=model.get("path"), context=model.get("context"),
                                                chat_template=task.chat_template)
    require_pairs(data.kind, "polopt reward (a reward or preference head fitted to pairs)")
    path = str(model_folder(model.get("path")).resolve())  # the file names its model wherever it is read from
    n = len(token_ids) if n_pairs is None else min(int(n_pairs), len(token_ids))
    if n < 2:
        raise ValueError(f"task.path {str(file.path)!r}: {n} pair(s) accepted; a reward model needs at least 2")
    body = load_model(path)
    prompt, winner, loser = (pad_rows([row[k] for row in token_ids[:n]]) for k in range(3))  # (N, T) each
    chosen, rejected = hidden_features(body, prompt, winner), hidden_features(body, prompt, loser)  # (N, H) each
    fit, out = (torch.as_tensor(i) for i in split_heldout(n, heldout, seed))
    head = new_head(body.config.hidden_size, seed=int(model.get("seed", 0)))
    history = fit_head(head, chosen[fit], rejected[fit], steps=int(steps), lr=float(lr), l2=float(l2), seed=seed)
    with torch.no_grad():
        margin = (head(chosen[out]) - head(rejected[out])).squeeze(-1).double().numpy()  # (N_out,)
    context = context_of(path, model.get("context"))
    context = context if file.max_length is None else min(context, file.max_length)
    summary = {"task": "pairs", "kind": "local_lm", "path": str(file.path), "model": path, "body": "frozen",
               "head_parameters": sum(p.numel() for p in head.parameters()),
               **heldout_summary(data, n, fit, out, margin, l2=l2, bins=bins, steps=steps, lr=lr, history=history),
               "notes": ["a linear head on the frozen model's last hidden state at the last real token; the pairs "
                         "are the file's rows: heldout_rows lists the held-out ones"]}
    acc, ece = summary["heldout_accuracy"], summary["calibration_error"]
    screen = (f"pairs: {file.path} on {path} (frozen, a head of {summary['head_parameters']} weights): fitted on "
              f"{len(fit)}, held out {len(out)}\nheldout_accuracy {'-' if acc is None else f'{acc:.4f}'}  "
              f"calibration_error {'-' if ece is None else f'{ece:.4f}'}")
    identity = lm_identity(path, vocab_size=body.config.vocab_size, hidden_size=body.config.hidden_size,
                           context=context, file=str(file.path))
    return {"summary": summary, "screen": screen,
            "file": {"kind": "local_lm", "identity": identity, "state": {"head": head.state_dict()},
                     "l2": float(l2), "chat_template": tokenizer.chat_template}}
