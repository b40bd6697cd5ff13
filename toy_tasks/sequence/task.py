"""An enumerable sequence task: every response can be listed, so the optimum is exact.

Responses are strings over a small alphabet of ``n_symbols`` symbols that stop
either at an end token or at ``max_length`` symbols, so for S symbols and
length L there are ``sum_{l < L} S^l + S^L`` responses (S = 3, L = 4: 121;
S = 3, L = 5: 364; S = 4, L = 5: 1365). Each prompt is one prompt token. The
reference is a frozen tiny causal transformer (seeded, its head scaled by
``reference_sharpness`` so that it prefers some continuations), and its
probability of a response is the chain-rule product over the response tokens.
Because the model's outputs are exactly the symbols and the end token, and a
response stops at L symbols, these probabilities sum to 1 over the enumerated
responses of each prompt: a fact of probability the tests check.

Preferences (invented):

- ``bradley_terry``: a sequence-level reward ``r(x, y) = reward_scale * sum_t v_x[y_t]``
  with per-prompt symbol values ``v_x`` drawn from the seed, and
  ``P(y > y') = sigmoid(r(x, y) - r(x, y'))`` (Bradley and Terry, 1952).
- ``nontransitive``: each response has a class ``c(y) = (sum of its symbol numbers,
  counted from 1) mod 3``; class c beats class c + 1 (mod 3) with probability
  ``0.5 + cycle_strength`` and ties within a class are 1/2: a Condorcet cycle
  over classes.

:meth:`SequenceTask.finite_task` turns the task into a
:class:`toy_tasks.finite.task.FiniteTask` over the enumerated responses (pairs drawn
from the reference, as real preference data are drawn from the starting model),
so :func:`toy_tasks.exact.margin.solve` gives the exact optimum, and ``polopt export``
writes it out as the finite-task file of docs/guides/check-a-loss.md.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path

import numpy as np
import torch

from polopt.losses.group_objective import GroupObjective
from polopt.models.logprobs import batched_logprobs
from polopt.models.transformer import TinyTransformer
from toy_tasks.finite.task import FiniteTask, make_task
from toy_tasks.sequence import group_session as sequence_groups
from toy_tasks.sequence import preference as sequence_preference
from toy_tasks.sequence import reward as sequence_reward
from toy_tasks.sequence import session as sequence_session

PREFERENCES = ("bradley_terry", "nontransitive")
SYMBOLS = "abcdefghijklmnopqrstuvwxyz"
END = "<end>"
MAX_RESPONSES = 20000  # exact mode weighs K^2 pairs per prompt; beyond this it stops being small


def enumerate_responses(n_symbols: int, max_length: int) -> list[tuple[int, ...]]:
    """Every response as a tuple of token ids, shortest first: symbols are 0..S-1, the end
    token is S; strings shorter than ``max_length`` end with it, strings of
    ``max_length`` symbols stop without it."""
    end = n_symbols
    out: list[tuple[int, ...]] = []
    for length in range(max_length + 1):
        for body in itertools.product(range(n_symbols), repeat=length):
            out.append(body + ((end,) if length < max_length else ()))
    return out


def count_responses(n_symbols: int, max_length: int) -> int:
    return sum(n_symbols**length for length in range(max_length + 1))


@dataclass(frozen=True)
class Vocabulary:
    """Token ids: symbols 0..S-1, the end token S, prompt tokens S+1..S+X, padding S+X+1."""

    n_symbols: int
    n_prompts: int

    @property
    def end_id(self) -> int:
        return self.n_symbols

    @property
    def output_size(self) -> int:  # what a response can contain: the symbols and the end token
        return self.n_symbols + 1

    def prompt_id(self, x: int) -> int:
        return self.n_symbols + 1 + x

    @property
    def pad_id(self) -> int:
        return self.n_symbols + self.n_prompts + 1

    @property
    def size(self) -> int:
        return self.n_symbols + self.n_prompts + 2

    def label(self, response: tuple[int, ...]) -> str:
        words = [END if t == self.end_id else SYMBOLS[t] for t in response]
        return " ".join(words)


class SequenceTask:
    """The enumerable sequence task; see the module docstring. Build it with :func:`sequence_task`."""

    name = "sequence"

    def __init__(self, *, n_symbols: int, max_length: int, n_prompts: int, preference: str, reward_scale: float,
                 cycle_strength: float, reference_width: int, reference_layers: int, reference_heads: int,
                 reference_sharpness: float, cache_reference: bool, seed: int):
        self.vocab = Vocabulary(n_symbols, n_prompts)
        self.max_length = max_length
        self.preference_kind = preference
        self.reward_scale = float(reward_scale)
        self.cycle_strength = float(cycle_strength)
        self.cache_reference = bool(cache_reference)
        self.seed = seed
        self.responses = enumerate_responses(n_symbols, max_length)
        # every prompt and response as right-padded tokens, prompt-major: row x * K + k
        self.prompt_tokens = torch.tensor([[self.vocab.prompt_id(x)] for x in range(n_prompts)])  # (X, 1)
        padded = [list(r) + [self.vocab.pad_id] * (max_length - len(r)) for r in self.responses]
        self.response_tokens = torch.tensor(padded, dtype=torch.long).reshape(len(self.responses), max_length)  # (K, L)
        self.reference_model = TinyTransformer(
            self.vocab.size, output_size=self.vocab.output_size, context=self.context_needed,
            width=reference_width, layers=reference_layers, heads=reference_heads, seed=seed).double()
        with torch.no_grad():
            self.reference_model.head.weight.mul_(reference_sharpness)
        self.reference_model.requires_grad_(False).eval()

    # ------------------------------------------------------------ shapes

    @property
    def n_prompts(self) -> int:
        return self.vocab.n_prompts

    @property
    def n_responses(self) -> int:
        return len(self.responses)

    @property
    def context_needed(self) -> int:
        """Input positions a model must hold: the prompt and all but the last response token."""
        return int(self.prompt_tokens.shape[1]) + self.max_length - 1

    def rows(self, prompt: np.ndarray | torch.Tensor, response: np.ndarray | torch.Tensor):
        """Token tensors (N, T_p), (N, L) of (prompt index, response index) rows."""
        prompt = torch.as_tensor(prompt, dtype=torch.long)
        response = torch.as_tensor(response, dtype=torch.long)
        return self.prompt_tokens[prompt], self.response_tokens[response]

    def all_rows(self):
        """Every (prompt, response) pair, prompt-major: (X K, T_p), (X K, L)."""
        x = torch.arange(self.n_prompts).repeat_interleave(self.n_responses)
        k = torch.arange(self.n_responses).repeat(self.n_prompts)
        return self.rows(x, k)

    # ------------------------------------------------------------ the distributions

    @cached_property
    def reference_logprobs(self) -> np.ndarray:
        """log pi_ref(y | x) for every enumerated response, (X, K), float64; computed once."""
        prompt, response = self.all_rows()
        values = batched_logprobs(self.reference_model, prompt, response, pad_id=self.vocab.pad_id)
        return values.reshape(self.n_prompts, self.n_responses).numpy()

    @cached_property
    def rewards(self) -> np.ndarray | None:
        """Sequence-level rewards (X, K) for Bradley–Terry preferences; None otherwise."""
        if self.preference_kind != "bradley_terry":
            return None
        rng = np.random.default_rng(self.seed)
        values = rng.standard_normal((self.n_prompts, self.vocab.n_symbols))  # (X, S) per-symbol values
        out = np.zeros((self.n_prompts, self.n_responses))
        for k, response in enumerate(self.responses):
            symbols = [t for t in response if t != self.vocab.end_id]
            out[:, k] = values[:, symbols].sum(axis=1)
        return self.reward_scale * out

    def classes(self) -> np.ndarray:
        """The class of each response for non-transitive preferences: (sum of symbol numbers) mod 3."""
        return np.array([sum(t + 1 for t in r if t != self.vocab.end_id) % 3 for r in self.responses])

    def cyclic_preference(self) -> np.ndarray:
        """P (X, K, K): class c beats class c + 1 mod 3 with probability 0.5 + cycle_strength."""
        c = self.classes()
        beats = (c[None, :] - c[:, None]) % 3  # 1: i's class beats j's; 2: the other way; 0: a tie
        p = 0.5 + self.cycle_strength * np.where(beats == 1, 1.0, np.where(beats == 2, -1.0, 0.0))
        return np.broadcast_to(p, (self.n_prompts, *p.shape)).copy()

    @cached_property
    def finite(self) -> FiniteTask:
        """The same task over the enumerated responses, as a finite task (pairs drawn from pi_ref)."""
        reference = np.exp(self.reference_logprobs)
        labels = [self.vocab.label(r) for r in self.responses]
        prompts = [f"prompt {x}" for x in range(self.n_prompts)]
        kind = "Bradley–Terry reward" if self.rewards is not None else "a preference cycle over classes"
        description = (f"enumerable sequence task: {self.vocab.n_symbols} symbols, up to {self.max_length} "
                       f"per response, {self.n_responses} responses per prompt, {kind}")
        preference = None if self.rewards is not None else self.cyclic_preference()
        return make_task(reference, preference, rewards=self.rewards, responses=labels, prompts=prompts,
                         lengths=np.broadcast_to(self.token_counts, (self.n_prompts, self.n_responses)),
                         name="sequence", description=description)

    @property
    def token_counts(self) -> np.ndarray:
        """Tokens the model generates for each enumerated response, (K,): its symbols plus the end
        token (a response of ``max_length`` symbols stops without one)."""
        return np.array([len(r) for r in self.responses], dtype=np.float64)

    def finite_task(self) -> FiniteTask:
        return self.finite

    def save(self, path: str | Path) -> Path:
        """Write the enumerated finite task as a task file (``polopt export sequence OUT.json``)."""
        return self.finite.save(path)

    def fit_reward(self, *, kind: str = "bradley_terry", **kwargs):
        """``polopt reward``: a scalar head on the tiny transformer (see :mod:`toy_tasks.sequence.reward`), or with
        ``kind="preference"`` an antisymmetric pair head (:mod:`toy_tasks.sequence.preference`)."""
        if kind == "preference":
            return sequence_preference.fit_sequence_preference(self, **kwargs)
        return sequence_reward.fit_sequence_reward(self, **kwargs)

    def prepare(self, loss, **kwargs):
        """The trainer's view of this task (see :mod:`toy_tasks.sequence.session`); a group objective's:
        every pair as a group of two (:mod:`toy_tasks.sequence.group_session`)."""
        if isinstance(loss, GroupObjective):
            return sequence_groups.prepare(self, loss, **kwargs)
        return sequence_session.prepare(self, loss, **kwargs)


def sequence_task(n_symbols: int = 3, max_length: int = 5, n_prompts: int = 2, preference: str = "bradley_terry",
                  reward_scale: float = 1.0, cycle_strength: float = 0.4, reference_width: int = 32,
                  reference_layers: int = 2, reference_heads: int = 2, reference_sharpness: float = 10.0,
                  cache_reference: bool = True, seed: int = 0) -> SequenceTask:
    """Build the enumerable sequence task (``task=sequence``), checking every field."""
    for name, value, low in (("n_symbols", n_symbols, 1), ("max_length", max_length, 1), ("n_prompts", n_prompts, 1)):
        if not isinstance(value, int) or isinstance(value, bool) or value < low:
            raise ValueError(f"task.{name} must be an integer >= {low}, got {value!r}")
    if n_symbols > len(SYMBOLS):
        raise ValueError(f"task.n_symbols must be at most {len(SYMBOLS)}, got {n_symbols}")
    k = count_responses(n_symbols, max_length)
    if k > MAX_RESPONSES:
        raise ValueError(f"task.n_symbols={n_symbols} and task.max_length={max_length} give {k} responses per "
                         f"prompt; at most {MAX_RESPONSES} keep the task enumerable (lower either)")
    if k < 2:
        raise ValueError("the task needs at least 2 responses per prompt; raise task.n_symbols or task.max_length")
    if preference not in PREFERENCES:
        raise ValueError(f"task.preference must be one of {', '.join(PREFERENCES)}, got {preference!r}")
    if not 0.0 < cycle_strength <= 0.5:
        raise ValueError(f"task.cycle_strength must lie in (0, 0.5], got {cycle_strength!r}")
    return SequenceTask(n_symbols=n_symbols, max_length=max_length, n_prompts=n_prompts, preference=preference,
                        reward_scale=reward_scale, cycle_strength=cycle_strength, reference_width=reference_width,
                        reference_layers=reference_layers, reference_heads=reference_heads,
                        reference_sharpness=reference_sharpness, cache_reference=cache_reference, seed=seed)
