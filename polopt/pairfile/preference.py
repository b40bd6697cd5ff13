"""``polopt reward task=pairs reward.kind=preference``: an antisymmetric pair head on the tiny transformer.

The file is read and encoded as for the scalar reward head (:func:`polopt.pairfile.reward.encode_pair_file`),
the same share ``reward.heldout`` of the accepted pairs is held out by the same permutation seeded with
``train.seed``, and :class:`polopt.methods.preference_model.PairwisePreferenceModel` is fitted to the rest
by maximum likelihood of ``P(winner > loser | prompt) = sigmoid(f(prompt, winner, loser))`` with Adam.
The Bradley–Terry scalar head is fitted to the same rows beside it (:func:`polopt.pairfile.reward.fit_pair_reward`),
so both held-out accuracies are measured on the same held-out rows. A file has no enumerable responses,
so the preference file holds the weights only (no table for ``method.preference``).
"""

from __future__ import annotations

import torch

from polopt.data import PairFileSpec
from polopt.methods.preference_model import PairwisePreferenceModel, fit_pairwise_preference, logits_of
from polopt.methods.reward_model import split_heldout
from polopt.pairfile.reward import encode_pair_file, fit_pair_reward, heldout_summary, pair_identity


def beside(bradley_terry: dict, own: dict) -> dict:
    """The Bradley–Terry fit's held-out measures next to the preference model's, and the accuracy gap."""
    acc, theirs = own["heldout_accuracy"], bradley_terry["heldout_accuracy"]
    return {"bradley_terry_heldout_accuracy": theirs,
            "bradley_terry_calibration_error": bradley_terry["calibration_error"], "bradley_terry_note": None,
            "accuracy_gap": None if acc is None or theirs is None else acc - theirs}


def screen_of(summary: dict, head: str) -> str:
    """The command's screen output for a pair file: the split, then both models' held-out measures."""
    def figure(v):
        return "-" if v is None else f"{v:.4f}"

    return (f"{head}: fitted on {summary['fitted_pairs']}, held out {summary['heldout_pairs']}\n"
            f"heldout_accuracy {figure(summary['heldout_accuracy'])} (preference)  "
            f"{figure(summary['bradley_terry_heldout_accuracy'])} (Bradley–Terry, the same split)\n"
            f"calibration_error {figure(summary['calibration_error'])} (preference)  "
            f"{figure(summary['bradley_terry_calibration_error'])} (Bradley–Terry)")


def fit_pair_preference(file: PairFileSpec, *, mode: str, n_pairs: int | None, seed: int, model: dict,
                        l2: float = 0.0, heldout: float = 0.2, bins: int = 10, steps: int = 300,
                        lr: float = 3e-3) -> dict:
    """Fit the pair head to the file's accepted pairs; return ``summary``, ``screen`` and ``file``."""
    encoded = encode_pair_file(file, mode=mode, n_pairs=n_pairs, model=model)
    data, n, ids, prompt, winner, loser, shape = encoded
    net = PairwisePreferenceModel(ids.vocab_size, pad_id=ids.pad, seed=int(model.get("seed", 0)), **shape)
    fit, out = (torch.as_tensor(i) for i in split_heldout(n, heldout, seed))
    history = fit_pairwise_preference(net, prompt[fit], winner[fit], loser[fit], steps=int(steps), lr=float(lr),
                                      l2=float(l2), seed=seed)
    logit = logits_of(net, prompt[out], winner[out], loser[out]).double().numpy()  # (N_out,)
    bradley_terry = fit_pair_reward(file, mode=mode, n_pairs=n_pairs, seed=seed, model=model, l2=l2,
                                    heldout=heldout, bins=bins, steps=steps, lr=lr, encoded=encoded)["summary"]
    own = heldout_summary(data, n, fit, out, logit, l2=l2, bins=bins, steps=steps, lr=lr, history=history)
    summary = {"task": "pairs", "kind": "preference_transformer", "path": str(file.path), **own, "preference": None,
               **beside(bradley_terry, own),
               "notes": ["an antisymmetric pair head on the tiny transformer; the pairs are the file's rows: "
                         "heldout_rows lists the held-out ones"]}
    return {"summary": summary, "screen": screen_of(summary, f"pairs: {file.path}"),
            "file": {"kind": "preference_transformer", "identity": pair_identity(file, ids, shape),
                     "state": {"model": net.state_dict()}, "l2": float(l2)}}
