"""Feedback kinds on finite tasks (toy_tasks/finite/feedback.py): the populations of weighted groups
against their definitions (docs/guides/feedback-beyond-pairs.md), written here again with plain
loops; the Plackett–Luce probabilities against a hand computation (Plackett 1975, Luce 1959); the
task file's desirability; the one-line refusals.
"""

import itertools
import json
import math

import numpy as np
import pytest

from toy_tasks.finite.feedback import population_groups, sample_groups
from toy_tasks.finite.task import load_task, make_task


def small_task(rewards=(0.3, -0.5, 1.1), desirability=None):
    return make_task([0.5, 0.3, 0.2], rewards=list(rewards), sampling=[0.2, 0.5, 0.3], desirability=desirability)


def as_dict(groups):
    """{(x, members, feedback): weight} of a WeightedGroups."""
    (field, values), = groups.feedback().items()
    return {(int(x), tuple(int(m) for m in ms), tuple(float(v) for v in vs)): float(w)
            for x, ms, vs, w in zip(groups.prompt, groups.members, values, groups.weight, strict=True)}


def test_pairs_are_the_win_weights():
    task = small_task()
    groups = population_groups(task, "pairs", 2)
    w = task.win_weights()
    assert as_dict(groups) == pytest.approx({(0, (i, j), (0.0, 1.0)): w[0, i, j]
                                             for i, j in itertools.permutations(range(3), 2)})


def test_unpaired_groups_follow_the_definition():
    # y ~ mu, desirable with probability d(y) = sum_j mu_j P[y, j] (the module's definition), independently
    task = small_task()
    mu, p = task.sampling[0], task.preference[0]
    d = [sum(mu[j] * p[y, j] for j in range(3)) for y in range(3)]
    want = {}
    for ys in itertools.product(range(3), repeat=2):
        for labels in itertools.product((0.0, 1.0), repeat=2):
            prob = math.prod(mu[y] * (d[y] if lab else 1 - d[y]) for y, lab in zip(ys, labels, strict=True))
            want[(0, ys, labels)] = prob
    assert as_dict(population_groups(task, "unpaired", 2)) == pytest.approx(want, abs=1e-15)
    single = as_dict(population_groups(task, "unpaired", 1))
    assert single[(0, (2,), (1.0,))] == pytest.approx(mu[2] * d[2], abs=1e-15)


def test_a_task_files_desirability_is_used_and_checked(tmp_path):
    path = tmp_path / "task.json"
    path.write_text(json.dumps({"reference": [0.5, 0.5], "rewards": [0.0, 1.0], "desirability": [0.2, 0.9]}))
    task = load_task(path)
    single = as_dict(population_groups(task, "unpaired", 1))
    assert single[(0, (1,), (1.0,))] == pytest.approx(0.5 * 0.9)
    assert single[(0, (0,), (0.0,))] == pytest.approx(0.5 * 0.8)
    assert load_task(task.save(tmp_path / "again.json")).desirability.tolist() == [[0.2, 0.9]]
    path.write_text(json.dumps({"reference": [0.5, 0.5], "rewards": [0.0, 1.0], "desirability": [0.2, 1.5]}))
    with pytest.raises(ValueError, match=r"field 'desirability' must hold probabilities in \[0, 1\]"):
        load_task(path)


def test_rankings_carry_plackett_luce_probabilities():
    task = small_task()
    groups = as_dict(population_groups(task, "ranking", 3))
    mu = task.sampling[0]
    # by hand: members (0, 1, 2), ranking 2 > 0 > 1 (ranks: member 0 second, 1 third, 2 first):
    # e^1.1 / (e^0.3 + e^-0.5 + e^1.1) * e^0.3 / (e^0.3 + e^-0.5)
    pl = math.exp(1.1) / (math.exp(0.3) + math.exp(-0.5) + math.exp(1.1)) * math.exp(0.3) / (math.exp(0.3)
                                                                                            + math.exp(-0.5))
    assert groups[(0, (0, 1, 2), (1.0, 2.0, 0.0))] == pytest.approx(mu[0] * mu[1] * mu[2] * pl, abs=1e-15)
    for ys in itertools.product(range(3), repeat=3):  # the rankings of one draw share its probability
        total = sum(w for (x, m, _), w in groups.items() if m == ys)
        assert total == pytest.approx(math.prod(mu[y] for y in ys), abs=1e-15)
    assert sum(groups.values()) == pytest.approx(1.0, abs=1e-14)


def test_scored_groups_carry_the_rewards():
    task = small_task()
    groups = as_dict(population_groups(task, "scored", 2))
    mu = task.sampling[0]
    assert groups[(0, (2, 0), (1.1, 0.3))] == pytest.approx(mu[2] * mu[0], abs=1e-15)
    assert len(groups) == 9


def test_sampled_groups_are_weighted_by_their_share_of_the_draws():
    population = population_groups(small_task(), "scored", 2)
    sample = sample_groups(population, 500, seed=3)
    assert sample.weight.sum() == pytest.approx(1.0) and np.all(np.isclose(sample.weight * 500,
                                                                            np.round(sample.weight * 500)))


def test_one_line_refusals():
    preference_only = make_task([0.5, 0.5], [[0.5, 0.7], [0.3, 0.5]])
    with pytest.raises(ValueError, match=r"task.feedback=ranking needs a task with rewards .* gives a preference "
                                         r"matrix only"):
        population_groups(preference_only, "ranking", 2)
    with pytest.raises(ValueError, match=r"task.feedback=scored needs a task with rewards"):
        population_groups(preference_only, "scored", 2)
    with pytest.raises(ValueError, match=r"task.feedback must be one of pairs, unpaired, ranking, scored, got 'lists'"):
        population_groups(small_task(), "lists", 2)
    with pytest.raises(ValueError, match=r"task.feedback=pairs has groups of 2 .* got task.group_size=3"):
        population_groups(small_task(), "pairs", 3)
    with pytest.raises(ValueError, match=r"task.feedback=ranking compares responses: task.group_size must be at "
                                         r"least 2, got 1"):
        population_groups(small_task(), "ranking", 1)
    big = make_task(np.full(8, 1 / 8), rewards=np.arange(8.0))  # 8^6 tuples x 6! rankings = 188743680 groups
    with pytest.raises(ValueError, match=r"enumerates 188743680 groups on this task \(8 responses\), more than 200000"):
        population_groups(big, "ranking", 6)
