"""What a method other than offline training sees of a task: tensors and small functions.

A method never imports a task package. The composition root hands it a
:class:`FiniteEnvironment` built by the task (for finite tasks:
``toy_tasks.methods.view``). Methods reach the policy only through
``log_distribution()`` (exact expectations over a finite response set) and
``logprobs(prompt, response)`` (sampled estimators), and the task only through
the reference log-probabilities, the rewards and the preference. A sequence task
can plug in by offering the same calls (``sample``, ``reward``, ``prefer``,
``reference_logprobs``) for its own responses; the exact estimators need a
finite response set.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch

Tensor = torch.Tensor


@dataclass
class FiniteEnvironment:
    """A finite task as tensors.

    Attributes:
        reference: (X, K) log pi_ref, cached once.
        prompt_weights: (X,) sums to 1.
        rewards: (X, K) rewards r(x, y), or None (then reward-based methods refuse).
        preference: (X, K, K) P[x, i, j] = probability i is preferred to j, or None.
    """

    reference: Tensor
    prompt_weights: Tensor
    rewards: Tensor | None = None
    preference: Tensor | None = None

    @property
    def n_prompts(self) -> int:
        return self.reference.shape[0]

    def reference_logprobs(self, prompt: Tensor, response: Tensor) -> Tensor:
        """log pi_ref(response | prompt): (B,), (B,) -> (B,)."""
        return self.reference[prompt, response]

    def reward(self, prompt: Tensor, response: Tensor) -> Tensor:
        """r(prompt, response): (B,), (B,) -> (B,)."""
        if self.rewards is None:
            raise ValueError("this method needs rewards, and the task has none; use a task with rewards "
                             "(e.g. task=bradley_terry) or method.reward=win_rate")
        return self.rewards[prompt, response]

    def prefer(self, prompt: Tensor, first: Tensor, second: Tensor) -> Tensor:
        """P(first > second | prompt): (B,) x 3 -> (B,)."""
        if self.preference is None:
            raise ValueError("this method needs a preference, and the task has none")
        return self.preference[prompt, first, second]

    @staticmethod
    def sample(policy: torch.nn.Module, per_prompt: int, generator: torch.Generator) -> tuple[Tensor, Tensor]:
        """``per_prompt`` responses for every prompt, drawn from the policy without gradient.

        Returns (prompt, response), each (X * per_prompt,), grouped by prompt.
        """
        with torch.no_grad():
            probs = policy.log_distribution().exp()  # (X, K)
            response = torch.multinomial(probs, per_prompt, replacement=True, generator=generator)  # (X, n)
        prompt = torch.arange(probs.shape[0]).repeat_interleave(per_prompt)  # (X * n,)
        return prompt, response.reshape(-1)
