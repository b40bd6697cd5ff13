"""Task families with exactly known optima, each selectable as ``task=<name>``.

Every family returns a validated :class:`toy_tasks.finite.task.FiniteTask`. The
scenarios are invented for the kit: replies of a help desk of the fictional
Quillfeather Lending Library, judged by simulated annotators. Randomness comes
only from the ``seed`` argument.
"""

from __future__ import annotations

import itertools

import numpy as np

from toy_tasks.finite.task import FiniteTask, load_task, make_task

_REPLIES = [
    "step-by-step renewal guide", "one-line answer", "friendly answer with a caveat",
    "answer citing the loan policy", "apology and escalation", "answer with a wrong date",
    "long digression", "reply in verse",
]


def _labels(k: int) -> list[str]:
    return [_REPLIES[i] if i < len(_REPLIES) else f"reply {i}" for i in range(k)]


def _random_reference(rng: np.random.Generator, shape, concentration: float = 2.0) -> np.ndarray:
    return rng.dirichlet(np.full(shape[-1], concentration), size=shape[:-1])


def bradley_terry(n_responses: int = 6, reward_scale: float = 1.5, seed: int = 0,
                  rewards: list[float] | None = None) -> FiniteTask:
    """A bandit with Bradley–Terry preferences P[i,j] = sigmoid(r_i - r_j).

    Rewards are ``reward_scale`` * standard normal draws (or given); the
    reference is a Dirichlet(2) draw. Known optimum for the logistic loss:
    pi* ∝ pi_ref e^{r / beta} (Rafailov et al. 2023).
    """
    rng = np.random.default_rng(seed)
    r = np.asarray(rewards, dtype=float) if rewards is not None else reward_scale * rng.standard_normal(n_responses)
    k = len(r)
    return make_task(_random_reference(rng, (k,)), rewards=r, responses=_labels(k), name="bradley_terry",
                     description="help-desk replies with Bradley–Terry preferences")


def ranked(n_responses: int = 5, flip_rate: float = 0.2, seed: int = 0) -> FiniteTask:
    """Annotators who follow one ranking (reply 0 best) but flip each label with
    probability ``flip_rate``: P[i,j] = 1 - flip_rate for i ranked above j."""
    if not 0.0 <= flip_rate <= 0.5:
        raise ValueError(f"task.flip_rate must lie in [0, 0.5], got {flip_rate!r}")
    rng = np.random.default_rng(seed)
    upper = np.triu(np.ones((n_responses, n_responses)), 1)
    pref = (1.0 - flip_rate) * upper + flip_rate * upper.T + 0.5 * np.eye(n_responses)
    kind = "deterministic" if flip_rate == 0 else "noisy_labels"
    return make_task(_random_reference(rng, (n_responses,)), pref, responses=_labels(n_responses), name=kind,
                     description=f"one ranking of help-desk replies, labels flipped with probability {flip_rate:g}")


def noisy_labels(n_responses: int = 5, flip_rate: float = 0.2, seed: int = 0) -> FiniteTask:
    """:func:`ranked` with label noise (default flip rate 0.2)."""
    return ranked(n_responses, flip_rate, seed)


def deterministic(n_responses: int = 5, seed: int = 0) -> FiniteTask:
    """:func:`ranked` with no noise: P[i,j] = 1 for i above j. The logistic loss has no
    finite optimum here (Azar et al. 2023); squared and hinge do."""
    return ranked(n_responses, 0.0, seed)


def nontransitive(n_responses: int = 3, seed: int = 0, annotator_weights: list[float] | None = None,
                  uniform_reference: bool = False) -> FiniteTask:
    """Preferences pooled from annotator panels that are each transitive but disagree.

    Panel a ranks the replies by the cyclic shift a of the base order (0, 1, ..., K-1),
    so with K = 3 and equal panels P(0 > 1) = P(1 > 2) = P(2 > 0) = 2/3: a Condorcet
    cycle (Condorcet, Essai sur l'application de l'analyse..., 1785). P[i,j] is the
    weighted share of panels ranking i above j.
    """
    k = n_responses
    weights = np.ones(k) if annotator_weights is None else np.asarray(annotator_weights, dtype=float)
    if weights.shape != (k,) or np.any(weights < 0) or not weights.sum() > 0:
        raise ValueError(f"task.annotator_weights must be {k} non-negative numbers, got {annotator_weights!r}")
    weights = weights / weights.sum()
    pref = 0.5 * np.eye(k)
    for a in range(k):
        order = [(a + s) % k for s in range(k)]  # panel a's ranking, best first
        position = {reply: rank for rank, reply in enumerate(order)}
        for i, j in itertools.permutations(range(k), 2):
            pref[i, j] += weights[a] * (position[i] < position[j])
    rng = np.random.default_rng(seed)
    reference = np.full(k, 1.0 / k) if uniform_reference else _random_reference(rng, (k,))
    return make_task(reference, pref, responses=_labels(k), name="nontransitive",
                     description="three transitive annotator panels whose pooled preference is cyclic")


def contextual(n_prompts: int = 3, n_responses: int = 5, reward_scale: float = 1.5, seed: int = 0) -> FiniteTask:
    """Several prompts, each a Bradley–Terry bandit with its own rewards and reference."""
    rng = np.random.default_rng(seed)
    rewards = reward_scale * rng.standard_normal((n_prompts, n_responses))
    questions = ["How do I renew a book?", "Can I borrow the reading-room atlas?",
                 "Why was I charged a late fee?", "Where is the quiet floor?"]
    prompts = [questions[x] if x < len(questions) else f"question {x}" for x in range(n_prompts)]
    return make_task(_random_reference(rng, (n_prompts, n_responses)), rewards=rewards,
                     responses=_labels(n_responses), prompts=prompts, name="contextual",
                     description="help-desk questions, each with Bradley–Terry preferences over replies")


def from_file(path: str) -> FiniteTask:
    """A task read from a JSON task file (see :mod:`toy_tasks.finite.task`)."""
    if not path or path == "???":
        raise ValueError("task=file needs task.path=PATH to a JSON task file")
    return load_task(path)
