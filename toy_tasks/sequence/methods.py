"""The enumerable sequence task seen by the methods beyond the offline losses, and realignment on it.

:meth:`toy_tasks.sequence.session.SequenceSession.for_method` builds a
:class:`SequenceMethodView`. Because every response of the sequence task can be
listed, the task is a finite task over its enumerated responses, and its
sequence model's ``log_distribution()`` is the sequence-level policy over them;
so the finite view of :mod:`toy_tasks.methods.view` already gives every method its
environment and its exact target (rl: pi_ref e^{r / beta}; selfplay: the Nash
equilibrium at tau = beta / 2; best_of_n: the exact best-of-n distribution),
and the methods train the tiny transformer through the same calls.

What this module adds is realignment on an autoregressive model. For each
lambda of ``method.realign`` it reports, against the optimum re-solved at
beta / lambda (:func:`toy_tasks.exact.margin.solve`, the task's own solver):

- the sequence-level geometric mixture pi_ref^{1 - lambda} pi^lambda / Z, exact
  on the enumerated space (the finite view's ``policy`` / ``tv_to_optimum``):
  its error is the trained policy's error, scaled by lambda;
- the per-token mixture (:func:`polopt.methods.realign.realigned_sequence_logprobs`:
  both models' next-token logits mixed, each token renormalised), what a decoder
  can do with a real model (``per_token_*``);
- the per-token mixture of the exact optimum at beta, through its exact
  next-token conditionals (:func:`tree_conditionals`): the error of per-token
  mixing itself, with no training error (``per_token_exact_*``).
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np
import scipy.special
import torch

from polopt.methods.realign import realign, realigned_sequence_logprobs
from toy_tasks.measures import total_variation
from toy_tasks.methods.view import MethodView
from toy_tasks.tables import method_footer, policy_rows

TABLE_ROWS = 8  # responses shown per prompt by ``table``


def tree_conditionals(log_distribution: np.ndarray, responses: list[tuple[int, ...]], n_outputs: int
                      ) -> tuple[np.ndarray, dict[tuple[int, ...], int]]:
    """The next-token conditionals of a sequence-level distribution over a complete prefix tree.

    ``log pi(v | p) = log pi(tree under p + v) - log pi(tree under p)``, where the
    mass under a prefix is the total of the responses that start with it (the
    chain rule read backwards: any distribution over the enumerated responses is
    the product of these conditionals).

    Args:
        log_distribution: (X, K) log pi over the enumerated responses.
        responses: the K responses as token tuples (the task's enumeration).
        n_outputs: V, the tokens a response can contain.

    Returns:
        (P, X, V) log conditionals at each of the P inner prefixes (-inf for a
        continuation that no response takes, or nan under a prefix of no mass),
        and the index of each prefix.
    """
    x = log_distribution.shape[0]
    mass: dict[tuple[int, ...], np.ndarray] = {}
    for k, response in enumerate(responses):
        for t in range(len(response) + 1):
            prefix = response[:t]
            mass[prefix] = np.logaddexp(mass.get(prefix, np.full(x, -np.inf)), log_distribution[:, k])
    inner = sorted({r[:t] for r in responses for t in range(len(r))}, key=lambda p: (len(p), p))
    index = {p: i for i, p in enumerate(inner)}
    out = np.full((len(inner), x, n_outputs), -np.inf)
    with np.errstate(invalid="ignore"):  # -inf - (-inf) only where a whole subtree has no mass
        for p, i in index.items():
            for v in range(n_outputs):
                child = mass.get((*p, v))
                if child is not None:
                    out[i, :, v] = child - mass[p]
    return out, index


def per_token_mixture(reference: np.ndarray, policy: np.ndarray, responses: list[tuple[int, ...]],
                      n_outputs: int, lam: float) -> np.ndarray:
    """log pi_lambda (X, K) of per-token mixing, from two sequence-level distributions (X, K).

    Each distribution is factorised into its exact next-token conditionals
    (:func:`tree_conditionals`), the conditionals are mixed by
    :func:`polopt.methods.realign.realign` and the chain rule gives the sequences back.
    For autoregressive models this equals mixing their logits.
    """
    ref_cond, index = tree_conditionals(reference, responses, n_outputs)  # (P, X, V)
    pol_cond, _ = tree_conditionals(policy, responses, n_outputs)  # (P, X, V)
    if not (np.isfinite(ref_cond).all() and np.isfinite(pol_cond).all()):
        raise ValueError("per-token mixing needs a complete prefix tree with positive mass on every "
                         "continuation (every response of the enumeration, probability > 0)")
    mixed = realign(torch.as_tensor(ref_cond), torch.as_tensor(pol_cond), lam).numpy()  # (P, X, V)
    out = np.zeros((reference.shape[0], len(responses)))
    for k, response in enumerate(responses):
        for t, token in enumerate(response):
            out[:, k] += mixed[index[response[:t]], :, token]
    return out


@dataclass
class SequenceMethodView(MethodView):
    """One sequence session as one method sees it. Build with :meth:`build_for`."""

    sequence: object = None  # the toy_tasks.sequence.task.SequenceTask

    @classmethod
    def build_for(cls, session, name: str = "offline", **params) -> SequenceMethodView:
        """From a :class:`toy_tasks.sequence.session.SequenceSession`: the finite view of its
        enumerated task, plus the sequence task itself."""
        base = MethodView.build(session.finite, name, **params)
        return cls(**{f.name: getattr(base, f.name) for f in fields(MethodView)}, sequence=session.task)

    # ------------------------------------------------------------ realignment

    def realignment(self, policy, lambdas) -> list[dict]:
        """The finite view's geometric mixture per lambda, plus per-token mixing of the two models
        and of the exact optimum (see the module docstring)."""
        out = super().realignment(policy, lambdas)
        task, seq = self.task, self.sequence
        reference = np.log(task.reference)  # (X, K)
        with torch.no_grad():
            trained = policy.log_distribution().double().numpy()
        opt = self.session.optimum
        exact = np.log(task.policy_from_logratios(opt.aligned_to(trained - reference))) if opt.finite else None
        has_model = hasattr(policy, "model") and hasattr(policy, "all_prompts")
        for entry in out:
            lam = entry["lambda"]
            target = None if entry["optimum"] is None else np.asarray(entry["optimum"])
            if has_model:
                with torch.no_grad():
                    logp = realigned_sequence_logprobs(seq.reference_model, policy.model, policy.all_prompts,
                                                       policy.all_responses, lam, pad_id=seq.vocab.pad_id)
                pi = logp.double().reshape(task.n_prompts, task.n_responses).exp().numpy()
                entry.update({
                    "per_token_policy": [[float(v) for v in row] for row in pi],
                    "per_token_mass": [float(m) for m in pi.sum(1)],
                    "per_token_tv_to_optimum": None if target is None else total_variation(
                        pi, target, task.prompt_weights),
                    "per_token_tv_to_geometric": total_variation(pi, np.asarray(entry["policy"]),
                                                                 task.prompt_weights),
                    "per_token_kl_to_reference": float(task.prompt_weights @ scipy.special.rel_entr(
                        pi, task.reference).sum(1))})
            if exact is not None and target is not None:
                pi_exact = np.exp(per_token_mixture(reference, exact, seq.responses, seq.vocab.output_size, lam))
                entry["per_token_exact_tv_to_optimum"] = total_variation(pi_exact, target, task.prompt_weights)
        return out

    # ------------------------------------------------------------ summary and table

    def summarise(self, policy, result) -> dict:
        summary = super().summarise(policy, result)
        summary.update({"task": "sequence", "n_symbols": self.sequence.vocab.n_symbols,
                        "max_length": self.sequence.max_length, "n_responses": self.sequence.n_responses})
        summary["notes"].append("policy, reference and optimum are sequence-level distributions over the "
                                "enumerated responses, one list per prompt, in the order of 'responses'")
        return summary

    def _format(self, p: np.ndarray) -> str:
        """Notes name a distribution over hundreds of responses by its most likely ones."""
        labels = self.task.responses
        return "; ".join(", ".join(f"{labels[i]}: {row[i]:.4f}" for i in np.argsort(-row)[:3]) + ", ..."
                         for row in p) + " (all of it in summary.json's 'equilibrium')"

    def table(self, summary: dict) -> str:
        """The most likely responses under the method's target (or the reference), then the figures."""
        labels = summary["responses"]
        width = max(len(s) for s in [*labels[:50], "response"])
        lines = []
        for x in range(self.task.n_prompts):
            rank = np.asarray(summary["optimum"][x] if summary["optimum"] is not None else summary["reference"][x])
            lines.append(f"prompt {x}: top {TABLE_ROWS} of {len(labels)} responses")
            lines += policy_rows(summary, x, np.argsort(-rank)[:TABLE_ROWS], labels, width, target="target")
        return "\n".join(lines + method_footer(summary))
