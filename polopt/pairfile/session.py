"""One run's view of a preference-pair file (``task=pairs``): encoded pairs, the reference, measurements.

:class:`PairSession` is what :meth:`polopt.pairfile.task.PairTask.prepare` returns (in memory) and what
:mod:`polopt.pairfile.streamed` builds on (pairs on disk); see :mod:`polopt.pairfile.task` for the whole path.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, field
from pathlib import Path

import torch

from polopt.data import PairData
from polopt.data.encoding import SequenceIds, encode_prompts, encode_responses
from polopt.losses.margin import MarginLoss
from polopt.losses.reduce import margins, pair_scores, per_pair_losses, weighted_mean
from polopt.models.logprobs import SequencePolicy, batched_logprobs, batched_pair_logprobs, lengths, real_tokens
from polopt.models.reference_cache import reference_pair_logprobs
from polopt.models.transformer import TinyTransformer, default_context
from polopt.pairs import PairSet, score_pairs
from polopt.training.contracts import TrainResult
from polopt.training.step import batch_statistics

Tensor = torch.Tensor
INITS = ("reference", "random")
REJECTS_FILE = "rejects.jsonl"


def nothing_accepted(path, data: PairData, rejects) -> ValueError:
    """The one line for a file of which no row was accepted, with the reasons counted (``rejects``: the rejects
    file written, or None)."""
    what = "pair" if data.kind == "pairs" else "row"
    reasons = ", ".join(f"{k} {n}" for k, n in data.accounting["rejected_by_reason"].items())
    return ValueError(f"task.path {str(path)!r}: no {what} was accepted ({data.accounting['rows_rejected']} rejected; "
                      f"see {rejects or 'polopt data FILE'})" + (f": {reasons}" if reasons else ""))


@dataclass
class PairSession:
    """One run's view of a pair file; see the module docstring."""

    trains_on_gpu = True  # train.device=cuda: token pairs through a sequence model (polopt.parallel.devices)

    data: PairData
    tokenizer: object
    file_tokenizer: str
    ids: SequenceIds
    loss: MarginLoss
    beta: float
    smoothing: float
    n_pairs: int | None
    reference_path: str | None
    reference_model: torch.nn.Module | None
    reference_meta: dict | None
    cache: Path | None
    rejects_path: Path | None
    pairs: PairSet | None = None
    reference_cache_reused: bool = False
    notes: list[str] = field(default_factory=list)
    threads = None  # torch's default thread count: the transformer's matrices are big enough to share

    # ------------------------------------------------------------ data

    def encode(self) -> None:
        n = len(self.data) if self.n_pairs is None else min(self.n_pairs, len(self.data))
        d = self.data
        self.prompt = encode_prompts(self.tokenizer, d.prompt[:n], self.ids)  # (N, T_p)
        # winners and losers share one width: the trainer puts them through the policy in one batch
        both = encode_responses(self.tokenizer, d.winner[:n] + d.loser[:n], self.ids)  # (2N, T_r)
        self.winner, self.loser = both[:n], both[n:]  # (N, T_r) each
        self.weight = torch.tensor(d.weight[:n], dtype=torch.float32) if d.accounting["weighted"] else None
        pad = self.ids.pad
        self.tokens = real_tokens(self.prompt, self.winner, pad_id=pad) + real_tokens(self.prompt, self.loser,
                                                                                      pad_id=pad)  # (N,)
        longest = torch.maximum(real_tokens(self.prompt, self.winner, pad_id=pad),
                                real_tokens(self.prompt, self.loser, pad_id=pad))
        self.context_needed = int(longest.max()) - 1  # the last token is only scored, never read

    def check_reference(self) -> None:
        meta = self.reference_meta
        ids, arch = meta["ids"], meta["architecture"]
        mine = {"pad": self.ids.pad, "bos": self.ids.bos, "eos": self.ids.eos}
        if ids != mine or arch["vocab_size"] != self.ids.vocab_size:
            raise ValueError(f"task.reference_checkpoint was trained with tokenizer {meta['tokenizer']!r} "
                             f"(special ids {ids}, "
                             f"vocabulary {arch['vocab_size']}) but task.tokenizer={self.file_tokenizer!r} gives "
                             f"{mine}, vocabulary {self.ids.vocab_size}; give task.tokenizer={meta['tokenizer']}")
        context = meta["architecture"]["context"]
        if context < self.context_needed:
            raise ValueError(f"task.reference_checkpoint has context {context} but the longest pair needs "
                             f"{self.context_needed} input tokens; set task.max_length={context + 1} "
                             f"(with task.truncation=truncate_response) or train the reference with room for "
                             f"them: polopt sft FILE --out REF model.context={self.context_needed}")

    def attach_reference(self, model: torch.nn.Module) -> None:
        """The reference's log-probs of every winner and loser, computed once (one pass) and cached."""
        self.reference_model = model

        def reference_pass(prompt: Tensor, winner: Tensor, loser: Tensor) -> Tensor:
            both, self.reference_cache_reused = reference_pair_logprobs(model, prompt, winner, loser,
                                                                        pad_id=self.ids.pad, path=self.cache,
                                                                        batch_size=256)
            return both  # (2N,): each pair in one pass over its prompt where the model allows it

        ref_w, ref_l = score_pairs(reference_pass, self.prompt, self.winner, self.loser, shared=True)
        self.pairs = PairSet(self.prompt, self.winner, self.loser, ref_w, ref_l, self.weight, tokens=self.tokens,
                             len_winner=lengths(self.winner, pad_id=self.ids.pad),
                             len_loser=lengths(self.loser, pad_id=self.ids.pad))  # (N,) response tokens

    # ------------------------------------------------------------ model

    def build_policy(self, kind: str = "transformer", width: int = 32, layers: int = 2, heads: int = 2,
                     context: int | None = None, seed: int = 0, init: str = "reference") -> SequencePolicy:
        """The tiny transformer as a policy, started at the reference (``model.init=reference``);
        ``context`` None: the file's longest prompt + response (:func:`polopt.models.transformer.default_context`).

        With ``task.reference_checkpoint`` its architecture is the reference's (model.width, layers, heads and
        context are then read from the checkpoint); without one the reference is a frozen copy of
        this policy's seeded initialisation.
        """
        if kind != "transformer":
            raise ValueError(f"task=pairs trains model=transformer, got model.kind={kind!r}")
        if init not in INITS:
            raise ValueError(f"model.init must be one of {', '.join(INITS)}, got {init!r}")
        if self.reference_model is not None:
            arch = self.reference_meta["architecture"]
            given = {"width": width, "layers": layers, "heads": heads}
            differ = {k: v for k, v in given.items() if arch[k] != v}
            if differ and init == "reference":
                self.notes.append(f"the policy takes the reference's architecture (width {arch['width']}, layers "
                                  f"{arch['layers']}, heads {arch['heads']}, context {arch['context']}); "
                                  f"model.{'/'.join(differ)} were not used")
                width, layers, heads = arch["width"], arch["layers"], arch["heads"]
            if init == "reference":
                context = arch["context"] if context is None else max(context, arch["context"])
        context = default_context(self.context_needed) if context is None else context
        if context < self.context_needed:
            raise ValueError(f"model.context must be at least {self.context_needed} for this file (its longest "
                             f"prompt + response in tokens, with bos and eos), got {context}; or set "
                             "task.max_length")
        model = TinyTransformer(self.ids.vocab_size, context=context, width=width, layers=layers, heads=heads,
                                seed=seed)
        if self.reference_model is None:
            reference = copy.deepcopy(model).requires_grad_(False).eval()
            self.notes.append("no task.reference_checkpoint: the reference is the policy's own seeded random "
                              "initialisation (train one with polopt sft and give task.reference_checkpoint=PATH)")
            self.attach_reference(reference)
        elif init == "reference":
            from polopt.models.transformer import copy_weights

            copy_weights(model, self.reference_model)
        return SequencePolicy(model, pad_id=self.ids.pad)

    # ------------------------------------------------------------ measuring

    def evaluate(self, policy) -> dict:
        return {}  # the trainer's batch metrics say what there is to say while training

    @torch.no_grad()
    def full_statistics(self, policy) -> dict:
        """Loss, margin, pair accuracy and log-ratios over every accepted pair, eval mode."""
        training = policy.training
        policy.eval()
        p = self.pairs
        if policy.shares_prompt:  # each pair in one pass over its prompt
            logp_w, logp_l = score_pairs(lambda prompt, winner, loser: batched_pair_logprobs(
                policy.model, prompt, winner, loser, pad_id=self.ids.pad, batch_size=256), p.prompt, p.winner,
                p.loser, shared=True)
        else:
            logp_w, logp_l = score_pairs(lambda prompt, response: batched_logprobs(
                policy.model, prompt, response, pad_id=self.ids.pad, batch_size=256), p.prompt, p.winner, p.loser)
        policy.train(training)
        rho = margins(logp_w, logp_l, p.reference_winner, p.reference_loser)  # (N,)
        per_pair = per_pair_losses(self.loss, pair_scores(p, logp_w, logp_l), beta=self.beta,
                                   smoothing=self.smoothing)  # (N,)
        value = weighted_mean(per_pair, p.weight)
        return {"loss": float(value), **batch_statistics(rho, logp_w - p.reference_winner,
                                                         logp_l - p.reference_loser, p.weight)}

    def summarise(self, policy, result: TrainResult) -> dict:
        a = self.data.accounting
        stats = self.full_statistics(policy)
        notes = list(self.notes)
        if stats["logratio_winner"] < 0 and stats["logratio_loser"] < 0:
            notes.append("both mean log-ratios fell (winner and loser less likely than under the reference): "
                         "the likelihood-displacement pattern")
        return {
            "task": "pairs",
            "loss_name": self.loss.name,
            "beta": self.beta,
            "smoothing": self.smoothing,
            "n_pairs": len(self.pairs),
            **stats,
            "steps": result.steps,
            "seconds": result.seconds,
            "path": a["source"],
            "rows_in": a["rows_in"],
            "rows_accepted": a["rows_accepted"],
            "rows_rejected": a["rows_rejected"],
            "data": a,
            "rejects_file": None if self.rejects_path is None else str(self.rejects_path),
            "tokenizer": a["tokenizer"],
            "reference_checkpoint": self.reference_path,
            "reference_cache": None if self.cache is None else str(self.cache),
            "reference_cache_reused": self.reference_cache_reused,
            "notes": notes,
        }

    def table(self, summary: dict) -> str:
        lines = [f"pairs: {summary['path']}",
                 f"  {summary['data']['balance']}"
                 + (f"  (rejects: {summary['rejects_file']})" if summary["rows_rejected"] else ""),
                 f"  trained on {summary['n_pairs']} pairs, {summary['loss_name']} beta {summary['beta']}, "
                 f"{summary['steps']} steps in {summary['seconds']:.1f} s",
                 f"  over all pairs: loss {summary['loss']:.4g}  margin_mean {summary['margin_mean']:.4g}  "
                 f"pair_accuracy {summary['pair_accuracy']:.3f}  logratio_winner {summary['logratio_winner']:.4g}  "
                 f"logratio_loser {summary['logratio_loser']:.4g}"]
        lines.extend(f"note: {n}" for n in summary["notes"])
        return "\n".join(lines)
