"""``polopt reward task=pairs model=local_lm reward.kind=preference``: an antisymmetric head on a local LM.

The file is read and encoded as for the Bradley–Terry head on the same model
(:mod:`polopt.pairfile.reward_lm`: the model's tokenizer, chat rows by its chat template), the same share
``reward.heldout`` of the accepted pairs is held out by the same permutation, and an
:class:`polopt.methods.preference_model.AntisymmetricHead` on the frozen model's last hidden states of the two
responses (:func:`polopt.methods.lm_reward.hidden_features`) is fitted to the rest by maximum likelihood with
Adam. The Bradley–Terry linear head is fitted beside it on the same rows (:func:`fit_lm_reward`), so both
held-out accuracies are measured on the same held-out rows. The file holds the head only, with the model's
identity (:func:`polopt.methods.lm_reward.lm_identity`).
"""

from __future__ import annotations

import torch

from polopt.methods.lm_reward import hidden_features, lm_identity, pad_rows
from polopt.methods.preference_model import AntisymmetricHead, fit_feature_head
from polopt.methods.reward_model import split_heldout
from polopt.models.local_lm import load_model, model_folder
from polopt.pairfile.local_lm import context_of, read_for_model
from polopt.pairfile.preference import beside, screen_of
from polopt.pairfile.reward import heldout_summary
from polopt.pairfile.reward_lm import check_reward_keys, fit_lm_reward


def fit_lm_preference(task, *, mode: str, n_pairs: int | None, seed: int, model: dict, l2: float = 0.0,
                      heldout: float = 0.2, bins: int = 10, steps: int = 300, lr: float = 3e-3) -> dict:
    """Fit the head to the file's accepted pairs; return ``summary``, ``screen`` and ``file`` (module docstring)."""
    if mode != "sampled":
        raise ValueError(f"task.mode must be sampled for task=pairs (a file holds sampled pairs), got {mode!r}")
    check_reward_keys(task, model)
    bradley_terry = fit_lm_reward(task, mode=mode, n_pairs=n_pairs, seed=seed, model=model, l2=l2, heldout=heldout,
                                  bins=bins, steps=steps, lr=lr)["summary"]  # refuses a file of < 2 pairs
    file = task.file
    data, token_ids, _ = read_for_model(file, path=model.get("path"), context=model.get("context"),
                                        chat_template=task.chat_template)
    path = str(model_folder(model.get("path")).resolve())
    n = len(token_ids) if n_pairs is None else min(int(n_pairs), len(token_ids))
    body = load_model(path)
    prompt, winner, loser = (pad_rows([row[k] for row in token_ids[:n]]) for k in range(3))  # (N, T) each
    chosen, rejected = hidden_features(body, prompt, winner), hidden_features(body, prompt, loser)  # (N, H) each
    fit, out = (torch.as_tensor(i) for i in split_heldout(n, heldout, seed))
    head = AntisymmetricHead(body.config.hidden_size, seed=int(model.get("seed", 0)))
    history = fit_feature_head(head, chosen[fit], rejected[fit], steps=int(steps), lr=float(lr), l2=float(l2),
                               seed=seed)
    with torch.no_grad():
        logit = head(chosen[out], rejected[out]).double().numpy()  # (N_out,)
    own = heldout_summary(data, n, fit, out, logit, l2=l2, bins=bins, steps=steps, lr=lr, history=history)
    summary = {"task": "pairs", "kind": "preference_local_lm", "path": str(file.path), "model": path, "body": "frozen",
               "head_parameters": sum(p.numel() for p in head.parameters()), **own, "preference": None,
               **beside(bradley_terry, own),
               "notes": ["an antisymmetric head on the frozen model's last hidden states of both responses; the "
                         "pairs are the file's rows: heldout_rows lists the held-out ones"]}
    context = context_of(path, model.get("context"))
    context = context if file.max_length is None else min(context, file.max_length)
    identity = lm_identity(path, vocab_size=body.config.vocab_size, hidden_size=body.config.hidden_size,
                           context=context, file=str(file.path))
    return {"summary": summary, "screen": screen_of(summary, f"pairs: {file.path} on {path} (frozen)"),
            "file": {"kind": "preference_local_lm", "identity": identity, "state": {"head": head.state_dict()},
                     "l2": float(l2)}}
