"""Rows beyond pairs in a pair file, trained by a group objective: groups of token responses.

A file of unpaired, ranking or scored rows (:mod:`polopt.data.group_rows`), or a file of pairs trained by
a group objective, becomes a :class:`polopt.groups.GroupSet` of token tensors:

    prompt    (N, T_p)     bos + tokens (model=transformer), the model's prompt ids (model=local_lm)
    members   (N, G, T_r)  each row's responses, G the file's largest group; a smaller group's absent
                           slots repeat its first response (so every scored row is a real sequence), with
    mask      (N, G)       False there, and reference log-probability 0
    feedback  (N, G)       labels (unpaired, G = 1), ranks (ranking: the file's ``ranking``, 0 = best;
                           pairs: winner 0, loser 1) or scores (scored)

and trains through the one loop's ``GroupBatches``. The reference's log-probabilities of every member are
computed once and cached in the run folder (:func:`polopt.models.reference_cache.reference_logprobs`).

Which loss reads which file (:func:`objective_for`): a group objective reads the kind whose feedback field
it reads (``loss.reads``); a margin loss or pair objective reads pairs (the usual pair path) and ranking
rows through the pair adapter (:func:`polopt.losses.group_objective.ranked_pairs`: a row's loss is the mean
of the pair loss over the G (G - 1) / 2 pairs its ranking orders, better over worse; each row keeps its
weight, so a row of G responses is not counted as G (G - 1) / 2 rows). Any other combination is refused
in one line naming losses that read the file.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch

from polopt.data.encoding import pad_rows
from polopt.data.kinds import describe
from polopt.groups import GroupSet, score_groups
from polopt.losses import registry
from polopt.losses.group_objective import FEEDBACK_FIELDS, GroupObjective
from polopt.losses.reduce import group_losses, group_statistics, weighted_mean
from polopt.models.logprobs import batched_logprobs, lengths
from polopt.models.reference_cache import reference_logprobs
from polopt.pairfile.local_lm import LocalLMSession
from polopt.pairfile.session import PairSession
from polopt.training.contracts import TrainResult

Tensor = torch.Tensor


def objective_for(loss, kind: str) -> GroupObjective:
    """``loss`` as the group objective that trains a file of ``kind`` rows (see the module docstring); a
    ValueError (one line, naming losses that do read it) where it cannot read them."""
    objective = registry.as_group_objective(loss)
    if objective.reads_feedback(kind):
        return objective
    readers = [n for n in registry.builtin_names("group") if registry.resolve(n).reads_feedback(kind)]
    what = ("a pair objective (it reads pairs, and ranking rows through their ordered pairs)"
            if not isinstance(loss, GroupObjective) else
            f"a group objective that reads group.{', group.'.join(objective.reads)}")
    raise ValueError(f"loss {objective.name!r} cannot read this file's {describe(kind)} rows: it is {what}; give "
                     f"a loss that reads group.{FEEDBACK_FIELDS[kind]}, e.g. loss={readers[0]} (built-ins that do: "
                     f"{', '.join(readers)})")


def grouped(kind: str, loss, *, local: bool = False) -> tuple[type, GroupObjective] | None:
    """(the session class, the objective) where a file of ``kind`` rows trains ``loss`` as groups, None where it
    trains on the usual pair path (pair rows, a margin loss or pair objective); a ValueError where ``loss``
    cannot read ``kind`` (:func:`objective_for`). ``local``: ``model=local_lm``."""
    if kind == "pairs" and not isinstance(loss, GroupObjective):
        return None
    return (LocalLMGroupSession if local else GroupFileSession), objective_for(loss, kind)


def row_groups(data, n: int) -> tuple[list, list[list], list[list]]:
    """(prompts, responses per row, feedback per row) of the first ``n`` accepted rows; a pair is the
    group (winner, loser) ranked (0, 1)."""
    if data.kind == "pairs":
        return data.prompt[:n], [[w, lo] for w, lo in zip(data.winner[:n], data.loser[:n], strict=True)], \
            [[0, 1]] * n
    return data.prompt[:n], data.responses[:n], data.feedback[:n]


@dataclass
class GroupFileSession(PairSession):
    """A pair file's rows as groups on the tiny transformer (see the module docstring); ``pairs`` stays None."""

    feedback: str = "pairs"  # the file's kind of row (task.feedback's names)
    groups: GroupSet | None = None

    @property
    def count(self) -> int:
        return len(self.data) if self.n_pairs is None else min(self.n_pairs, len(self.data))

    def encode(self) -> None:
        prompts, responses, feedback = row_groups(self.data, self.count)
        enc, ids = self.tokenizer.encode, self.ids
        self.set_tokens([[ids.bos, *enc(p)] for p in prompts], [[[*enc(r), ids.eos] for r in rs] for rs in responses],
                        feedback)

    def set_tokens(self, prompt_ids: list[list[int]], member_ids: list[list[list[int]]], feedback: list[list]) -> None:
        """The token tensors of the groups (see the module docstring) from id lists, padded with ``ids.pad``."""
        n, g = len(prompt_ids), max(len(ms) for ms in member_ids)
        self.prompt = pad_rows(prompt_ids, self.ids)  # (N, T_p)
        slots = [ms[k] if k < len(ms) else ms[0] for ms in member_ids for k in range(g)]
        self.members = pad_rows(slots, self.ids).reshape(n, g, -1)  # (N, G, T_r)
        self.mask = torch.tensor([[k < len(ms) for k in range(g)] for ms in member_ids])  # (N, G)
        name = FEEDBACK_FIELDS[self.feedback]
        values = [[*f, *range(len(f), g)] for f in feedback]  # absent slots: ranks after the present ones
        self.feedback_values = torch.tensor(values, dtype=torch.long if name == "ranks" else torch.float32)  # (N, G)
        self.weight = torch.tensor(self.data.weight[:n], dtype=torch.float32) if self.data.accounting["weighted"] \
            else None
        self.context_needed = max(len(p) + len(m) for p, ms in zip(prompt_ids, member_ids, strict=True)
                                  for m in ms) - 1  # the last token is only scored, never read

    def attach_reference(self, model: torch.nn.Module) -> None:
        """The reference's log-probs of every present member, computed once (one pass) and cached."""
        self.reference_model = model
        n, g = self.mask.shape
        flat = self.members.reshape(n * g, -1)  # (N G, T_r)
        values, self.reference_cache_reused = reference_logprobs(model, self.prompt.repeat_interleave(g, dim=0), flat,
                                                                 pad_id=self.ids.pad, path=self.cache, batch_size=256)
        reference = torch.where(self.mask, values.reshape(n, g), 0.0)  # (N, G)
        size = torch.where(self.mask, lengths(flat, pad_id=self.ids.pad).reshape(n, g), 1).float()  # (N, G) tokens
        self.groups = GroupSet(self.prompt, self.members, reference, self.mask, lengths=size, weight=self.weight,
                               **{FEEDBACK_FIELDS[self.feedback]: self.feedback_values})

    @torch.no_grad()
    def full_statistics(self, policy) -> dict:
        """The objective and the mean log-ratio over every accepted row, eval mode."""
        training = policy.training
        policy.eval()
        groups = self.groups
        logp = score_groups(lambda prompt, response: batched_logprobs(policy.model, prompt, response,
                                                                      pad_id=self.ids.pad, batch_size=256),
                            groups.prompt, groups.members).to(groups.reference.dtype)  # (N, G)
        policy.train(training)
        logp = torch.where(groups.mask, logp, 0.0)
        value = weighted_mean(group_losses(self.loss, logp, groups, beta=self.beta), groups.weight)
        return {"loss": float(value), **group_statistics(logp - groups.reference, groups.mask, groups.weight)}

    def summarise(self, policy, result: TrainResult) -> dict:
        a = self.data.accounting
        notes = list(self.notes)
        if self.loss.stop_gradient:
            notes.append(f"{self.loss.name} holds a statistic without gradient (a batch's reference point): the "
                         "loss reported is its value, which training need not decrease monotonically")
        return {
            "task": "pairs", "row_kind": self.data.kind, "feedback": FEEDBACK_FIELDS[self.feedback],
            "loss_name": self.loss.name, "beta": self.beta, "n_groups": len(self.groups),
            "group_size": self.groups.size, **self.full_statistics(policy), "steps": result.steps,
            "seconds": result.seconds, "path": a["source"], "rows_in": a["rows_in"],
            "rows_accepted": a["rows_accepted"], "rows_rejected": a["rows_rejected"], "data": a,
            "rejects_file": None if self.rejects_path is None else str(self.rejects_path),
            "tokenizer": a["tokenizer"], "reference_checkpoint": self.reference_path,
            "reference_cache": None if self.cache is None else str(self.cache),
            "reference_cache_reused": self.reference_cache_reused, "notes": notes,
        }

    def table(self, summary: dict) -> str:
        lines = [f"{summary['row_kind']} rows: {summary['path']}",
                 f"  {summary['data']['balance']}"
                 + (f"  (rejects: {summary['rejects_file']})" if summary["rows_rejected"] else ""),
                 f"  trained on {summary['n_groups']} groups (up to {summary['group_size']} response(s) each, "
                 f"group.{summary['feedback']}), {summary['loss_name']} beta {summary['beta']}, "
                 f"{summary['steps']} steps in {summary['seconds']:.1f} s",
                 f"  over all groups: loss {summary['loss']:.4g}  logratio_mean {summary['logratio_mean']:.4g}"]
        lines.extend(f"note: {n}" for n in summary["notes"])
        return "\n".join(lines)


@dataclass
class LocalLMGroupSession(LocalLMSession, GroupFileSession):
    """:class:`GroupFileSession` on a local causal LM: ids by :mod:`polopt.data.chat`'s convention
    (``token_ids`` rows of (prompt ids, [ids of each response])), padded with ``ids.pad``
    (:data:`polopt.models.local_lm.PAD`)."""

    def encode(self) -> None:
        n = self.count
        if self.data.kind == "pairs":
            rows = [(p, [w, lo]) for p, w, lo in self.token_ids[:n]]
        else:
            rows = self.token_ids[:n]
        self.set_tokens([p for p, _ in rows], [ms for _, ms in rows], row_groups(self.data, n)[2])
