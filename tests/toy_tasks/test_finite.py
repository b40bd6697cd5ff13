"""Finite tasks: validation with field-naming errors, file round trip, win weights, sampling."""

import json

import numpy as np
import pytest
import scipy.stats

from toy_tasks import families
from toy_tasks.finite.task import bradley_terry_preference, load_task, make_task, task_from_dict

REF = [0.5, 0.3, 0.2]
CYCLE = [[0.5, 0.7, 0.2], [0.3, 0.5, 0.6], [0.8, 0.4, 0.5]]


def test_bradley_terry_preference_is_a_sigmoid_of_reward_differences():
    # Bradley and Terry 1952: P(i > j) = e^{r_i} / (e^{r_i} + e^{r_j})
    r = np.array([0.0, 1.0, -2.0])
    p = bradley_terry_preference(r)
    assert p[1, 0] == pytest.approx(np.e / (np.e + 1.0))
    np.testing.assert_allclose(p + p.T, 1.0)


@pytest.mark.parametrize("kwargs,message", [
    (dict(reference=[0.5, -0.1, 0.6], preference=CYCLE), r"field 'reference' entry 1 is -0.1; every entry must be > 0"),
    (dict(reference=[0.5, 0.3, 0.3], preference=CYCLE), r"field 'reference' sums to 1.1, not 1; divide each entry"),
    (dict(reference=REF, preference=[[0.5, 0.7], [0.3, 0.5]]), r"field 'preference' must have shape \(3, 3\)"),
    (dict(reference=REF, preference=[[0.5, 0.7, 0.2], [0.4, 0.5, 0.6], [0.8, 0.4, 0.5]]),
     r"P\[0\]\[1\] \+ P\[1\]\[0\] = 1.1, must be 1"),
    (dict(reference=REF, preference=[[0.5, 1.2, 0.2], [-0.2, 0.5, 0.6], [0.8, 0.4, 0.5]]),
     r"field 'preference\[0\]\[1\]' is 1.2; a probability must lie in \[0, 1\]"),
    (dict(reference=REF, preference=CYCLE, sampling=[1.0, 0.0, 0.0]), r"'sampling' must give weight to at least 2"),
    (dict(reference=REF, preference=CYCLE, rewards=[1, 2, 3]), r"give exactly one of 'preference'"),
    (dict(reference=REF, rewards=[1.0, float("nan"), 0.0]), r"field 'rewards' holds a non-finite number"),
    (dict(reference=[1.0], rewards=[1.0]), r"needs at least 2 responses"),
    (dict(reference=REF, preference=CYCLE, responses=["a", "b"]),
     r"field 'responses' must be a list of 3 labels \(strings\), one per entry of 'reference'"),
])
def test_validation_names_the_field_and_the_fix(kwargs, message):
    with pytest.raises(ValueError, match=message):
        make_task(kwargs.pop("reference"), kwargs.pop("preference", None), **kwargs)


def test_task_file_round_trip(tmp_path):
    task = families.contextual(n_prompts=2, n_responses=4, seed=3)
    again = load_task(task.save(tmp_path / "t.json"))
    np.testing.assert_allclose(again.reference, task.reference)
    np.testing.assert_allclose(again.preference, task.preference)
    np.testing.assert_allclose(again.win_weights(), task.win_weights())
    assert again.prompts == task.prompts and again.responses == task.responses


@pytest.mark.parametrize("content,message", [
    ("{not json", r"not valid JSON: Expecting property name enclosed in double quotes at line 1, column 2"),
    ("[1, 2]", r"the top level must be a JSON object"),
    ('{"preference": [[0.5]]}', r"missing field 'reference'"),
    ('{"reference": [0.5, 0.5], "rewards": [0, 1], "_target_": "os.system"}', r"unknown field\(s\) \['_target_'\]"),
])
def test_bad_task_files(tmp_path, content, message):
    path = tmp_path / "bad.json"
    path.write_text(content)
    with pytest.raises(ValueError, match=message):
        load_task(path)


def test_missing_task_file_says_what_to_give(tmp_path):
    with pytest.raises(ValueError, match=r"no such file; give task.path=PATH"):
        load_task(tmp_path / "absent.json")


def test_contextual_file_errors_name_the_prompt():
    data = {"prompts": [{"reference": REF, "preference": CYCLE},
                        {"reference": [0.2, 0.2, 0.5], "preference": CYCLE}]}
    with pytest.raises(ValueError, match=r"field 'prompts\[1\].reference' sums to 0.9"):
        task_from_dict(data)


def test_win_weights_are_a_distribution_over_ordered_pairs():
    task = families.nontransitive()
    w = task.win_weights()
    assert w.sum() == pytest.approx(1.0)
    assert np.all(np.diagonal(w, axis1=1, axis2=2) == 0)
    # a pair {i, j} is drawn with probability 2 mu_i mu_j / (1 - sum mu^2); i wins it with probability P[i, j]
    mu, p = task.sampling[0], task.preference[0]
    z = 1.0 - (mu**2).sum()
    assert w[0, 0, 1] == pytest.approx(2 * mu[0] * mu[1] * p[0, 1] / z)


def test_sampled_pairs_follow_the_win_weights():
    task = families.bradley_terry(n_responses=4, seed=1)
    pairs = task.sample_pairs(40000, seed=0)
    counts = task.empirical_win_weights(pairs).ravel() * len(pairs)
    expected = task.win_weights().ravel() * len(pairs)
    keep = expected > 0
    assert counts[~keep].sum() == 0  # never a pair with the same response twice
    # Pearson's chi-square goodness of fit (scipy.stats); the seed is fixed, so this is deterministic
    assert scipy.stats.chisquare(counts[keep], expected[keep]).pvalue > 1e-3


def test_sampling_is_reproducible():
    task = families.noisy_labels()
    a, b = task.sample_pairs(100, seed=5), task.sample_pairs(100, seed=5)
    assert np.array_equal(a.winner, b.winner) and np.array_equal(a.loser, b.loser)


def test_policy_from_logratios_is_pi_ref_times_exp_h():
    task = families.bradley_terry(n_responses=3)
    h = np.array([[0.3, -1.0, 2.0]])
    expected = task.reference * np.exp(h)
    np.testing.assert_allclose(task.policy_from_logratios(h), expected / expected.sum())


def test_kl_to_reference_matches_scipy_entropy():
    task = families.bradley_terry(n_responses=5)
    pi = task.policy_from_logratios(np.arange(5.0)[None])
    assert task.kl_to_reference(pi) == pytest.approx(scipy.stats.entropy(pi[0], task.reference[0]))


def test_nontransitive_family_is_a_condorcet_cycle():
    p = families.nontransitive().preference[0]
    np.testing.assert_allclose([p[0, 1], p[1, 2], p[2, 0]], [2 / 3, 2 / 3, 2 / 3])


def test_json_contract_keys(tmp_path):
    data = json.loads(families.bradley_terry().save(tmp_path / "bt.json").read_text())
    assert {"responses", "reference", "sampling", "rewards"} <= set(data)
