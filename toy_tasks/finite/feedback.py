"""Feedback beyond pairs on a finite task: the population of weighted groups of each kind.

``task.feedback`` chooses what one datum is, ``task.group_size`` = G its number of responses. For a
prompt x (weight rho_x), responses drawn i.i.d. from the sampling distribution mu = ``sampling[x]``:

- ``pairs``: the task's labelled pairs (G = 2), weight W[x, i, j] (:meth:`FiniteTask.win_weights`),
  the winner ranked 0 and the loser 1;
- ``unpaired``: G responses y_1..y_G from mu, each labelled desirable (1) with probability d(y) and
  undesirable (0) otherwise, independently; d is the task file's ``"desirability"`` list, else
  ``d(y) = sum_j mu_j P[y, j]`` (the chance that y beats a response drawn from mu; G may be 1);
- ``ranking``: G responses from mu, ranked by the Plackett–Luce model of the task's rewards r:
  the ranking sigma (best first) has probability ``prod_k e^{r_sigma(k)} / sum_{j >= k} e^{r_sigma(j)}``
  (Plackett 1975, Luce 1959); a task without rewards refuses this kind;
- ``scored``: G responses from mu, each with its reward as its score (a task without rewards refuses).

For small K and G the population is an exact finite sum over ordered G-tuples (K^G tuples, times the
G! rankings or the 2^G label patterns of each), each group weighted by its probability
``rho_x prod_g mu(y_g)`` times the probability of its feedback: the weighted-group analogue of the
win-weight matrix W. Exact-mode training uses these weighted groups; sampled mode draws
``task.n_pairs`` groups from them and weights each distinct group by its share of the draws.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

FEEDBACK_KINDS = ("pairs", "unpaired", "ranking", "scored")
MAX_GROUPS = 200_000  # enumerated groups of one population, all prompts together


@dataclass(frozen=True)
class WeightedGroups:
    """Groups of one feedback kind with their weights: numpy arrays with a leading dimension N.

    ``members`` (N, G) response indices of prompt ``prompt`` (N,); ``weight`` (N,) their
    probabilities (population) or shares of a sample, summing to 1; exactly one of ``labels``
    (N, G) float, ``ranks`` (N, G) int (0 = best), ``scores`` (N, G) float is set, as ``kind`` says.
    """

    kind: str
    prompt: np.ndarray
    members: np.ndarray
    weight: np.ndarray
    labels: np.ndarray | None = None
    ranks: np.ndarray | None = None
    scores: np.ndarray | None = None

    def __len__(self) -> int:
        return len(self.prompt)

    @property
    def size(self) -> int:
        return self.members.shape[1]

    def feedback(self) -> dict:
        """The one feedback field, by name: {"labels" | "ranks" | "scores": (N, G)}."""
        return {k: v for k, v in (("labels", self.labels), ("ranks", self.ranks), ("scores", self.scores))
                if v is not None}

    def take(self, keep: np.ndarray, weight: np.ndarray) -> WeightedGroups:
        """The groups at ``keep`` with new weights."""
        fields = {k: v[keep] for k, v in self.feedback().items()}
        return WeightedGroups(self.kind, self.prompt[keep], self.members[keep], weight, **fields)


def check_feedback(feedback: str, group_size) -> None:
    """A ValueError (one line) naming the key unless the kind and the size go together."""
    if feedback not in FEEDBACK_KINDS:
        raise ValueError(f"task.feedback must be one of {', '.join(FEEDBACK_KINDS)}, got {feedback!r}")
    if not isinstance(group_size, int) or isinstance(group_size, bool) or group_size < 1:
        raise ValueError(f"task.group_size must be a positive integer, got {group_size!r}")
    if feedback == "pairs" and group_size != 2:
        raise ValueError(f"task.feedback=pairs has groups of 2 (a winner and a loser), got "
                         f"task.group_size={group_size}; "
                         "use task.feedback=ranking for larger groups")
    if feedback in ("ranking", "scored") and group_size < 2:
        raise ValueError(f"task.feedback={feedback} compares responses: task.group_size must be at least 2, "
                         f"got {group_size}")


def desirability(task) -> np.ndarray:
    """d (X, K): the task's ``desirability`` where its file gives one, else ``sum_j mu_j P[y, j]``."""
    given = getattr(task, "desirability", None)
    if given is not None:
        return np.asarray(given, dtype=np.float64)
    return np.einsum("xj,xyj->xy", task.sampling, task.preference)


def _tuples(k: int, g: int) -> np.ndarray:
    """Every ordered G-tuple of K responses, (K^G, G)."""
    return np.array(list(itertools.product(range(k), repeat=g)), dtype=np.int64).reshape(-1, g)


def _rewards(task, feedback: str) -> np.ndarray:
    if task.rewards is None:
        raise ValueError(f"task.feedback={feedback} needs a task with rewards (Bradley–Terry 'rewards' in a task "
                         f"file, or task=bradley_terry / task=contextual); task {task.name!r} gives a preference "
                         "matrix only")
    return task.rewards


def _check_count(task, feedback: str, g: int, per_tuple: int) -> None:
    count = task.n_prompts * task.n_responses**g * per_tuple
    if count > MAX_GROUPS:
        raise ValueError(f"task.feedback={feedback} with task.group_size={g} enumerates {count} groups on this task "
                         f"({task.n_responses} responses), more than {MAX_GROUPS}; lower task.group_size")


def _unpaired(task, g: int):
    tuples, patterns = _tuples(task.n_responses, g), _tuples(2, g).astype(np.float64)  # (T, G), (2^G, G)
    d = desirability(task)
    for x in range(task.n_prompts):
        draw = np.prod(task.sampling[x][tuples], axis=1)  # (T,)
        dx = d[x][tuples][:, None, :]  # (T, 1, G)
        label = np.prod(np.where(patterns[None] == 1.0, dx, 1.0 - dx), axis=2)  # (T, 2^G)
        weight = task.prompt_weights[x] * draw[:, None] * label
        labels = np.tile(patterns, (len(tuples), 1))  # (T 2^G, G)
        yield x, np.repeat(tuples, len(patterns), 0), weight.reshape(-1), {"labels": labels}


def _ranking(task, g: int):
    tuples, orders = _tuples(task.n_responses, g), np.array(list(itertools.permutations(range(g))))  # (T, G), (G!, G)
    ranks = np.argsort(orders, axis=1)  # (G!, G): ranks[o, slot] = position of that slot in order o
    rewards = _rewards(task, "ranking")
    for x in range(task.n_prompts):
        draw = np.prod(task.sampling[x][tuples], axis=1)  # (T,)
        ordered = rewards[x][tuples][:, orders]  # (T, G!, G): rewards best first under each order
        tails = np.flip(np.logaddexp.accumulate(np.flip(ordered, 2), axis=2), 2)  # log sum_{j >= k} e^{r}
        plackett_luce = np.exp((ordered - tails).sum(2))  # (T, G!)
        weight = task.prompt_weights[x] * draw[:, None] * plackett_luce
        yield x, np.repeat(tuples, len(orders), 0), weight.reshape(-1), {"ranks": np.tile(ranks, (len(tuples), 1))}


def _scored(task, g: int):
    tuples, rewards = _tuples(task.n_responses, g), _rewards(task, "scored")
    for x in range(task.n_prompts):
        weight = task.prompt_weights[x] * np.prod(task.sampling[x][tuples], axis=1)
        yield x, tuples, weight, {"scores": rewards[x][tuples]}


def _pairs(task):
    w = task.win_weights()  # (X, K, K)
    x, i, j = np.nonzero(w)
    members = np.stack([i, j], 1)
    return WeightedGroups("pairs", x, members, w[x, i, j], ranks=np.tile(np.array([[0, 1]]), (len(x), 1)))


def population_groups(task, feedback: str, group_size: int) -> WeightedGroups:
    """Every group of ``feedback`` with ``group_size`` members on ``task`` with its probability (see the
    module docstring); groups of probability 0 are left out. Weights sum to 1."""
    check_feedback(feedback, group_size)
    if feedback == "pairs":
        return _pairs(task)
    per_tuple = {"unpaired": 2**group_size, "ranking": math.factorial(group_size), "scored": 1}[feedback]
    _check_count(task, feedback, group_size, per_tuple)
    parts = list({"unpaired": _unpaired, "ranking": _ranking, "scored": _scored}[feedback](task, group_size))
    prompt = np.concatenate([np.full(len(w), x) for x, _, w, _ in parts])
    members = np.concatenate([m for _, m, _, _ in parts])
    weight = np.concatenate([w for _, _, w, _ in parts])
    field = next(iter(parts[0][3]))
    values = np.concatenate([f[field] for *_, f in parts])
    groups = WeightedGroups(feedback, prompt, members, weight, **{field: values})
    keep = weight > 0
    return groups.take(keep, weight[keep] / weight[keep].sum())


def sample_groups(population: WeightedGroups, n_groups: int, seed: int) -> WeightedGroups:
    """``n_groups`` groups drawn i.i.d. from the population; each distinct group weighted by its share
    of the draws (the empirical population, whose optimum is the sample's)."""
    if not isinstance(n_groups, int) or isinstance(n_groups, bool) or n_groups < 1:
        raise ValueError(f"task.n_pairs (the number of groups drawn in sampled mode) must be a positive integer, "
                         f"got {n_groups!r}")
    counts = np.random.default_rng(seed).multinomial(n_groups, population.weight)
    keep = counts > 0
    return population.take(keep, counts[keep] / n_groups)

