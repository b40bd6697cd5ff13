"""Bradley–Terry reward models (toy_tasks.methods.reward_fit and
polopt.methods.reward_model) and methods on a learned reward.

Checks against: an independent maximum-likelihood solve written here (scipy.optimize.minimize,
BFGS, on the Bradley–Terry log-likelihood of the recorded counts, one reward pinned to 0,
the gradient by torch autograd); the consistency of the maximum-likelihood estimate (on the
population win weights it returns the true rewards; Bradley & Terry 1952); Ford 1957's
existence condition; brute-force enumeration of every draw of best-of-n and docs/maths.md's
P(y) = F(y)^n - F(y^-)^n; the closed form pi_ref e^{r / beta} (Rafailov et al. 2023); the
winner's curse (Smith & Winkler, The optimizer's curse, 2006): the estimate of the option
chosen for its high estimate is biased upwards.
"""

import itertools
import json

import numpy as np
import pytest
import scipy.optimize
import scipy.special
import torch
from helpers_cli import assert_one_line_errors, polopt

from polopt.methods.reward_model import load_reward_model, pair_metrics, save_reward_model, split_heldout
from toy_tasks.families import bradley_terry, contextual
from toy_tasks.methods.reward_fit import GAUGE, fit_table, fit_task_reward, pair_counts, task_identity, to_gauge


def independent_mle(counts: np.ndarray, l2: float = 0.0) -> np.ndarray:
    """argmax of sum C_ij log sigmoid(r_i - r_j) - l2/2 |r|^2 for one prompt: BFGS over r, with r_0 = 0
    when l2 = 0 (the likelihood fixes only differences); gradient by torch autograd."""
    k = len(counts)
    c = torch.as_tensor(counts, dtype=torch.float64)

    def full(theta):
        return theta if l2 > 0 else torch.cat([torch.zeros(1, dtype=torch.float64), theta])

    def fun(theta):
        t = torch.as_tensor(theta, dtype=torch.float64).requires_grad_(True)
        r = full(t)
        value = -(c * torch.nn.functional.logsigmoid(r[:, None] - r[None, :])).sum() + 0.5 * l2 * (r**2).sum()
        value.backward()
        return float(value.detach()), t.grad.numpy().copy()

    start = np.zeros(k if l2 > 0 else k - 1)
    result = scipy.optimize.minimize(fun, start, jac=True, method="BFGS", options={"gtol": 1e-11, "maxiter": 10000})
    return full(torch.as_tensor(result.x)).numpy()


@pytest.mark.parametrize("seed", range(3))
@pytest.mark.parametrize("l2", [0.0, 0.05])
def test_table_fit_equals_an_independent_maximum_likelihood_solve(seed, l2):
    task = contextual(seed=seed) if seed == 2 else bradley_terry(n_responses=6, seed=seed)
    counts = pair_counts(task, task.sample_pairs(3000, seed))
    fitted, residual = fit_table(counts, task.reference, l2=l2)
    for x in range(task.n_prompts):
        mine = independent_mle(counts[x], l2)
        expected = mine - task.reference[x] @ mine  # the same gauge: reference-weighted mean zero
        np.testing.assert_allclose(fitted[x], expected, atol=1e-6)
    np.testing.assert_allclose((task.reference * fitted).sum(1), 0.0, atol=1e-12)  # the gauge holds
    assert residual < 1e-8


def test_on_the_population_weights_the_fit_returns_the_true_rewards():
    """The maximum-likelihood estimate is consistent: on infinitely many pairs it is the true reward."""
    task = bradley_terry(n_responses=8, seed=5)
    fitted = fit_task_reward(task, mode="exact", n_pairs=1, seed=0)["summary"]
    np.testing.assert_allclose(fitted["rewards"], to_gauge(task.rewards, task.reference), atol=1e-6)
    assert fitted["reward_max_error"] < 1e-6
    # learned = true probabilities, so each bin's win share equals its predicted probability: ECE 0 (derivation:
    # the pairs (i, j) and (j, i) share the favourite's confidence P_ij, and i wins with weight share P_ij)
    assert fitted["calibration_error"] == pytest.approx(0.0, abs=1e-9)


def test_without_a_strongly_connected_win_graph_the_fit_is_refused_and_l2_is_offered():
    counts = np.zeros((1, 3, 3))
    counts[0, 0, 1] = counts[0, 1, 2] = counts[0, 0, 2] = 5  # 0 beats all, nothing beats 0 (Ford 1957)
    reference = np.full((1, 3), 1 / 3)
    with pytest.raises(ValueError, match=r"does not exist.*Ford 1957.*responses \[0\] are never beaten.*reward.l2"):
        fit_table(counts, reference)
    penalised, _ = fit_table(counts, reference, l2=0.1)
    np.testing.assert_allclose(penalised[0], to_gauge(independent_mle(counts[0], 0.1)[None], reference)[0], atol=1e-6)
    assert penalised[0, 0] > penalised[0, 1] > penalised[0, 2]


def test_pair_metrics_by_hand():
    # margins 2, -1, 0.5: the favourite wins in 2 of 3 -> accuracy 2/3; confidences sigmoid(|m|) = 0.8808,
    # 0.7311, 0.6225 fall in three different bins of width 0.05, so ECE = mean |correct - confidence|
    out = pair_metrics(np.array([2.0, -1.0, 0.5]), bins=10)
    conf = scipy.special.expit([2.0, 1.0, 0.5])
    assert out["heldout_accuracy"] == pytest.approx(2 / 3)
    assert out["calibration_error"] == pytest.approx(np.mean(np.abs([1, 0, 1] - conf)))
    assert pair_metrics(np.array([0.0]))["heldout_accuracy"] == 0.5  # a tie counts half
    fit, held = split_heldout(100, 0.2, seed=3)
    assert len(held) == 20 and sorted(np.concatenate([fit, held]).tolist()) == list(range(100))


def _saved(task, tmp_path, n_pairs=400, seed=0, l2=0.0, name="reward.pt"):
    fitted = fit_task_reward(task, mode="sampled", n_pairs=n_pairs, seed=seed, l2=l2)
    f = fitted["file"]
    return save_reward_model(tmp_path / name, f["kind"], f["identity"], f["state"], gauge=f["gauge"]), fitted


def enumerate_best_of_n(reference, rewards, n):
    """Every sequence of n draws with its probability; keep the first drawn of the maxima."""
    out = np.zeros(len(reference))
    for draws in itertools.product(range(len(reference)), repeat=n):
        out[max(draws, key=lambda y: rewards[y])] += np.prod(reference[list(draws)])
    return out


@pytest.mark.parametrize("n", [2, 3])
def test_best_of_n_target_under_a_learned_reward_is_the_exact_distribution(tmp_path, n):
    from polopt import losses

    task = bradley_terry(n_responses=5, seed=1)
    path, fitted = _saved(task, tmp_path)
    learned = np.asarray(fitted["summary"]["rewards"])[0]
    view = task.prepare(losses.resolve_margin("logistic"), beta=0.5).for_method("best_of_n", n=n, reward=str(path))
    np.testing.assert_allclose(view.rewards[0], learned, atol=0)
    np.testing.assert_allclose(view.target[0], enumerate_best_of_n(task.reference[0], learned, n), atol=1e-12)
    order = np.argsort(learned)  # docs/maths.md: P(y) = F(y)^n - F(y^-)^n, F the reference mass at or below r(y)
    upper = np.cumsum(task.reference[0][order])
    formula = np.empty(5)
    formula[order] = upper**n - (upper - task.reference[0][order]) ** n
    np.testing.assert_allclose(view.target[0], formula, atol=1e-12)
    rl = task.prepare(losses.resolve_margin("logistic"), beta=0.5).for_method("rl", reward=str(path))
    np.testing.assert_allclose(rl.target[0], scipy.special.softmax(np.log(task.reference[0]) + learned / 0.5),
                               atol=1e-12)


def test_winners_curse_best_of_n_overestimates_its_true_reward(tmp_path):
    """Over 20 reward models (200 pairs each, 10 responses), the learned reward of exact best-of-16 under the
    learned reward exceeds its true reward on average (both reference-weighted mean zero). Measured here
    (seeds 0-19, reward.l2 0.1): mean overestimate 0.168 (standard error 0.046, t = 3.7), positive for 16 of
    20 seeds; the test asks the mean to exceed 3 standard errors."""
    from toy_tasks.methods.best_of_n import best_of_n_distribution

    task = bradley_terry(n_responses=10, reward_scale=1.0, seed=0)
    true = to_gauge(task.rewards, task.reference)[0]
    gaps = []
    for seed in range(20):
        learned = np.asarray(fit_task_reward(task, mode="sampled", n_pairs=200, seed=seed, l2=0.1,
                                             heldout=0.0)["summary"]["rewards"])[0]
        p = best_of_n_distribution(task.reference[0], learned, 16)
        gaps.append(p @ learned - p @ true)
    gaps = np.array(gaps)
    assert gaps.mean() > 3 * gaps.std(ddof=1) / np.sqrt(len(gaps))


def test_a_reward_model_file_knows_its_task(tmp_path):
    task = bradley_terry(n_responses=6, seed=0)
    path, _ = _saved(task, tmp_path)
    data = load_reward_model(path, task_identity(task))
    assert data["kind"] == "table" and data["gauge"] == GAUGE
    assert torch.load(path, weights_only=True)["state"]["rewards"].dtype == torch.float64
    with pytest.raises(ValueError, match=r"fitted for responses 6, but this run has 8"):
        load_reward_model(path, task_identity(bradley_terry(n_responses=8, seed=0)))
    with pytest.raises(ValueError, match=r"fitted for reference_sha256"):
        load_reward_model(path, task_identity(bradley_terry(n_responses=6, seed=1)))
    (tmp_path / "junk.pt").write_bytes(b"not a file torch can read")
    with pytest.raises(ValueError, match=r"junk.pt is not a readable reward model"):
        load_reward_model(tmp_path / "junk.pt", task_identity(task))


@pytest.mark.slow
def test_the_reward_command_writes_counts_that_anyone_can_refit(tmp_path):
    out = polopt("reward", "task=bradley_terry", "task.mode=sampled", "task.n_pairs=2000", "train.seed=0",
                 f"hydra.run.dir={tmp_path / 'rm'}")
    assert out.returncode == 0, out.stderr
    summary = json.loads((tmp_path / "rm" / "summary.json").read_text())
    task = bradley_terry()  # conf/task/bradley_terry.yaml's defaults
    counts = np.asarray(summary["pair_counts"])
    assert counts.sum() == 1600 and summary["heldout_pairs"] == 400  # reward.heldout 0.2
    mine = independent_mle(counts[0])
    np.testing.assert_allclose(summary["rewards"][0], mine - task.reference[0] @ mine, atol=1e-6)
    assert 0.5 < summary["heldout_accuracy"] < 1 and 0 <= summary["calibration_error"] < 0.2
    assert summary["reward_rms_error"] < 0.3  # 1600 pairs over 6 responses
    # method.reward: best-of-n and RL against the learned reward report learned and true reward
    run = polopt("train", "method=best_of_n", "method.n=8", f"method.reward={tmp_path / 'rm' / 'reward.pt'}",
                 "train.steps=300", "train.progress=false", f"hydra.run.dir={tmp_path / 'bon'}")
    assert run.returncode == 0, run.stderr
    bon = json.loads((tmp_path / "bon" / "summary.json").read_text())
    policy = np.asarray(bon["policy"])[0]
    assert bon["learned_reward"] == pytest.approx(policy @ np.asarray(summary["rewards"][0]), abs=1e-9)
    assert bon["true_reward"] == pytest.approx(policy @ np.asarray(summary["true_rewards"][0]), abs=1e-9)
    assert bon["reference_learned_reward"] == pytest.approx(0.0, abs=1e-12)
    assert bon["target_kl_to_reference"] == pytest.approx(bon["best_of_n_kl_to_reference"])


def test_bad_reward_input_is_one_line_and_exit_2(tmp_path, capsys):
    """In process (polopt.commands.main.main returns the exit code, as DEVELOPERS.md says): the same
    error boundary as the command line, without a torch import per case."""

    path, _ = _saved(bradley_terry(), tmp_path)
    cases = [
        (("train", "method=rl", "task=contextual", f"method.reward={path}"), r"fitted for task 'bradley_terry'"),
        (("train", "method=rl", "task.n_responses=8", f"method.reward={path}"), r"fitted for responses 6"),
        (("train", "method=best_of_n", f"method.reward={tmp_path / 'none.pt'}"), r"none.pt' does not exist"),
        (("reward", "task.mode=sampled", "task.n_pairs=20", f"hydra.run.dir={tmp_path / 'x'}"),
         r"polopt reward: error: the Bradley–Terry maximum-likelihood fit does not exist.*reward.l2"),
        (("reward", "reward.nosuch=1", f"hydra.run.dir={tmp_path / 'z'}"),
         r"unknown key 'reward.nosuch'; did you mean reward\."),
        (("reward", "task.mode=sampled", "reward.heldout=1.5", f"hydra.run.dir={tmp_path / 'y'}"),
         r"reward.heldout .* must lie in \[0, 1\)"),
        # a key a command does not read is refused, never ignored
        (("train", "reward.l2=1"), r"polopt train does not read the reward block \('reward.l2=1'"),
        (("reward", "optim.lr=3", f"hydra.run.dir={tmp_path / 'w'}"),
         r"polopt reward reads task, .* only; 'optim.lr=3' would change nothing here"),
        (("reward", "reward.steps=3", f"hydra.run.dir={tmp_path / 'v'}"),
         r"reward.steps=3: task .* fits a table by maximum likelihood \(no model, no Adam steps\)"),
        (("reward", "model=bigram", f"hydra.run.dir={tmp_path / 'u'}"), r"model=bigram: task .* fits a table"),
    ]
    assert_one_line_errors(cases, tmp_path / "run", capsys)


def test_the_overoptimisation_bench_writes_its_table_and_plot(tmp_path, capsys):
    from bench import overoptimisation

    overoptimisation.main(["--out", str(tmp_path), "--seeds", "1"])
    lines = (tmp_path / "overoptimisation.txt").read_text().splitlines()
    rows = [line.split() for line in lines if line.split()[:1] and line.split()[0].isdigit() and "pairs" in line]
    assert len(rows) == len(overoptimisation.SIZES) * (len(overoptimisation.NS) + len(overoptimisation.BETA_GRID))
    for row in rows:  # best-of-1 is the reference: KL 0 and both rewards 0 in the reference-weighted gauge
        if row[2] == "best_of_n" and row[3] == "1":
            assert [abs(float(v)) < 1e-9 for v in row[4:7]] == [True] * 3
    assert (tmp_path / "overoptimisation.png").stat().st_size > 0


@pytest.mark.slow
def test_sequence_task_scalar_head_approaches_the_true_rewards_accuracy(tmp_path):
    """The scalar head on the tiny transformer, fitted to 3000 sampled token pairs: its held-out accuracy
    is compared with that of the true rewards on the same held-out pairs (the Bayes rule: no model does
    better in expectation); its file carries its scores of every enumerated response for method.reward and
    refuses another model shape. Measured: 0.678 against 0.6875 after 300 steps, rms error 0.16."""
    from toy_tasks.methods.reward_fit import learned_rewards
    from toy_tasks.sequence.reward import model_identity
    from toy_tasks.sequence.task import sequence_task

    torch.manual_seed(0)
    task = sequence_task()
    model = {"kind": "transformer", "width": 32, "layers": 2, "heads": 2, "context": 16, "seed": 0}
    fitted = task.fit_reward(mode="sampled", n_pairs=3000, seed=0, model=model, steps=150)
    summary = fitted["summary"]
    pairs = task.finite.sample_pairs(3000, 0)
    _, held = split_heldout(3000, 0.2, 0)
    r = task.rewards
    bayes = pair_metrics(r[pairs.prompt[held], pairs.winner[held]] - r[pairs.prompt[held], pairs.loser[held]])
    assert summary["heldout_accuracy"] >= bayes["heldout_accuracy"] - 0.05
    assert summary["fit_loss_last"] < summary["fit_loss_first"]
    f = fitted["file"]
    path = save_reward_model(tmp_path / "seq.pt", f["kind"], f["identity"], f["state"])
    np.testing.assert_allclose(learned_rewards(task.finite, path), summary["rewards"], atol=0)
    with pytest.raises(ValueError, match=r"fitted for width 32, but this run has 16"):
        load_reward_model(path, model_identity(task, {**model, "width": 16}))
    with pytest.raises(ValueError, match=r"fits a scalar head on the tiny transformer; model=tabular"):
        task.fit_reward(mode="sampled", n_pairs=100, seed=0, model={"kind": "tabular"})


def test_compare_over_n_with_a_learned_reward_tabulates_and_plots_it(tmp_path):
    from polopt.commands.compare import compare

    path, fitted = _saved(bradley_terry(), tmp_path, n_pairs=300, l2=0.1)
    result = compare(["method=best_of_n", "method.n=1,8", f"method.reward={path}", "train.steps=200"],
                     tmp_path / "cmp", progress=False)
    assert (tmp_path / "cmp" / "overoptimisation.png").stat().st_size > 0
    assert "true and learned reward against KL" in result["table"]
    one, eight = result["rows"]
    assert one["learned_reward"] == pytest.approx(0.0, abs=1e-3)  # best-of-1 is the reference
    run = json.loads((tmp_path / "cmp" / "01" / "summary.json").read_text())
    policy = np.asarray(run["policy"])[0]
    assert eight["learned_reward"] == pytest.approx(policy @ np.asarray(fitted["summary"]["rewards"][0]), abs=1e-9)
    assert eight["kl_to_reference"] > 0.5
    assert eight["reward_model"] == str(path)


def test_a_pair_file_gets_a_scalar_head_that_learns_a_rule_it_can_represent(tmp_path):
    """An invented help-desk file in which the winner is always the courteous reply: the labels are a
    deterministic function of the text, so the best held-out accuracy is 1 (derivation: the Bayes rule
    of a noiseless label); after 40 Adam steps the scalar head must reach 0.9 of it."""
    from polopt.pairfile.task import pair_task

    rng = np.random.default_rng(0)
    topics = ["renewal", "late fee", "opening hours", "lost card", "room booking"]
    with (tmp_path / "desk.jsonl").open("w") as f:
        for i in range(100):
            t = topics[rng.integers(len(topics))]
            good = ["Happy to help", "Certainly", "Of course"][rng.integers(3)] + f" with the {t}!"
            bad = ["No", "Ask elsewhere", "Not today"][rng.integers(3)] + f" ({t})."
            f.write(json.dumps({"prompt": f"Question {i} about the {t}", "winner": good, "loser": bad}) + "\n")
    task = pair_task(path=str(tmp_path / "desk.jsonl"))
    model = {"kind": "transformer", "width": 16, "layers": 1, "heads": 2, "context": 16, "seed": 0}
    fitted = task.fit_reward(mode="sampled", n_pairs=None, seed=0, model=model, steps=40, lr=1e-2)
    summary = fitted["summary"]
    assert summary["fitted_pairs"] == 80 and len(summary["heldout_rows"]) == 20
    assert summary["heldout_accuracy"] >= 0.9
    f = fitted["file"]
    path = save_reward_model(tmp_path / "pairs.pt", f["kind"], f["identity"], f["state"])
    assert load_reward_model(path, {"task": "pairs", "width": 16})["kind"] == "transformer"
    with pytest.raises(ValueError, match=r"fitted for layers 1, but this run has 2"):
        load_reward_model(path, {"task": "pairs", "layers": 2})
