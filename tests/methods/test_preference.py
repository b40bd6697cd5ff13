"""Preference models (toy_tasks.methods.preference_fit, polopt.methods.preference_model) and self-play on a
learned preference.

Checks against: the maximum-likelihood estimate of a binomial proportion, k / n (any statistics
textbook; checked here by scipy's bounded scalar minimiser of the binomial log-likelihood); the
penalised logit fit by scipy.optimize.minimize (L-BFGS-B) with the gradient by torch autograd; the
consistency of the estimate (on the population win weights it returns the task's P); an independent
Bradley–Terry maximum-likelihood solve (Bradley & Terry 1952) by scipy BFGS; the impossibility of a
cycle under any reward (Condorcet 1785: a real-valued score orders the responses); the Nash equilibrium
of the regularised preference game (Munos et al., Nash Learning from Human Feedback, 2023) solved here
independently by minimising its duality gap with scipy BFGS, and its closed form for a symmetric cycle
with a uniform reference (the uniform policy, docs/maths.md).
"""

import json
import re

import numpy as np
import pytest
import scipy.optimize
import scipy.special
import torch
from helpers_cli import assert_one_line_errors

from polopt.methods.preference_model import AntisymmetricHead, PairwisePreferenceModel, load_preference_model
from polopt.methods.reward_model import save_reward_model, split_heldout
from toy_tasks.families import bradley_terry, nontransitive
from toy_tasks.methods.preference_fit import fit_task_preference, learned_preference, preference_table
from toy_tasks.methods.reward_fit import fit_task_reward, pair_counts, task_identity


def binomial_mle(won: float, lost: float) -> float:
    """argmax_p won log p + lost log(1 - p) by scipy's bounded scalar minimiser (the textbook answer: won / n)."""
    result = scipy.optimize.minimize_scalar(lambda p: -(won * np.log(p) + lost * np.log1p(-p)),
                                            bounds=(1e-12, 1 - 1e-12), method="bounded", options={"xatol": 1e-12})
    return result.x


def penalised_logits(counts: np.ndarray, l2: float) -> np.ndarray:
    """argmax sum_{i != j} C_ij log sigmoid(f_ij) - l2/2 sum_{i < j} f_ij^2 over antisymmetric f (one
    parameter per unordered pair), by L-BFGS-B with torch autograd; returns P = sigmoid(f), (K, K)."""
    k = len(counts)
    upper = np.triu_indices(k, 1)
    c = torch.as_tensor(counts, dtype=torch.float64)

    def fun(theta):
        t = torch.as_tensor(theta, dtype=torch.float64).requires_grad_(True)
        f = torch.zeros(k, k, dtype=torch.float64).index_put((torch.as_tensor(upper[0]), torch.as_tensor(upper[1])), t)
        f = f - f.T
        value = -(c * torch.nn.functional.logsigmoid(f)).sum() + 0.5 * l2 * (t**2).sum()
        value.backward()
        return float(value.detach()), t.grad.numpy().copy()

    result = scipy.optimize.minimize(fun, np.zeros(len(upper[0])), jac=True, method="L-BFGS-B",
                                     options={"gtol": 1e-12, "ftol": 1e-15, "maxiter": 10000})
    f = np.zeros((k, k))
    f[upper] = result.x
    return scipy.special.expit(f - f.T)


def bradley_terry_mle(counts: np.ndarray) -> np.ndarray:
    """argmax sum C_ij log sigmoid(r_i - r_j) with r_0 = 0 (Bradley & Terry 1952), by scipy BFGS."""
    def fun(theta):
        r = np.concatenate([[0.0], theta])
        return float((counts * np.logaddexp(0.0, -(r[:, None] - r[None, :]))).sum())

    result = scipy.optimize.minimize(fun, np.zeros(len(counts) - 1), method="BFGS", options={"gtol": 1e-10})
    return np.concatenate([[0.0], result.x])


def nash_by_gap_minimisation(reference: np.ndarray, preference: np.ndarray, tau: float) -> np.ndarray:
    """The regularised game's equilibrium (Munos et al. 2023) as the zero of its duality gap
    2 tau KL(pi || BR(pi)), BR(pi) ∝ pi_ref exp(P pi / tau), minimised over pi = softmax(z) by scipy BFGS
    with the gradient by torch autograd; the gap at the result is returned beside it."""
    log_ref = torch.as_tensor(np.log(reference))
    p = torch.as_tensor(preference)

    def fun(z):
        t = torch.as_tensor(z).requires_grad_(True)
        log_pi = torch.log_softmax(t, 0)
        log_br = torch.log_softmax(log_ref + p @ log_pi.exp() / tau, 0)
        gap = 2 * tau * (log_pi.exp() * (log_pi - log_br)).sum()
        gap.backward()
        return float(gap.detach()), t.grad.numpy().copy()

    result = scipy.optimize.minimize(fun, np.log(reference), jac=True, method="BFGS",
                                     options={"gtol": 1e-14, "maxiter": 10000})
    return scipy.special.softmax(result.x), result.fun


# ------------------------------------------------------------------ the finite table


@pytest.mark.parametrize("seed", range(3))
def test_the_table_is_the_binomial_maximum_likelihood_estimate_per_pair(seed):
    task = bradley_terry(n_responses=5, seed=seed)
    counts = pair_counts(task, task.sample_pairs(300, seed))
    table = preference_table(counts)[0]
    for i in range(5):
        for j in range(5):
            if i != j and counts[0, i, j] + counts[0, j, i] > 0:
                # the bounded minimiser stops within ~1e-8 of a boundary estimate (p = 1 for a one-sided pair)
                assert table[i, j] == pytest.approx(binomial_mle(counts[0, i, j], counts[0, j, i]), abs=1e-7)
    np.testing.assert_allclose(table + table.T, 1.0, atol=1e-15)  # antisymmetric: P_ij + P_ji = 1
    assert np.all(np.diag(table) == 0.5)


@pytest.mark.parametrize("l2", [0.05, 1.0])
def test_the_penalised_table_equals_an_independent_logit_fit(l2):
    task = bradley_terry(n_responses=5, seed=1)
    counts = pair_counts(task, task.sample_pairs(40, 1))  # few pairs: some one-sided, some never compared
    np.testing.assert_allclose(preference_table(counts, l2=l2)[0], penalised_logits(counts[0], l2), atol=1e-7)


def test_on_the_population_weights_the_table_is_the_task_preference_and_unseen_pairs_get_one_half():
    task = nontransitive(n_responses=4, seed=2)
    np.testing.assert_allclose(preference_table(task.win_weights()), task.preference, atol=1e-15)
    counts = np.zeros((1, 3, 3))
    counts[0, 0, 1], counts[0, 1, 0] = 3.0, 1.0  # only the pair {0, 1} was compared
    table = preference_table(counts)[0]
    assert table[0, 1] == 0.75 and table[1, 0] == 0.25
    assert table[0, 2] == table[2, 0] == table[1, 2] == table[2, 1] == 0.5
    fitted = fit_task_preference(bradley_terry(n_responses=6, seed=0), mode="sampled", n_pairs=12, seed=0, l2=0.1)
    assert fitted["summary"]["unseen_pairs"] > 0 and "never compared get P = 1/2" in fitted["screen"]


def test_on_a_symmetric_cycle_no_reward_beats_a_coin_and_the_preference_reaches_two_thirds():
    """Uniform reference, three panels: P(0 > 1) = P(1 > 2) = P(2 > 0) = 2/3. By the task's rotation symmetry
    and the uniqueness of the Bradley–Terry estimate its rewards are equal, so every pair is a tie: accuracy
    1/2. The table predicts every pair's majority: accuracy 2/3, the task's own (the Bayes rule)."""
    summary = fit_task_preference(nontransitive(uniform_reference=True), mode="exact", n_pairs=0, seed=0)["summary"]
    np.testing.assert_allclose(summary["bradley_terry_rewards"], 0.0, atol=1e-9)
    assert summary["bradley_terry_heldout_accuracy"] == pytest.approx(0.5, abs=1e-9)
    assert summary["heldout_accuracy"] == pytest.approx(2 / 3, abs=1e-12)
    assert summary["accuracy_gap"] == pytest.approx(1 / 6, abs=1e-9)


def test_sampled_nontransitive_the_bradley_terry_fit_beside_is_an_independent_one_on_the_same_split():
    """docs/guides/reward-models.md quotes these figures (3000 pairs, seed 0): preference 0.6850,
    Bradley–Terry 0.5017 on the same 600 held-out pairs."""
    task = nontransitive()
    fitted = fit_task_preference(task, mode="sampled", n_pairs=3000, seed=0)
    summary = fitted["summary"]
    pairs = task.sample_pairs(3000, 0)
    fit, held = split_heldout(3000, 0.2, 0)
    counts, held_counts = pair_counts(task, pairs, fit), pair_counts(task, pairs, held)
    np.testing.assert_array_equal(summary["pair_counts"], counts)  # the same split as reward.kind=bradley_terry
    np.testing.assert_array_equal(fit_task_reward(task, mode="sampled", n_pairs=3000, seed=0)["summary"]["pair_counts"],
                                  counts)
    r = bradley_terry_mle(counts[0])
    x, w, lo = np.nonzero(held_counts)
    margin = r[w] - r[lo]
    expected = np.average(np.where(margin > 0, 1.0, np.where(margin < 0, 0.0, 0.5)), weights=held_counts[x, w, lo])
    assert summary["bradley_terry_heldout_accuracy"] == pytest.approx(expected, abs=1e-12)
    assert summary["heldout_accuracy"] == pytest.approx(summary["true_preference_heldout_accuracy"], abs=1e-12)
    assert summary["heldout_accuracy"] == pytest.approx(0.685, abs=1e-9)
    assert summary["bradley_terry_heldout_accuracy"] == pytest.approx(0.50167, abs=1e-5)


# ------------------------------------------------------------------ the pair heads


def test_the_pair_heads_are_antisymmetric_exactly():
    torch.manual_seed(0)
    head = AntisymmetricHead(8, seed=3)
    a, b = torch.randn(50, 8), torch.randn(50, 8)
    assert torch.equal(head(a, b), -head(b, a))
    assert torch.equal(head(a, a), torch.zeros(50))
    model = PairwisePreferenceModel(7, pad_id=6, context=12, width=16, layers=1, heads=2, seed=1)
    prompt = torch.randint(0, 6, (20, 4))
    first, second = torch.randint(0, 6, (20, 5)), torch.randint(0, 6, (20, 5))
    second[:, 3:] = 6  # right padding of different lengths
    with torch.no_grad():
        forward, backward = model(prompt, first, second), model(prompt, second, first)
    assert torch.equal(forward, -backward) and forward.abs().min() > 0
    p = torch.sigmoid(forward.double()) + torch.sigmoid(backward.double())
    torch.testing.assert_close(p, torch.ones(20, dtype=torch.float64), atol=1e-15, rtol=0)


def test_a_pair_file_with_a_cycle_of_styles_defeats_every_reward(tmp_path):
    """An invented help-desk file whose replies come in three styles, each beating the next in a cycle
    (brief > step-by-step > friendly > brief), deterministically. Any reward r orders three independent
    replies a, b, c, so at most two of [r(a) > r(b)], [r(b) > r(c)], [r(c) > r(a)] hold: with the three style
    pairs equally frequent, no reward exceeds accuracy 2/3 in expectation (Condorcet 1785); the antisymmetric
    head can reach 1. Measured: preference 1.0, Bradley–Terry 0.57 on 30 held-out rows."""
    from polopt.pairfile.task import pair_task

    rng = np.random.default_rng(0)
    styles = [["Yes.", "Sure.", "OK.", "Done."], ["Steps: one, two.", "First this, then that.", "Do A, then B.",
                                                   "Two steps."], ["Glad to help!", "Happy to help!", "With pleasure!",
                                                                   "Any time!"]]
    with (tmp_path / "cycle.jsonl").open("w") as f:
        for i in range(150):
            s = i % 3  # style s beats style s + 1
            f.write(json.dumps({"prompt": f"Q{i:03d}", "winner": styles[s][rng.integers(4)],
                                "loser": styles[(s + 1) % 3][rng.integers(4)]}) + "\n")
    task = pair_task(path=str(tmp_path / "cycle.jsonl"))
    model = {"kind": "transformer", "width": 16, "layers": 1, "heads": 2, "context": 16, "seed": 0}
    fitted = task.fit_reward(kind="preference", mode="sampled", n_pairs=None, seed=0, model=model, steps=60, lr=1e-2)
    summary = fitted["summary"]
    assert summary["heldout_pairs"] == 30 and summary["kind"] == "preference_transformer"
    assert summary["heldout_accuracy"] >= 0.95
    assert summary["bradley_terry_heldout_accuracy"] <= 2 / 3 + 0.15  # the bound, plus sampling noise of 30 rows
    assert summary["accuracy_gap"] == summary["heldout_accuracy"] - summary["bradley_terry_heldout_accuracy"]
    f = fitted["file"]
    path = save_reward_model(tmp_path / "preference.pt", f["kind"], f["identity"], f["state"])
    assert load_preference_model(path, {"task": "pairs", "width": 16})["kind"] == "preference_transformer"


# ------------------------------------------------------------------ self-play on the learned preference


def _fitted(tmp_path, task, **keys):
    fitted = fit_task_preference(task, **{"mode": "sampled", "n_pairs": 3000, "seed": 0, **keys})
    f = fitted["file"]
    return save_reward_model(tmp_path / "preference.pt", f["kind"], f["identity"], f["state"]), fitted


@pytest.mark.parametrize("beta", [0.1, 0.5])
def test_selfplay_on_a_learned_preference_reaches_its_nash_equilibrium(tmp_path, beta):
    from polopt.commands.main import main

    path, fitted = _fitted(tmp_path, nontransitive())
    learned = np.asarray(fitted["summary"]["preference"])[0]
    run = tmp_path / "run"
    assert main(["train", "task=nontransitive", "method=selfplay", f"method.preference={path}", f"beta={beta}",
                 "train.steps=1000", "train.progress=false", f"hydra.run.dir={run}"]) == 0
    summary = json.loads((run / "summary.json").read_text())
    mine, gap = nash_by_gap_minimisation(np.asarray(summary["reference"][0]), learned, beta / 2)
    assert gap < 1e-12
    np.testing.assert_allclose(summary["optimum"][0], mine, atol=1e-6)
    assert summary["tv_to_optimum"] < 1e-3 and summary["reached_optimum"] is True
    assert summary["optimum_kind"] == "Nash equilibrium of the learned P"
    true_eq = np.asarray(summary["equilibrium"][0])  # the true game's, for comparison
    assert summary["tv_optimum_to_true_equilibrium"] == pytest.approx(0.5 * np.abs(mine - true_eq).sum(), abs=1e-6)
    np.testing.assert_allclose(learned_preference(nontransitive(), path), learned[None], atol=0)


def test_on_the_population_of_a_symmetric_cycle_the_learned_game_is_the_true_one_and_its_equilibrium_uniform(
        tmp_path):
    from polopt.commands.main import main

    task = nontransitive(uniform_reference=True)
    path, _ = _fitted(tmp_path, task, mode="exact")
    run = tmp_path / "run"
    assert main(["train", "task=nontransitive", "task.uniform_reference=true", "method=selfplay",
                 f"method.preference={path}", "train.steps=500", "train.progress=false", f"hydra.run.dir={run}"]) == 0
    summary = json.loads((run / "summary.json").read_text())
    np.testing.assert_allclose(summary["optimum"][0], [1 / 3] * 3, atol=1e-12)
    np.testing.assert_allclose(summary["policy"][0], [1 / 3] * 3, atol=1e-6)


def test_bad_preference_input_is_one_line_and_exit_2(tmp_path, capsys):

    preference, _ = _fitted(tmp_path, nontransitive())
    fitted = fit_task_reward(nontransitive(), mode="sampled", n_pairs=3000, seed=0)["file"]
    reward = save_reward_model(tmp_path / "reward.pt", fitted["kind"], fitted["identity"], fitted["state"])
    (tmp_path / "junk.pt").write_bytes(b"not a preference")
    cases = [
        (("train", "method=selfplay", "task=nontransitive", f"method.preference={tmp_path / 'junk.pt'}"),
         r"method.preference: .*junk.pt is not a readable preference model"),
        (("train", "method=selfplay", "task=nontransitive", f"method.preference={reward}"),
         r"method.preference: .*reward.pt holds a Bradley–Terry reward model \(kind 'table'\), not a preference"),
        (("train", "method=selfplay", "task=nontransitive", "task.n_responses=4", f"method.preference={preference}"),
         r"method.preference: .* was fitted for responses 3, but this run has 4"),
        (("train", "method=selfplay", "task=bradley_terry", f"method.preference={preference}"),
         r"was fitted for task 'nontransitive', but this run has 'bradley_terry'"),
        (("train", "method=rl", "task=nontransitive", f"method.reward={preference}"),
         r"method.reward: .* holds a preference model \(kind 'preference_table'\), not a reward"),
        (("train", "method=selfplay", f"method.preference={tmp_path / 'none.pt'}"),
         r"preference model file .*none.pt' does not exist"),
        (("train", "method=rl", "method.preference=x.pt"),
         r"method=rl has no key 'preference'.*preference belongs to method=selfplay"),
        (("reward", "reward.kind=cyclic", f"hydra.run.dir={tmp_path / 'x'}"),
         r"polopt reward: error: reward.kind must be one of bradley_terry, preference, got 'cyclic'"),
    ]
    assert_one_line_errors(cases, tmp_path / "run", capsys)
    assert load_preference_model(preference, task_identity(nontransitive()))["kind"] == "preference_table"
    from toy_tasks.sequence.task import sequence_task

    with pytest.raises(ValueError, match=r"task=sequence fits a pair head on the tiny transformer; model=tabular"):
        sequence_task().fit_reward(kind="preference", mode="sampled", n_pairs=10, seed=0, model={"kind": "tabular"})


def test_the_command_writes_the_preference_file_and_both_accuracies(tmp_path, capsys):
    from polopt.commands.main import main

    out = tmp_path / "pm"
    assert main(["reward", "task=nontransitive", "task.mode=sampled", "task.n_pairs=3000", "reward.kind=preference",
                 f"hydra.run.dir={out}"]) == 0
    printed = capsys.readouterr().out
    assert re.search(r"heldout_accuracy 0.6850 \(preference\)  0.5017 \(Bradley–Terry, the same split\)", printed)
    assert "give it to method=selfplay method.preference=PATH" in printed
    summary = json.loads((out / "summary.json").read_text())
    direct = fit_task_preference(nontransitive(), mode="sampled", n_pairs=3000, seed=0)["summary"]
    assert summary["preference"] == direct["preference"] and summary["accuracy_gap"] == direct["accuracy_gap"]
    assert summary["preference_model"] == str(out / "preference.pt") and not (out / "reward.pt").exists()
    np.testing.assert_array_equal(learned_preference(nontransitive(), out / "preference.pt"),
                                  np.asarray(direct["preference"]))


@pytest.mark.slow
def test_sequence_task_pair_head_beats_the_scalar_head_on_a_cycle_and_selfplay_plays_on_it(tmp_path):
    """task=sequence task.preference=nontransitive (classes of responses in a cycle): the pair head against the
    Bradley–Terry scalar head on the same 600 held-out pairs, beside the task's own P (the Bayes rule).
    Measured (3000 pairs, 300 steps): preference 0.738, Bradley–Terry 0.562, the task's P 0.7525. The file's
    table of every enumerated pair is antisymmetric; self-play on it reaches the learned game's equilibrium
    within the sequence task's tolerance."""
    from polopt.commands.main import main
    from toy_tasks.sequence.task import sequence_task

    task = sequence_task(preference="nontransitive")
    model = {"kind": "transformer", "width": 32, "layers": 2, "heads": 2, "context": 16, "seed": 0}
    fitted = task.fit_reward(kind="preference", mode="sampled", n_pairs=3000, seed=0, model=model, steps=300)
    summary = fitted["summary"]
    assert summary["heldout_accuracy"] >= summary["true_preference_heldout_accuracy"] - 0.03
    assert summary["accuracy_gap"] > 0.1
    f = fitted["file"]
    path = save_reward_model(tmp_path / "preference.pt", f["kind"], f["identity"], f["state"])
    table = learned_preference(task.finite, path)
    np.testing.assert_allclose(table + np.swapaxes(table, 1, 2), 1.0, atol=1e-12)
    run = tmp_path / "run"
    assert main(["train", "task=sequence", "task.preference=nontransitive", "method=selfplay",
                 f"method.preference={path}", "train.steps=200", "train.progress=false", f"hydra.run.dir={run}"]) == 0
    played = json.loads((run / "summary.json").read_text())
    assert played["reached_optimum"] is True and played["optimum_kind"] == "Nash equilibrium of the learned P"
