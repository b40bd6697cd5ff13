"""A sequence model seen as a policy over a sequence task's enumerated responses.

Kept apart from :mod:`toy_tasks.sequence.task` (the task) so that the session that builds this
policy does not import the task module that prepares it.
"""

from __future__ import annotations

import torch

from polopt.models.logprobs import SequencePolicy


class EnumeratedSequencePolicy(SequencePolicy):
    """A sequence model over a task's enumerated responses.

    ``logprobs(prompt, response)`` takes token tensors (B, T_p), (B, T_r) as any
    sequence policy does, or index tensors (B,) of (prompt, response) into the
    enumeration, as the finite policies do; then the model scores all X K
    enumerated sequences in one forward pass and the pairs are gathered from that
    table, which is how exact mode weighs every one of the K^2 pairs per prompt
    without running K^2 sequences. ``log_distribution()`` (X, K) is the
    sequence-level policy that the finite-task measurements read.
    """

    def __init__(self, model: torch.nn.Module, task):
        # task: a toy_tasks.sequence.task.SequenceTask (all_rows, reference_logprobs, vocab, sizes)
        super().__init__(model, pad_id=task.vocab.pad_id)
        prompt, response = task.all_rows()
        self.register_buffer("all_prompts", prompt, persistent=False)  # (X K, T_p)
        self.register_buffer("all_responses", response, persistent=False)  # (X K, L)
        self.register_buffer("reference_logprobs", torch.as_tensor(task.reference_logprobs), persistent=False)
        self.shape = (task.n_prompts, task.n_responses)

    def log_distribution(self) -> torch.Tensor:
        """log pi(y | x) of every enumerated response: (X, K)."""
        return super().logprobs(self.all_prompts, self.all_responses).reshape(self.shape)

    def logprobs(self, prompt: torch.Tensor, response: torch.Tensor,
                 loser: torch.Tensor | None = None) -> torch.Tensor:
        """(B,) or, with ``loser``, winners' then losers' log-probs (2B,) (see :class:`SequencePolicy`)."""
        if response.dim() == 1:  # indices into the enumeration
            table = self.log_distribution()  # (X, K)
            if loser is None:
                return table[prompt, response]  # (B,)
            return torch.cat([table[prompt, response], table[prompt, loser]])  # (2B,)
        return super().logprobs(prompt, response, loser)  # (B,) or (2B,)
