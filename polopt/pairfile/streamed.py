"""``task=pairs task.stream=true``: a pair file streamed once into a memory-mapped Arrow file.

The in-memory path (:mod:`polopt.pairfile.task`) holds every accepted row as text and as
padded tensors, and computes the reference log-probabilities of every pair before the
first step. Here instead:

1. one pass (:class:`polopt.data.stream_pass.StreamPass`) reads, checks, counts and
   deduplicates the file chunk by chunk, writes the rejects to ``rejects.jsonl`` and
   the accepted pairs as token lists to ``pairs.arrow`` in the run folder
   (:func:`polopt.pairfile.mapped.write_arrow`; written under a temporary name, then renamed);
2. the trainer reads that file through :class:`polopt.pairfile.mapped.StreamedPairs`, memory-mapped,
   one batch at a time; each batch's reference log-probabilities are computed as it is
   read (no gradients), never for the whole file;
3. the final statistics over every pair (:func:`streamed_statistics`) run chunk by chunk.

Resident memory then stays near the model, one chunk and one batch (bench/stream_train.py
measures it on 100,000 and 1,000,000 pairs). Under torchrun every rank runs the pass
(rank 0 first); each writes its own temporary files and renames them over the same
names, so the content is the same whichever rename comes last.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import torch

from polopt.data.encoding import SequenceIds
from polopt.data.stream_pass import StreamPass
from polopt.data.tokenizer import load_tokenizer
from polopt.losses.margin import MarginLoss
from polopt.losses.reduce import margins, pair_scores, per_pair_losses
from polopt.models.logprobs import batched_logprobs
from polopt.pairfile.mapped import StreamedPairs, write_arrow
from polopt.pairfile.session import REJECTS_FILE, PairSession

Tensor = torch.Tensor
ARROW_FILE = "pairs.arrow"
STATISTICS_CHUNK = 64  # pairs a forward pass: a training batch's order of memory


@dataclass
class StreamedData:
    """What the session reads of a pass: the accounting, and the number of pairs written."""

    accounting: dict

    def __len__(self) -> int:
        return self.accounting["rows_written"]


def prepare_streamed(task, loss: MarginLoss, *, beta: float, smoothing: float, n_pairs: int | None,
                     run_dir: str | Path | None) -> StreamSession:
    """The session of ``task`` (a :class:`polopt.pairfile.task.PairTask` with ``stream``) after the pass."""
    from polopt.training.sft import load_reference

    if run_dir is None:
        raise ValueError("task.stream=true writes the accepted pairs to the run folder; give a run folder")
    if n_pairs is not None and (not isinstance(n_pairs, int) or isinstance(n_pairs, bool) or n_pairs < 1):
        raise ValueError(f"task.n_pairs must be a positive integer or null (every accepted pair), got {n_pairs!r}")
    run_dir = Path(run_dir)
    run_dir.mkdir(parents=True, exist_ok=True)
    file = task.file.as_dict() if hasattr(task.file, "as_dict") else dict(task.file)  # a PairFileSpec
    tokenizer = load_tokenizer(file.get("tokenizer") or "byte")
    ids = SequenceIds.for_tokenizer(tokenizer)
    rejects, arrow = run_dir / REJECTS_FILE, run_dir / ARROW_FILE
    tmp = f".{os.getpid()}.tmp"
    rejects_tmp, arrow_tmp = rejects.with_name(rejects.name + tmp), arrow.with_name(arrow.name + tmp)
    stream = StreamPass(file, tokenizer, ids, rejects_path=rejects_tmp, work_dir=run_dir, limit=n_pairs)
    try:
        write_arrow(arrow_tmp, stream.chunks())
    except ValueError as err:
        if "no rows to write" not in str(err):
            raise
    os.replace(rejects_tmp, rejects)
    data = StreamedData(stream.accounting())
    if len(data) == 0:
        arrow_tmp.unlink(missing_ok=True)
        raise ValueError(f"task.path {file['path']!r}: no pair was accepted "
                         f"({data.accounting['rows_rejected']} rejected; see {rejects})")
    os.replace(arrow_tmp, arrow)
    model, meta = (None, None) if task.reference is None else load_reference(task.reference)
    session = StreamSession(data=data, tokenizer=tokenizer, file_tokenizer=str(file.get("tokenizer")), ids=ids,
                            loss=loss, beta=beta, smoothing=smoothing, n_pairs=n_pairs,
                            reference_path=task.reference, reference_model=model, reference_meta=meta, cache=None,
                            rejects_path=rejects)
    session.context_needed = stream.longest - 1  # the last token is only scored, never read
    session.pairs = StreamedPairs(arrow, pad_id=ids.pad, digest=stream.digest)
    session.summary_pairs = task.summary_pairs
    if model is not None:
        session.check_reference()
        session.attach_reference(model)
    return session


class StreamSession(PairSession):
    """:class:`polopt.pairfile.session.PairSession` over pairs that stay on disk (see the module docstring)."""

    def encode(self) -> None:  # the pass has encoded the pairs into the Arrow file
        pass

    def attach_reference(self, model: torch.nn.Module) -> None:
        self.reference_model = model
        self.pairs.attach_reference(model)

    summary_pairs = None  # task.summary_pairs: the final statistics over the first N pairs only (None: all)

    def full_statistics(self, policy) -> dict:
        stats = streamed_statistics(policy, self.pairs, self.loss, beta=self.beta, smoothing=self.smoothing,
                                    limit=self.summary_pairs)
        if self.summary_pairs is not None and self.summary_pairs < len(self.pairs):
            self.notes.append(f"task.summary_pairs={self.summary_pairs}: the statistics 'over all pairs' are over the "
                              f"first {self.summary_pairs} of {len(self.pairs)} pairs")
        return stats


@torch.no_grad()
def streamed_statistics(policy, pairs: StreamedPairs, loss: MarginLoss, *, beta: float, smoothing: float,
                        chunk: int | None = None, limit: int | None = None) -> dict:
    """Loss, margin, pair accuracy and log-ratios over every pair, ``chunk`` pairs at a time, eval mode:
    the weighted sums of each chunk added up, then divided by the total weight (the same weighted means
    as :func:`polopt.losses.reduce.weighted_mean` of :func:`polopt.losses.reduce.per_pair_losses` and
    :func:`polopt.training.step.batch_statistics` over all pairs)."""
    chunk = chunk or STATISTICS_CHUNK
    training = policy.training
    policy.eval()
    sums = torch.zeros(6, dtype=torch.float64)  # w l, w rho, w [rho > 0], w lr_w, w lr_l, w
    seen = 0
    for b in pairs.in_order(chunk):
        if limit is not None and seen >= limit:
            break
        if limit is not None and seen + len(b) > limit:
            b = b.select(torch.arange(limit - seen))
        seen += len(b)
        logp = batched_logprobs(policy.model, torch.cat([b.prompt, b.prompt]), torch.cat([b.winner, b.loser]),
                                pad_id=pairs.pad_id, batch_size=2 * len(b))  # (2B,)
        logp_w, logp_l = logp.chunk(2)
        rho = margins(logp_w, logp_l, b.reference_winner, b.reference_loser)  # (B,)
        w = torch.ones_like(rho) if b.weight is None else b.weight.to(rho.dtype)  # (B,)
        values = per_pair_losses(loss, pair_scores(b, logp_w, logp_l), beta=beta, smoothing=smoothing)  # (B,)
        sums += torch.stack([(w * values).sum(), (w * rho).sum(), (w * (rho > 0).to(rho.dtype)).sum(),
                             (w * (logp_w - b.reference_winner)).sum(), (w * (logp_l - b.reference_loser)).sum(),
                             w.sum()]).double()
    policy.train(training)
    names = ("loss", "margin_mean", "pair_accuracy", "logratio_winner", "logratio_loser")
    return {name: float(sums[k] / sums[5]) for k, name in enumerate(names)}
