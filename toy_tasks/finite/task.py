"""Finite preference tasks: a type, its validation, its win weights and its file format.

A finite task has prompts x = 0..X-1 and, per prompt, responses i = 0..K-1
with a reference policy ``pi_ref[x]``, a pair-sampling distribution ``mu[x]``
and a preference matrix ``P[x]`` (``P[x,i,j]`` = probability that i is
preferred to j; ``P + P^T = 1``). Bradley–Terry tasks also carry rewards with
``P[i,j] = sigmoid(r_i - r_j)``.

Pairs are drawn as in real preference data: a prompt from the prompt weights,
two *distinct* responses i.i.d. from ``mu`` (draws with i = j are redrawn),
the label from ``P``. The probability of an ordered (winner, loser) pair is the
win weight

    W[x, i, j] = rho_x mu_i mu_j P[i, j] / Z_x     (i != j, Z_x = sum_{i != j} mu_i mu_j P[i, j])

so that ``sum W = 1`` and the population loss ``sum W f(beta (h_i - h_j))`` is
the expected loss of one pair. It differs from the form
``sum_{i,j} mu_i mu_j P[i,j] f(.)`` only by a positive factor and the constant
diagonal, so the optima are the same.

The JSON file (``task=file task.path=...``) holds one prompt at the top level::

    {"responses": [...], "reference": [...], "sampling": [...],
     "preference": [[...], ...]  or  "rewards": [...],
     "lengths": [n_0, ...],            # optional: tokens per response, default 1 each
     "desirability": [d_0, ...]}       # optional: P(labelled desirable) per response, for unpaired
                                       # feedback (toy_tasks/finite/feedback.py); default sum_j mu_j P[y, j]

or several under ``"prompts": [{"prompt": "...", "weight": 1.0, ...same keys...}, ...]``.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import scipy.special

from polopt.losses.group_objective import GroupObjective
from toy_tasks.finite import group_session, session
from toy_tasks.measures import kl_divergence
from toy_tasks.methods import preference_fit, reward_fit

PROBABILITY_TOLERANCE = 1e-6


@dataclass(frozen=True)
class LabelledPairs:
    """A finite sample of labelled pairs: index arrays of shape (N,)."""

    prompt: np.ndarray
    winner: np.ndarray
    loser: np.ndarray

    def __len__(self) -> int:
        return len(self.prompt)


@dataclass(frozen=True)
class FiniteTask:
    """A finite preference task. Arrays are float64; see the module docstring.

    Attributes:
        reference: (X, K) pi_ref, positive, rows sum to 1.
        sampling: (X, K) mu, non-negative, rows sum to 1.
        preference: (X, K, K) P with P + P^T = 1.
        prompt_weights: (X,) sums to 1.
        rewards: (X, K) Bradley–Terry rewards, or None.
        lengths: (X, K) response lengths in tokens (positive integers, stored as float64);
            1 for every response of a task given without lengths.
        responses: K response labels; prompts: X prompt labels.
        desirability: (X, K) the probability that a response is labelled desirable (unpaired
            feedback), in [0, 1], or None (then derived from P; see toy_tasks.finite.feedback).
    """

    reference: np.ndarray
    sampling: np.ndarray
    preference: np.ndarray
    prompt_weights: np.ndarray
    rewards: np.ndarray | None = None
    responses: list[str] = field(default_factory=list)
    prompts: list[str] = field(default_factory=list)
    name: str = "finite"
    description: str = ""
    lengths: np.ndarray | None = None
    desirability: np.ndarray | None = None

    def __post_init__(self):
        if self.lengths is None:  # frozen: set the default through object.__setattr__
            object.__setattr__(self, "lengths", np.ones_like(self.reference))

    @property
    def n_prompts(self) -> int:
        return self.reference.shape[0]

    @property
    def n_responses(self) -> int:
        return self.reference.shape[1]

    # ------------------------------------------------------------------ weights

    def win_weights(self) -> np.ndarray:
        """Population win weights W (X, K, K): the probability of each ordered (winner, loser)."""
        mu = self.sampling
        raw = mu[:, :, None] * mu[:, None, :] * self.preference  # (X, K, K)
        raw = raw * (1.0 - np.eye(self.n_responses))[None]  # a pair has two distinct responses
        per_prompt = raw.sum(axis=(1, 2), keepdims=True)
        with np.errstate(invalid="ignore", divide="ignore"):
            w = np.where(per_prompt > 0, raw / per_prompt, 0.0)
        return w * self.prompt_weights[:, None, None]

    def sample_pairs(self, n_pairs: int, seed: int) -> LabelledPairs:
        """Draw ``n_pairs`` labelled pairs i.i.d. (see the module docstring)."""
        if not isinstance(n_pairs, int) or n_pairs < 1:
            raise ValueError(f"task.n_pairs must be a positive integer, got {n_pairs!r}")
        rng = np.random.default_rng(seed)
        chunks, have = [], 0
        while have < n_pairs:  # redraw the pairs whose two responses coincide
            m = 2 * (n_pairs - have) + 16
            x = rng.choice(self.n_prompts, size=m, p=self.prompt_weights)
            cdf = np.cumsum(self.sampling[x], axis=1)  # (m, K)
            a, b = (np.minimum((rng.random((m, 1)) > cdf).sum(1), self.n_responses - 1) for _ in range(2))
            keep = a != b
            chunks.append((x[keep], a[keep], b[keep]))
            have += int(keep.sum())
        x, a, b = (np.concatenate(parts)[:n_pairs] for parts in zip(*chunks, strict=True))
        first_wins = rng.random(n_pairs) < self.preference[x, a, b]
        return LabelledPairs(x, np.where(first_wins, a, b), np.where(first_wins, b, a))

    def empirical_win_weights(self, pairs: LabelledPairs) -> np.ndarray:
        """Win weights of a finite sample: the share of pairs with each (prompt, winner, loser)."""
        w = np.zeros((self.n_prompts, self.n_responses, self.n_responses))
        np.add.at(w, (pairs.prompt, pairs.winner, pairs.loser), 1.0)
        return w / len(pairs)

    # ------------------------------------------------------------------ policies

    def policy_from_logratios(self, h: np.ndarray) -> np.ndarray:
        """pi(i|x) = pi_ref(i|x) e^{h_i} / Z_x, computed as a softmax of log pi_ref + h. (X, K)."""
        return scipy.special.softmax(np.log(self.reference) + h, axis=1)

    def kl_to_reference(self, policy: np.ndarray) -> float:
        """Prompt-weighted KL(pi || pi_ref)."""
        return kl_divergence(policy, self.reference, self.prompt_weights)

    def prepare(self, loss, *, feedback: str = "pairs", group_size: int = 2, **kwargs):
        """``task.prepare(loss, beta=..., smoothing=..., mode=..., n_pairs=..., seed=..., feedback=...,
        group_size=...)``: the trainer's view of this task. Labelled pairs trained by a margin loss or
        a pair objective: :mod:`toy_tasks.finite.session`; any other feedback kind, or a group
        objective: weighted groups (:mod:`toy_tasks.finite.group_session`)."""
        if feedback == "pairs" and group_size == 2 and not isinstance(loss, GroupObjective):
            return session.prepare(self, loss, **kwargs)
        return group_session.prepare(self, loss, feedback=feedback, group_size=group_size, **kwargs)

    def fit_reward(self, *, kind: str = "bradley_terry", **kwargs):
        """``polopt reward``: a Bradley–Terry reward table fitted to this task's pairs
        (see :mod:`toy_tasks.methods.reward_fit`), or with ``kind="preference"`` the table of pairwise
        win probabilities (:mod:`toy_tasks.methods.preference_fit`)."""
        table_keys = {k: v for k, v in kwargs.items() if k not in ("model", "steps", "lr")}  # no network to train
        if kind == "preference":
            return preference_fit.fit_task_preference(self, **table_keys)
        return reward_fit.fit_task_reward(self, **table_keys)

    # ------------------------------------------------------------------ files

    def to_dict(self) -> dict:
        """The task as the task-file contract of docs/guides/check-a-loss.md (several prompts under 'prompts')."""
        entries = []
        for x in range(self.n_prompts):
            entry: dict = {}
            if self.prompts:
                entry["prompt"] = self.prompts[x]
            if self.responses:
                entry["responses"] = list(self.responses)
            entry["reference"] = self.reference[x].tolist()
            entry["sampling"] = self.sampling[x].tolist()
            if self.rewards is not None:
                entry["rewards"] = self.rewards[x].tolist()
            else:
                entry["preference"] = self.preference[x].tolist()
            entry["lengths"] = [int(n) for n in self.lengths[x]]
            if self.desirability is not None:
                entry["desirability"] = self.desirability[x].tolist()
            entries.append(entry)
        if self.n_prompts == 1:
            out = entries[0]
            out.pop("prompt", None)
        else:
            for x, entry in enumerate(entries):
                entry["weight"] = float(self.prompt_weights[x])
            out = {"prompts": entries}
        if self.description:
            out = {"description": self.description, **out}
        return out

    def save(self, path: str | Path) -> Path:
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(self.to_dict(), indent=1) + "\n", encoding="utf-8")
        return path


# ---------------------------------------------------------------------- building


def bradley_terry_preference(rewards: np.ndarray) -> np.ndarray:
    """P[i, j] = sigmoid(r_i - r_j) for rewards of shape (..., K): Bradley and Terry, 1952."""
    rewards = np.asarray(rewards, dtype=np.float64)
    return scipy.special.expit(rewards[..., :, None] - rewards[..., None, :])


def make_task(reference, preference=None, *, rewards=None, sampling=None, prompt_weights=None,
              responses=None, prompts=None, lengths=None, desirability=None, name: str = "finite",
              description: str = "",
              where: str = "task") -> FiniteTask:
    """Build and validate a :class:`FiniteTask` from nested lists or arrays.

    ``reference`` is (K,) for one prompt or (X, K); ``preference`` (K, K) or
    (X, K, K); give ``rewards`` instead of ``preference`` for Bradley–Terry.
    ``sampling`` defaults to the reference; ``lengths`` (K,) or (X, K) tokens per
    response default to 1. Every problem raises a ValueError
    naming the field (prefixed by ``where``) and what to do.
    """
    ref = _as_array(reference, "reference", where)
    single = ref.ndim == 1
    if single:
        ref = ref[None]
    if ref.ndim != 2:
        raise ValueError(f"{where}: field 'reference' must be a list of K probabilities, "
                         f"got an array of shape {ref.shape}")
    n_prompts, k = ref.shape
    if k < 2:
        raise ValueError(f"{where}: field 'reference' needs at least 2 responses, got {k}")

    def per_prompt(value, field_name, ndim):
        arr = _as_array(value, field_name, where)
        if single and arr.ndim == ndim:
            arr = arr[None]
        expected = (n_prompts,) + (k,) * ndim
        if arr.shape != expected:
            shown = expected[1:] if single else expected
            raise ValueError(f"{where}: field '{field_name}' must have shape {shown} to match "
                             f"'reference', got {arr.shape[1:] if single else arr.shape}")
        return arr

    _check_distribution(ref, "reference", where, strictly_positive=True)
    mu = ref.copy() if sampling is None else per_prompt(sampling, "sampling", 1)
    _check_distribution(mu, "sampling", where, strictly_positive=False)
    if (mu > 0).sum(axis=1).min() < 2:
        raise ValueError(f"{where}: field 'sampling' must give weight to at least 2 responses per prompt")

    if (preference is None) == (rewards is None):
        raise ValueError(f"{where}: give exactly one of 'preference' (a K x K matrix) or 'rewards' "
                         "(K Bradley–Terry rewards)")
    r = None
    if rewards is not None:
        r = per_prompt(rewards, "rewards", 1)
        if not np.all(np.isfinite(r)):
            raise ValueError(f"{where}: field 'rewards' must be finite numbers")
        pref = bradley_terry_preference(r)
    else:
        pref = per_prompt(preference, "preference", 2)
        _check_preference(pref, where, single)

    if prompt_weights is None:
        weights = np.full(n_prompts, 1.0 / n_prompts)
    else:
        weights = _as_array(prompt_weights, "weight", where)
        if weights.shape != (n_prompts,) or np.any(weights < 0) or not weights.sum() > 0:
            raise ValueError(f"{where}: prompt weights must be {n_prompts} non-negative numbers, not all 0")
        weights = weights / weights.sum()

    if responses is not None and (not isinstance(responses, (list, tuple)) or len(responses) != k
                                  or not all(isinstance(r, str) for r in responses)):
        raise ValueError(f"{where}: field 'responses' must be a list of {k} labels (strings), one per "
                         f"entry of 'reference', got {str(responses)[:60]!r}")
    if prompts is not None and not all(isinstance(p, str) for p in prompts):
        raise ValueError(f"{where}: every field 'prompt' must be a string, got {str(prompts)[:60]!r}")
    labels = list(responses) if responses is not None else []
    if labels and len(labels) != k:
        raise ValueError(f"{where}: field 'responses' has {len(labels)} labels but 'reference' has {k} entries")
    prompt_labels = list(prompts) if prompts is not None else []
    n_tokens = np.ones_like(ref) if lengths is None else _check_lengths(lengths, (n_prompts, k), single, where)
    d = None if desirability is None else per_prompt(desirability, "desirability", 1)
    if d is not None and np.any((d < 0) | (d > 1)):
        raise ValueError(f"{where}: field 'desirability' must hold probabilities in [0, 1] (the chance each "
                         f"response is labelled desirable), got {str(desirability)[:60]!r}")
    return FiniteTask(ref, mu, pref, weights, r, labels, prompt_labels, name, description, n_tokens, d)


def _check_lengths(lengths, shape: tuple[int, int], single: bool, where: str) -> np.ndarray:
    """Response lengths as an (X, K) float64 array of positive integers, or a one-line ValueError."""
    shown = str(lengths)[:60]
    fix = "give one positive whole number of tokens per response, or leave 'lengths' out (1 each)"
    label = "lengths" if single else "prompts[x].lengths"
    if not _only_numbers(lengths) or not _integral(lengths):
        raise ValueError(f"{where}: field '{label}' must hold whole numbers of tokens, got {shown!r}; {fix}")
    if not single and isinstance(lengths, (list, tuple)) and len(lengths) == shape[0]:
        for x, row in enumerate(lengths):  # name the prompt whose list has the wrong size
            if isinstance(row, (list, tuple)) and len(row) != shape[1]:
                raise ValueError(f"{where}: field 'prompts[{x}].lengths' must have {shape[1]} entries, one per "
                                 f"response of 'reference', got {len(row)}: {str(row)[:60]!r}; {fix}")
    try:
        arr = np.asarray(lengths, dtype=np.float64)
    except (TypeError, ValueError, OverflowError) as err:
        raise ValueError(f"{where}: field '{label}' must be a regular list of whole numbers, got {shown!r}; "
                         f"{fix}") from err
    if single and arr.ndim == 1:
        arr = arr[None]
    if arr.shape != shape:
        want = shape[1] if single else f"{shape[0]} lists of {shape[1]}"
        got = arr.shape[-1] if single and arr.ndim == 2 else arr.shape
        raise ValueError(f"{where}: field '{label}' must have {want} entries, one per response of 'reference', "
                         f"got {got}: {shown!r}; {fix}")
    if not np.all(arr >= 1):
        x, i = np.argwhere(~(arr >= 1))[0]
        label = "lengths" if single else f"prompts[{x}].lengths"
        raise ValueError(f"{where}: field '{label}' entry {i} is {arr[x, i]:g}; every length must be a positive "
                         f"whole number of tokens (>= 1); {fix}")
    return arr


def _integral(value) -> bool:
    """Whether every number in (nested lists of) ``value`` is a whole number (3 or 3.0, not 2.5)."""
    stack = [value]
    while stack:
        item = stack.pop()
        if isinstance(item, (list, tuple, np.ndarray)):
            stack.extend(item)
        elif not float(item).is_integer():  # NaN and infinities are not whole numbers either
            return False
    return True


def _only_numbers(value) -> bool:
    """Whether ``value`` is a number or nested lists of numbers: JSON's strings and booleans are not
    numbers (numpy would turn "0.5" and true into floats without a word)."""
    stack = [value]
    while stack:
        item = stack.pop()
        if isinstance(item, (list, tuple)):
            stack.extend(item)
        elif isinstance(item, (bool, np.bool_)) or not isinstance(item, (int, float, np.number, np.ndarray)):
            return False
    return True


def _as_array(value, field_name: str, where: str) -> np.ndarray:
    shown = str(value)[:60]
    if not _only_numbers(value):
        raise ValueError(f"{where}: field '{field_name}' must hold numbers in a regular (rectangular) "
                         f"list, got {shown!r}")
    try:
        arr = np.asarray(value, dtype=np.float64)
    except OverflowError as err:
        raise ValueError(f"{where}: field '{field_name}' holds a number too large for a float, got {shown!r}") from err
    except (TypeError, ValueError) as err:
        raise ValueError(f"{where}: field '{field_name}' must hold numbers in a regular (rectangular) "
                         f"list, got {shown!r}") from err
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{where}: field '{field_name}' holds a non-finite number (NaN or infinity)")
    return arr


def _check_distribution(p: np.ndarray, field_name: str, where: str, *, strictly_positive: bool) -> None:
    for x, row in enumerate(p):
        label = field_name if p.shape[0] == 1 else f"prompts[{x}].{field_name}"
        bad = np.flatnonzero(row <= 0) if strictly_positive else np.flatnonzero(row < 0)
        if bad.size:
            need = "> 0" if strictly_positive else ">= 0"
            raise ValueError(f"{where}: field '{label}' entry {bad[0]} is {row[bad[0]]:g}; every entry must be {need}")
        total = row.sum()
        if abs(total - 1.0) > PROBABILITY_TOLERANCE:
            raise ValueError(f"{where}: field '{label}' sums to {total:.9g}, not 1; divide each entry by the sum")


def _check_preference(pref: np.ndarray, where: str, single: bool) -> None:
    for x, matrix in enumerate(pref):
        label = "preference" if single else f"prompts[{x}].preference"
        outside = np.argwhere((matrix < 0) | (matrix > 1))
        if outside.size:
            i, j = outside[0]
            raise ValueError(f"{where}: field '{label}[{i}][{j}]' is {matrix[i, j]:g}; "
                             "a probability must lie in [0, 1]")
        off = np.abs(matrix + matrix.T - 1.0)
        if off.max() > PROBABILITY_TOLERANCE:
            i, j = np.unravel_index(int(off.argmax()), off.shape)
            raise ValueError(f"{where}: field '{label}': P[{i}][{j}] + P[{j}][{i}] = "
                             f"{matrix[i, j] + matrix[j, i]:.9g}, must be 1 (and P[i][i] = 0.5)")


def load_task(path: str | Path) -> FiniteTask:
    """Read and validate a task file (the contract of docs/guides/check-a-loss.md)."""
    path = Path(path)
    where = f"task file {path}"
    if not path.is_file():
        raise ValueError(f"{where}: no such file; give task.path=PATH to an existing JSON task file")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError as err:
        raise ValueError(f"{where}: not valid UTF-8 text ({err.reason} at byte {err.start})") from err
    except json.JSONDecodeError as err:
        raise ValueError(f"{where}: not valid JSON: {err.msg} at line {err.lineno}, column {err.colno}") from err
    except RecursionError as err:  # json's decoder recurses once per nesting level
        raise ValueError(f"{where}: nested too deeply to be a task file") from err
    if not isinstance(data, dict):
        raise ValueError(f"{where}: the top level must be a JSON object with 'reference' and "
                         "'preference' (or 'rewards'), or with 'prompts'")
    return task_from_dict(data, where=where, name=path.stem)


_ENTRY_FIELDS = {"prompt", "responses", "reference", "sampling", "preference", "rewards", "weight", "lengths",
                 "desirability"}


def task_from_dict(data: dict, *, where: str = "task", name: str = "file") -> FiniteTask:
    """Build a task from the JSON contract's dictionary form."""
    description = data.get("description", "")
    if not isinstance(description, str):
        raise ValueError(f"{where}: field 'description' must be a string, got {str(description)[:60]!r}")
    if "prompts" in data:
        entries = data["prompts"]
        if not isinstance(entries, list) or not entries or not all(isinstance(e, dict) for e in entries):
            raise ValueError(f"{where}: field 'prompts' must be a non-empty list of objects")
    else:
        entries = [data]
    for x, entry in enumerate(entries):
        unknown = set(entry) - _ENTRY_FIELDS - ({"description"} if entry is data else set())
        if unknown:
            label = "" if entry is data else f"prompts[{x}]: "
            raise ValueError(f"{where}: {label}unknown field(s) {sorted(unknown)}; allowed: {sorted(_ENTRY_FIELDS)}")
        if "reference" not in entry:
            label = "" if entry is data else f"prompts[{x}]."
            raise ValueError(f"{where}: missing field '{label}reference' (the K reference probabilities)")
    has_pref = ["preference" in e for e in entries]
    has_rewards = ["rewards" in e for e in entries]
    if not all(p != r for p, r in zip(has_pref, has_rewards, strict=True)) or len(set(has_rewards)) > 1:
        raise ValueError(f"{where}: every prompt needs exactly one of 'preference' or 'rewards', "
                         "the same kind throughout")
    lengths = {len(e["reference"]) if isinstance(e["reference"], list) else -1 for e in entries}
    if len(lengths) > 1:
        raise ValueError(f"{where}: every prompt must have the same number of responses, got {sorted(lengths)}")
    stack = (lambda key: [e[key] for e in entries]) if len(entries) > 1 else (lambda key: entries[0][key])
    sampling = None
    if any("sampling" in e for e in entries):
        sampling = [e.get("sampling", e["reference"]) for e in entries] if len(entries) > 1 else entries[0]["sampling"]
    tokens = None
    if any("lengths" in e for e in entries):
        tokens = [e.get("lengths", [1] * len(e["reference"])) for e in entries] if len(entries) > 1 \
            else entries[0]["lengths"]
    given = ["desirability" in e for e in entries]
    if any(given) and not all(given):
        raise ValueError(f"{where}: give 'desirability' for every prompt or for none")
    responses = entries[0].get("responses")
    weights = [e.get("weight", 1.0) for e in entries] if len(entries) > 1 else None
    prompts = [e.get("prompt", f"prompt {x}") for x, e in enumerate(entries)] if len(entries) > 1 else None
    return make_task(
        stack("reference"),
        stack("preference") if has_pref[0] else None,
        rewards=stack("rewards") if has_rewards[0] else None,
        sampling=sampling, prompt_weights=weights, responses=responses, prompts=prompts, lengths=tokens,
        desirability=stack("desirability") if all(given) else None, name=name, description=description, where=where,
    )
