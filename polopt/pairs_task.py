"""``task=pairs``: a preference-pair file trained through the same trainer and run folder.

Owns the task builder :func:`pair_task` (named by ``_target_`` in
conf/task/pairs.yaml) and :class:`PairSession`, the trainer's interface
(``pairs``, ``build_policy``, ``evaluate``, ``summarise``, ``table``) for real
data:

1. the file is read and checked by :mod:`polopt.data` (every row accepted or
   rejected; the rejects go to ``rejects.jsonl`` in the run folder and the
   accounting, ``rows_in = rows_accepted + rows_rejected``, into summary.json);
2. prompts become ``bos + tokens`` and responses ``tokens + eos``
   (:mod:`polopt.encoding`) with the byte tokenizer or a local one
   (``task.tokenizer``);
3. the reference is the model of ``task.reference`` (a checkpoint written by
   ``polopt sft``), or, without one, a copy of the policy's own seeded
   initialisation; its log-probabilities of every winner and loser are computed
   once and cached in the run folder (:mod:`polopt.reference_cache`);
4. the policy is a :class:`polopt.logprobs.SequencePolicy` over a tiny
   transformer started at the reference's weights (``model.init=reference``).

Without a reference checkpoint the reference log-probabilities depend on the
policy's architecture, so they are computed in :meth:`PairSession.build_policy`
(which ``polopt train`` calls before it reads ``pairs``).
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, field
from pathlib import Path

import torch

from polopt.contracts import TrainResult
from polopt.data import PairData, PairFileSpec, read_pair_file, write_rejects
from polopt.encoding import SequenceIds, encode_prompts, encode_responses
from polopt.logprobs import SequencePolicy, batched_logprobs, real_tokens
from polopt.losses import Loss
from polopt.models import TinyTransformer
from polopt.objective import batch_statistics, margins, preference_loss
from polopt.pair_set import PairSet, score_pairs
from polopt.reference_cache import FILE_NAME, reference_logprobs
from polopt.sft import load_reference
from polopt.tokenizer import load_tokenizer

Tensor = torch.Tensor
INITS = ("reference", "random")
REJECTS_FILE = "rejects.jsonl"


@dataclass
class PairTask:
    """The ``task=pairs`` config, checked; :meth:`prepare` reads the file."""

    file: PairFileSpec
    reference: str | None = None
    cache_reference: bool = True

    def prepare(self, loss: Loss, *, beta: float, smoothing: float = 0.0, mode: str = "sampled",
                n_pairs: int | None = None, seed: int = 0, run_dir: str | Path | None = None) -> PairSession:
        del seed  # the pairs are the file's; the trainer's seed orders the batches
        if mode != "sampled":
            raise ValueError(f"task.mode must be sampled for task=pairs (a file holds sampled pairs, there is no "
                             f"population to weigh exactly), got {mode!r}")
        tokenizer = load_tokenizer(self.file.tokenizer or "byte")
        data = read_pair_file(self.file, tokenizer=tokenizer)
        rejects = None
        if run_dir is not None:
            rejects = write_rejects(data.rejects, Path(run_dir) / REJECTS_FILE)
        if n_pairs is not None:
            if not isinstance(n_pairs, int) or isinstance(n_pairs, bool) or n_pairs < 1:
                raise ValueError(f"task.n_pairs must be a positive integer or null (every accepted pair), "
                                 f"got {n_pairs!r}")
        if len(data) == 0:
            raise ValueError(f"task.path {self.file.path!r}: no pair was accepted "
                             f"({data.accounting['rows_rejected']} rejected; see {rejects or 'polopt data FILE'})")
        model, meta = (None, None) if self.reference is None else load_reference(self.reference)
        cache = Path(run_dir) / FILE_NAME if run_dir is not None and self.cache_reference else None
        session = PairSession(data=data, tokenizer=tokenizer, file_tokenizer=str(self.file.tokenizer),
                              ids=SequenceIds.for_tokenizer(tokenizer), loss=loss,
                              beta=beta, smoothing=smoothing, n_pairs=n_pairs, reference_path=self.reference,
                              reference_model=model, reference_meta=meta, cache=cache, rejects_path=rejects)
        session.encode()
        if model is not None:
            session.check_reference()
            session.attach_reference(model)
        return session


def pair_task(path: str | None = None, format: str = "auto", columns: dict | str | None = None,
              max_length: int | None = None, truncation: str = "reject", duplicates: str = "reject",
              tokenizer: str = "byte", hub: bool = False, split: str = "train", reference: str | None = None,
              cache_reference: bool = True) -> PairTask:
    """Build ``task=pairs`` (every key of conf/task/pairs.yaml but mode and n_pairs)."""
    if path is None:
        raise ValueError("task=pairs needs task.path=FILE (JSONL, CSV, Parquet or a saved dataset folder)")
    file = PairFileSpec(path, format=format, columns=columns, max_length=max_length, truncation=truncation,
                        duplicates=duplicates, tokenizer=tokenizer, hub=hub, split=split)
    return PairTask(file, reference=None if reference in (None, "") else str(reference),
                    cache_reference=bool(cache_reference))


@dataclass
class PairSession:
    """One run's view of a pair file; see the module docstring."""

    trains_on_gpu = True  # train.device=cuda: token pairs through a sequence model (polopt.devices)

    data: PairData
    tokenizer: object
    file_tokenizer: str
    ids: SequenceIds
    loss: Loss
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
            raise ValueError(f"task.reference was trained with tokenizer {meta['tokenizer']!r} (special ids {ids}, "
                             f"vocabulary {arch['vocab_size']}) but task.tokenizer={self.file_tokenizer!r} gives "
                             f"{mine}, vocabulary {self.ids.vocab_size}; give task.tokenizer={meta['tokenizer']}")
        context = meta["architecture"]["context"]
        if context < self.context_needed:
            raise ValueError(f"task.reference has context {context} but the longest pair needs "
                             f"{self.context_needed} input tokens; set task.max_length={context + 1} "
                             f"(with task.truncation=truncate_response) or train the reference with a longer "
                             "--context")

    def attach_reference(self, model: torch.nn.Module) -> None:
        """The reference's log-probs of every winner and loser, computed once (one pass) and cached."""
        self.reference_model = model

        def reference_pass(prompt: Tensor, response: Tensor) -> Tensor:
            both, self.reference_cache_reused = reference_logprobs(model, prompt, response, pad_id=self.ids.pad,
                                                                   path=self.cache, batch_size=256)
            return both  # (2N,)

        ref_w, ref_l = score_pairs(reference_pass, self.prompt, self.winner, self.loser)
        self.pairs = PairSet(self.prompt, self.winner, self.loser, ref_w, ref_l, self.weight, tokens=self.tokens)

    # ------------------------------------------------------------ model

    def build_policy(self, kind: str = "transformer", width: int = 32, layers: int = 2, heads: int = 2,
                     context: int = 16, seed: int = 0, init: str = "reference") -> SequencePolicy:
        """The tiny transformer as a policy, started at the reference (``model.init=reference``).

        With ``task.reference`` its architecture is the reference's (model.width, layers, heads and
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
            context = max(context, arch["context"]) if init == "reference" else context
        if context < self.context_needed:
            raise ValueError(f"model.context must be at least {self.context_needed} for this file (its longest "
                             f"prompt + response in tokens, with bos and eos), got {context}; or set "
                             "task.max_length")
        model = TinyTransformer(self.ids.vocab_size, context=context, width=width, layers=layers, heads=heads,
                                seed=seed)
        if self.reference_model is None:
            reference = copy.deepcopy(model).requires_grad_(False).eval()
            self.notes.append("no task.reference: the reference is the policy's own seeded random initialisation "
                              "(train one with polopt sft and give task.reference=PATH)")
            self.attach_reference(reference)
        elif init == "reference":
            from polopt.models import copy_weights

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
        logp_w, logp_l = score_pairs(lambda prompt, response: batched_logprobs(
            policy.model, prompt, response, pad_id=self.ids.pad, batch_size=256), p.prompt, p.winner, p.loser)
        policy.train(training)
        rho = margins(logp_w, logp_l, p.reference_winner, p.reference_loser)  # (N,)
        value = preference_loss(self.loss, rho, beta=self.beta, smoothing=self.smoothing, weights=p.weight)
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
            "reference": self.reference_path,
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
