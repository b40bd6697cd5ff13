"""``task=pairs``: a preference-pair file trained through the same trainer and run folder.

Owns the task builder :func:`pair_task` (named by ``_target_`` in
conf/task/pairs.yaml) and :class:`PairSession`, the trainer's interface
(``pairs``, ``build_policy``, ``evaluate``, ``summarise``, ``table``) for real
data:

1. the file is read and checked by :mod:`polopt.data` (every row accepted or
   rejected; the rejects go to ``rejects.jsonl`` in the run folder and the
   accounting, ``rows_in = rows_accepted + rows_rejected``, into summary.json);
2. prompts become ``bos + tokens`` and responses ``tokens + eos``
   (:mod:`polopt.data.encoding`) with the byte tokenizer or a local one
   (``task.tokenizer``);
3. the reference is the model of ``task.reference_checkpoint`` (a checkpoint written by
   ``polopt sft``), or, without one, a copy of the policy's own seeded
   initialisation; its log-probabilities of every winner and loser are computed
   once and cached in the run folder (:mod:`polopt.models.reference_cache`);
4. the policy is a :class:`polopt.models.logprobs.SequencePolicy` over a tiny
   transformer started at the reference's weights (``model.init=reference``).

Without a reference checkpoint the reference log-probabilities depend on the
policy's architecture, so they are computed in :meth:`PairSession.build_policy`
(which ``polopt train`` calls before it reads ``pairs``).

With ``model=local_lm`` (the composition root hands the task the model config through
:meth:`PairTask.for_model`) the file is read and encoded with the model's own tokenizer, chat rows
included: :mod:`polopt.pairfile.local_lm`.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from pathlib import Path

import torch

from polopt.data import PairFileSpec, read_pair_file, write_rejects
from polopt.data.encoding import SequenceIds
from polopt.data.tokenizer import load_tokenizer
from polopt.losses.group_objective import GroupObjective
from polopt.losses.margin import MarginLoss
from polopt.models.reference_cache import FILE_NAME
from polopt.pairfile.group_session import grouped
from polopt.pairfile.local_lm import prepare_local_lm
from polopt.pairfile.session import REJECTS_FILE, PairSession, nothing_accepted
from polopt.pairfile.streamed import prepare_streamed
from polopt.training.sft import load_reference

Tensor = torch.Tensor


@dataclass
class PairTask:
    """The ``task=pairs`` config, checked; :meth:`prepare` reads the file."""

    file: PairFileSpec
    reference: str | None = None
    cache_reference: bool = True
    stream: bool = False  # task.stream: one streaming pass into a memory-mapped file (polopt.pairfile.streamed)
    summary_pairs: int | None = None  # task.summary_pairs (streamed): the summary's statistics over the first N
    chat_template: str | None = None  # task.chat_template: a Jinja template file for a local LM's message rows
    model: dict | None = None  # the run's model config (for_model); kind local_lm reads the file with its tokenizer

    def for_model(self, model: dict) -> PairTask:
        """This task for a run of ``model`` (the ``model`` config): ``model=local_lm`` reads and encodes the
        file with the model's own tokenizer (:mod:`polopt.pairfile.local_lm`)."""
        return dataclasses.replace(self, model=dict(model))

    def prepare(self, loss: MarginLoss, *, beta: float, smoothing: float = 0.0, mode: str = "sampled",
                n_pairs: int | None = None, seed: int = 0, run_dir: str | Path | None = None) -> PairSession:
        del seed  # the pairs are the file's; the trainer's seed orders the batches
        if mode != "sampled":
            raise ValueError(f"task.mode must be sampled for task=pairs (a file holds sampled pairs, there is no "
                             f"population to weigh exactly), got {mode!r}")
        if n_pairs is not None and (not isinstance(n_pairs, int) or isinstance(n_pairs, bool) or n_pairs < 1):
            raise ValueError(f"task.n_pairs must be a positive integer or null (every accepted pair), got {n_pairs!r}")
        if (self.model or {}).get("kind") == "local_lm":
            return prepare_local_lm(self, loss, model=self.model, beta=beta, smoothing=smoothing, n_pairs=n_pairs,
                                    run_dir=run_dir, grouped=lambda kind, loss: grouped(kind, loss, local=True))
        if self.chat_template is not None:
            raise ValueError(f"task.chat_template is read with model=local_lm only (the built-in transformer reads "
                             f"plain rows), got task.chat_template={self.chat_template!r}")
        if self.stream and isinstance(loss, GroupObjective):
            raise ValueError(f"task.stream=true trains margin losses and pair objectives on pair rows; loss "
                             f"{loss.name!r} is a group objective: set task.stream=false (read in memory)")
        if self.stream:
            return prepare_streamed(self, loss, beta=beta, smoothing=smoothing, n_pairs=n_pairs, run_dir=run_dir)
        tokenizer = load_tokenizer(self.file.tokenizer or "byte")
        data = read_pair_file(self.file, tokenizer=tokenizer)
        session_type, extra = PairSession, {}
        if (choice := grouped(data.kind, loss)) is not None:  # rows beyond pairs, or a group objective
            session_type, loss = choice
            extra = {"feedback": data.kind}
        rejects = None
        if run_dir is not None:
            rejects = write_rejects(data.rejects, Path(run_dir) / REJECTS_FILE)
        if len(data) == 0:
            raise nothing_accepted(self.file.path, data, rejects)
        model, meta = (None, None) if self.reference is None else load_reference(self.reference)
        cache = Path(run_dir) / FILE_NAME if run_dir is not None and self.cache_reference else None
        session = session_type(data=data, tokenizer=tokenizer, file_tokenizer=str(self.file.tokenizer),
                               ids=SequenceIds.for_tokenizer(tokenizer), loss=loss,
                               beta=beta, smoothing=smoothing, n_pairs=n_pairs, reference_path=self.reference,
                               reference_model=model, reference_meta=meta, cache=cache, rejects_path=rejects, **extra)
        session.encode()
        if model is not None:
            session.check_reference()
            session.attach_reference(model)
        return session

    def fit_reward(self, *, kind: str = "bradley_terry", **kwargs):
        """``polopt reward task=pairs``: a scalar-head reward model (see :mod:`polopt.pairfile.reward`), with
        ``model=local_lm`` a head on the local model's last hidden state (:mod:`polopt.pairfile.reward_lm`);
        with ``kind="preference"`` an antisymmetric pair head on either (:mod:`polopt.pairfile.preference`,
        :mod:`polopt.pairfile.preference_lm`)."""
        if (kwargs.get("model") or {}).get("kind") == "local_lm":
            if kind == "preference":
                from polopt.pairfile.preference_lm import fit_lm_preference

                return fit_lm_preference(self, **kwargs)
            from polopt.pairfile.reward_lm import fit_lm_reward

            return fit_lm_reward(self, **kwargs)
        if kind == "preference":
            from polopt.pairfile.preference import fit_pair_preference

            return fit_pair_preference(self.file, **kwargs)
        from polopt.pairfile.reward import fit_pair_reward  # builds on the data layer, as this module does

        return fit_pair_reward(self.file, **kwargs)


def pair_task(path: str | None = None, format: str = "auto", columns: dict | str | None = None,
              max_length: int | None = None, truncation: str = "reject", duplicates: str = "reject",
              tokenizer: str = "byte", hub: bool = False, split: str = "train", reference_checkpoint: str | None = None,
              cache_reference: bool = True, stream: bool = False, summary_pairs: int | None = None,
              chat_template: str | None = None) -> PairTask:
    """Build ``task=pairs`` (every key of conf/task/pairs.yaml but mode and n_pairs)."""
    if path is None:
        raise ValueError("task=pairs needs task.path=FILE (JSONL, CSV, Parquet or a saved dataset folder)")
    file = PairFileSpec(path, format=format, columns=columns, max_length=max_length, truncation=truncation,
                        duplicates=duplicates, tokenizer=tokenizer, hub=hub, split=split)
    if not isinstance(stream, bool):
        raise ValueError(f"task.stream must be true or false, got {stream!r}")
    if summary_pairs is not None and (not isinstance(summary_pairs, int) or isinstance(summary_pairs, bool)
                                      or summary_pairs < 1 or not stream):
        raise ValueError(f"task.summary_pairs must be null (every pair) or a positive integer, with task.stream=true, "
                         f"got {summary_pairs!r} (task.stream={stream})")
    return PairTask(file, reference=None if reference_checkpoint in (None, "") else str(reference_checkpoint),
                    cache_reference=bool(cache_reference), stream=stream, summary_pairs=summary_pairs,
                    chat_template=None if chat_template in (None, "") else str(chat_template))
