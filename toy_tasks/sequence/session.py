"""A sequence task prepared for one training run.

The enumerable sequence task is a finite task over its enumerated responses
(:meth:`toy_tasks.sequence.task.SequenceTask.finite_task`), so the finite session of
:mod:`toy_tasks.finite.session` already knows its win weights, its exact optimum (the
same solver as every finite task) and how to measure a policy against it. This
module adds what differs for sequences:

- the policy is a sequence model (``model=transformer`` or ``model=bigram``)
  started from the reference's weights (``model.init=reference``) or at random;
  its sequence-level distribution over the enumerated responses is what
  ``policy``, ``optimum`` and ``tv_to_optimum`` in summary.json describe;
- ``exact`` mode keeps the finite session's weighted index pairs (every ordered
  pair of distinct responses, weight W > 0): each step the model scores all X K
  enumerated sequences in one forward pass and the pairs are gathered from it;
- ``sampled`` mode trains on token tensors of the sampled pairs, padded to one
  length, with the reference log-probabilities computed once by the reference
  model over the dataset and cached in the run folder
  (:mod:`polopt.models.reference_cache`); the optimum reported is the empirical one.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from polopt.losses.margin import MarginLoss
from polopt.models.logprobs import lengths, real_tokens
from polopt.models.reference_cache import FILE_NAME, reference_pair_logprobs
from polopt.models.transformer import build_model, copy_weights, default_context
from polopt.pairs import PairSet, score_pairs
from polopt.training.verdict import SEQUENCE_MODEL_TOLERANCE
from toy_tasks.finite.session import FiniteSession
from toy_tasks.finite.session import prepare as prepare_finite
from toy_tasks.sequence.methods import SequenceMethodView
from toy_tasks.sequence.policy import EnumeratedSequencePolicy
from toy_tasks.tables import policy_rows

INITS = ("reference", "random")
TABLE_ROWS = 8  # responses shown per prompt by ``table``


@dataclass
class SequenceSession:
    """The trainer's interface (pairs, build_policy, evaluate, summarise, table) for a sequence task."""

    task: object  # toy_tasks.sequence.task.SequenceTask (imports this module to prepare itself)
    finite: FiniteSession
    pairs: PairSet
    reference_cache: Path | None
    reference_cache_reused: bool = False
    threads: int = 1  # the run's torch threads unless train.threads says otherwise: the default width-32
    # model's matrices are too small to share, and on busy cores two threads ran ten times slower than one

    def build_policy(self, kind: str = "transformer", width: int = 32, layers: int = 2, heads: int = 2,
                     context: int | None = None, seed: int = 0, init: str = "reference",
                     path: str | None = None, adapter: str | None = None, lora: dict | None = None) -> torch.nn.Module:
        """A sequence model over the task's enumerated responses (see :func:`sequence_policy`);
        ``model=tabular|loglinear``: the finite session's policy (exact mode only)."""
        del lora  # its defaults come with model=local_lm; they are read only with an adapter
        if kind in ("tabular", "loglinear"):
            if self.finite.mode != "exact":
                raise ValueError(f"model={kind} scores enumerated responses, not tokens: on task=sequence it "
                                 "needs task.mode=exact; use model=transformer or model=bigram")
            return self.finite.build_policy(kind, width=width, seed=seed)
        self.finite.tolerance = SEQUENCE_MODEL_TOLERANCE  # a sequence model fits the enumerated distribution roughly
        return sequence_policy(self.task, kind, width=width, layers=layers, heads=heads, context=context, seed=seed,
                               init=init, path=path, adapter=adapter)

    def evaluate(self, policy) -> dict:
        with torch.no_grad():
            return self.finite.evaluate(policy)

    def for_method(self, name: str = "offline", **params):
        """This session as the ``method`` group's option ``name`` sees it (see :mod:`toy_tasks.sequence.methods`)."""
        return SequenceMethodView.build_for(self, name, **params)

    def summarise(self, policy, result) -> dict:
        with torch.no_grad():
            summary = self.finite.summarise(policy, result)
        summary.update({
            "task": "sequence",
            "n_symbols": self.task.vocab.n_symbols,
            "max_length": self.task.max_length,
            "n_responses": self.task.n_responses,
            "reference_cache": None if self.reference_cache is None else str(self.reference_cache),
            "reference_cache_reused": self.reference_cache_reused,
        })
        summary["notes"].append("policy, reference and optimum are sequence-level distributions over the "
                                "enumerated responses, one list per prompt, in the order of 'responses'")
        return summary

    def table(self, summary: dict) -> str:
        """The most likely responses under the optimum (or the reference) per prompt, then the figures."""
        lines = []
        labels = summary["responses"]
        width = max(len(s) for s in [*labels[:50], "response"])
        for x in range(self.task.n_prompts):
            ranking = np.asarray(summary["optimum"][x] if summary["optimum"] is not None else summary["reference"][x])
            lines.append(f"prompt {x}: top {TABLE_ROWS} of {len(labels)} responses")
            lines += policy_rows(summary, x, np.argsort(-ranking)[:TABLE_ROWS], labels, width)
        tv = summary["tv_to_optimum"]
        lines.append(f"loss {summary['loss']:.6g}  optimum {summary['optimum_value']:.6g}  "
                     f"gap {summary['loss_gap']:.3g}  tv_to_optimum {'-' if tv is None else f'{tv:.3g}'}  "
                     f"kl_to_reference {summary['kl_to_reference']:.4g}  ({summary['optimum_method']})")
        if summary.get("tv_to_population_optimum") is not None:
            lines.append(f"tv_to_population_optimum {summary['tv_to_population_optimum']:.3g} "
                         f"(n_pairs = {summary['n_pairs']})")
        lines.extend(f"note: {n}" for n in summary["notes"])
        return "\n".join(lines)


def sequence_policy(task, kind: str = "transformer", *, width: int = 32, layers: int = 2, heads: int = 2,
                    context: int | None = None, seed: int = 0, init: str = "reference", path: str | None = None,
                    adapter: str | None = None) -> torch.nn.Module:
    """A sequence model over ``task``'s vocabulary, wrapped to score its enumerated responses
    (``kind="local_lm"``: the causal LM saved in ``path``, at its own weights, fully fine-tuned).
    ``context`` None: what the task needs."""
    if kind == "local_lm":
        from polopt.models.local_lm import causal_lm_policy  # the optional extra: imported only when asked for

        if adapter is not None or context is not None:
            raise ValueError(f"model.adapter and model.context are read with task=pairs; task=sequence fine-tunes "
                             f"the whole local model on the task's own tokens: leave them null, got "
                             f"model.adapter={adapter}, model.context={context}")
        lm = causal_lm_policy(path, pad_id=task.vocab.pad_id, output_size=task.vocab.output_size,
                              vocab_needed=task.vocab.size, context_needed=task.context_needed)
        return EnumeratedSequencePolicy(lm.model, task)
    if init not in INITS:
        raise ValueError(f"model.init must be one of {', '.join(INITS)}, got {init!r}")
    need = task.context_needed
    context = default_context(need) if context is None else context
    if context < need:
        raise ValueError(f"model.context must be at least {need} for this task (prompt plus response "
                         f"tokens), got {context}")
    model = build_model(kind, vocab_size=task.vocab.size, output_size=task.vocab.output_size,
                        context=context, width=width, layers=layers, heads=heads, seed=seed)
    if init == "reference":
        copy_weights(model, task.reference_model)
    return EnumeratedSequencePolicy(model, task)


def token_pairs(task, index_pairs: PairSet, *, cache: Path | None) -> tuple[PairSet, bool]:
    """The sampled pairs as token tensors, with the reference's log-probabilities computed
    once over the dataset (winners and losers in one pass) and cached at ``cache``;
    and whether the cache file was reused."""
    prompt, winner = task.rows(index_pairs.prompt, index_pairs.winner)  # (N, T_p), (N, L)
    _, loser = task.rows(index_pairs.prompt, index_pairs.loser)  # (N, L)
    reused = []

    def reference_pass(prompts: torch.Tensor, winners: torch.Tensor, losers: torch.Tensor) -> torch.Tensor:
        both, was_reused = reference_pair_logprobs(task.reference_model, prompts, winners, losers,
                                                   pad_id=task.vocab.pad_id, path=cache)  # (2N,)
        reused.append(was_reused)
        return both

    ref_w, ref_l = score_pairs(reference_pass, prompt, winner, loser, shared=True)  # one pass over each prompt
    pad = task.vocab.pad_id
    tokens = real_tokens(prompt, winner, pad_id=pad) + real_tokens(prompt, loser, pad_id=pad)  # (N,)
    return PairSet(prompt, winner, loser, ref_w, ref_l, index_pairs.weight, tokens=tokens,
                   len_winner=lengths(winner, pad_id=pad), len_loser=lengths(loser, pad_id=pad)), reused[0]


def prepare(task, loss: MarginLoss, *, beta: float, smoothing: float = 0.0, mode: str = "exact",
            n_pairs: int = 2000, seed: int = 0, run_dir: str | Path | None = None) -> SequenceSession:
    """Pairs and the exact optimum of the sequence task for ``loss`` at ``beta``."""
    finite = prepare_finite(task.finite_task(), loss, beta=beta, smoothing=smoothing, mode=mode, n_pairs=n_pairs,
                            seed=seed)
    cache = Path(run_dir) / FILE_NAME if run_dir is not None and task.cache_reference else None
    if mode == "exact":
        return SequenceSession(task, finite, finite.pairs, None)
    pairs, reused = token_pairs(task, finite.pairs, cache=cache)
    return SequenceSession(task, finite, pairs, cache, reused)
