"""The enumerable sequence task (toy_tasks.sequence.task) and its sessions (toy_tasks.sequence.session,
toy_tasks.sequence.group_session).

Checks against facts outside the code: the number of strings of length <= L over
S letters (a geometric sum), the chain rule summing to 1 over a complete prefix
tree (probability), the closed-form optima of the logistic loss on Bradley–Terry
preferences (Rafailov et al. 2023) and of the squared loss (Azar et al. 2023),
and independent scipy minimisations of the exported task file (Cal-DPO's, Xiao et al. 2024, included).
"""

import json

import numpy as np
import pytest
import scipy.optimize
import scipy.special
import torch
from helpers_exact import MODEL, SMALL, SMALL_OVERRIDES
from hydra import compose, initialize_config_dir

from polopt import losses
from polopt.commands.main import main
from polopt.commands.train import CONFIG_DIR, run
from polopt.models.reference_cache import FILE_NAME
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig
from toy_tasks.finite.task import load_task
from toy_tasks.sequence.task import count_responses, enumerate_responses, sequence_task


@pytest.fixture(scope="module")
def task():
    return sequence_task(**SMALL)


def test_enumeration_counts():
    # strings over S letters of length < L, each ended, plus the S^L strings of length L
    for s, length in [(2, 1), (3, 3), (3, 5), (4, 4)]:
        responses = enumerate_responses(s, length)
        expected = sum(s**i for i in range(length + 1))
        assert len(responses) == len(set(responses)) == expected == count_responses(s, length)
    assert enumerate_responses(2, 2) == [(2,), (0, 2), (1, 2), (0, 0), (0, 1), (1, 0), (1, 1)]


def test_reference_sums_to_one(task):
    # the chain rule over a complete prefix tree: the leaves' probabilities sum to 1
    p = np.exp(task.reference_logprobs)
    np.testing.assert_allclose(p.sum(axis=1), 1.0, atol=1e-12)
    assert p.min() > 0


@pytest.mark.parametrize("kind", ["transformer", "bigram"])
def test_any_policy_sums_to_one(task, kind):
    session = task.prepare(losses.resolve_margin("squared"), beta=0.5)
    policy = session.build_policy(**{**MODEL, "kind": kind, "init": "random"})
    if kind == "bigram":
        with torch.no_grad():
            policy.model.table.normal_(generator=torch.Generator().manual_seed(0))
    with torch.no_grad():
        p = policy.log_distribution().double().exp()
    torch.testing.assert_close(p.sum(1), torch.ones(2, dtype=torch.float64), atol=1e-5, rtol=0)


def test_labels_and_export(task, tmp_path):
    exported = load_task(task.save(tmp_path / "seq.json"))
    assert exported.n_responses == 40 and exported.n_prompts == 2
    assert exported.responses[:3] == ["<end>", "a <end>", "b <end>"]
    assert exported.responses[-1] == "c c c"
    np.testing.assert_allclose(exported.reference, np.exp(task.reference_logprobs), atol=1e-15)


def test_policy_starts_at_reference(task):
    session = task.prepare(losses.resolve_margin("logistic"), beta=0.5)
    policy = session.build_policy(**MODEL, init="reference")
    with torch.no_grad():
        diff = policy.log_distribution().double() - policy.reference_logprobs
    assert float(diff.abs().max()) < 1e-5  # float32 copy of a float64 reference


def test_exact_optimum_is_the_closed_form(task):
    # logistic on Bradley–Terry: pi* ∝ pi_ref e^{r / beta} (Rafailov et al. 2023)
    beta = 0.5
    session = task.prepare(losses.resolve_margin("logistic"), beta=beta)
    opt = session.finite.optimum
    pi = scipy.special.softmax(task.reference_logprobs + opt.logratios, axis=1)
    expected = scipy.special.softmax(task.reference_logprobs + task.rewards / beta, axis=1)
    np.testing.assert_allclose(pi, expected, atol=1e-12)
    assert len(session.pairs) == 2 * 40 * 39  # every ordered pair of distinct responses per prompt


def _independent_optimum(data: dict, loss: str, beta: float) -> list[np.ndarray]:
    """Solve the exported file with nothing from polopt: pairs drawn from mu, label from P."""
    out = []
    for entry in data["prompts"]:
        mu = np.asarray(entry["sampling"])
        ref = np.asarray(entry["reference"])
        if "rewards" in entry:
            r = np.asarray(entry["rewards"])
            p = 1.0 / (1.0 + np.exp(-(r[:, None] - r[None, :])))  # Bradley–Terry, 1952
        else:
            p = np.asarray(entry["preference"])
        if loss == "squared":  # IPO closed form: h_i = (2 / beta) sum_j mu_j P[i, j] (Azar et al. 2023)
            h = (2.0 / beta) * p @ mu
        else:  # logistic: minimise sum_{i != j} mu_i mu_j P_ij log(1 + e^{-beta (h_i - h_j)}) with scipy
            w = mu[:, None] * mu[None, :] * p * (1 - np.eye(len(mu)))

            def fun(h, w=w):
                d = beta * (h[:, None] - h[None, :])
                value = (w * np.logaddexp(0.0, -d)).sum()
                g = -w * beta * scipy.special.expit(-d)
                return value, g.sum(1) - g.sum(0)

            h = scipy.optimize.minimize(fun, np.zeros(len(mu)), jac=True, method="L-BFGS-B",
                                        options={"gtol": 1e-12, "ftol": 1e-15, "maxiter": 5000}).x
        out.append(scipy.special.softmax(np.log(ref) + h))
    return out


@pytest.mark.parametrize(("loss", "preference"), [("logistic", "bradley_terry"), ("squared", "nontransitive")])
def test_exported_task_solved_independently_matches_the_run(tmp_path, loss, preference):
    overrides = [*SMALL_OVERRIDES, f"task.preference={preference}"]
    out = tmp_path / "task.json"
    assert main(["export", "sequence", str(out), *[o for o in overrides if o.startswith("task.")]]) == 0
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["task=sequence", "model=transformer", f"loss={loss}", "beta=0.5",
                                           "train.steps=2", "train.progress=false", "optim.lr=0.003", *overrides])
    summary = run(cfg, tmp_path / "run")
    independent = _independent_optimum(json.loads(out.read_text()), loss, 0.5)
    for x in range(2):
        np.testing.assert_allclose(summary["optimum"][x], independent[x], atol=1e-6)
    assert set(summary) >= {"loss", "beta", "policy", "optimum", "optimum_finite", "tv_to_optimum", "loss_gap",
                            "steps", "seconds"}
    assert len(summary["policy"]) == 2 and len(summary["policy"][0]) == 40


@pytest.mark.parametrize("loss", ["logistic", "squared"])
def test_short_exact_training_approaches_optimum(task, loss):
    session = task.prepare(losses.resolve_margin(loss), beta=0.5)
    policy = session.build_policy(**MODEL, init="reference")
    start = session.evaluate(policy)["tv_to_optimum"]
    result = train(policy, session.pairs, losses.resolve_margin(loss),
                   TrainSettings(beta=0.5, steps=150, optim=OptimConfig(lr=0.01), log_every=50, progress=False),
                   evaluate=session.evaluate)
    assert start > 0.1  # it starts well away from the optimum
    assert result.final["tv_to_optimum"] < 0.05


class CountingForward:
    """Counts forward calls of a module (a forward hook)."""

    def __init__(self, module):
        self.calls = 0
        module.register_forward_hook(self)

    def __call__(self, *args):
        self.calls += 1


def test_sampled_mode_reference_cache(tmp_path):
    task = sequence_task(**SMALL)
    _ = task.reference_logprobs  # the enumerated table: computed once when the task is first used
    counter = CountingForward(task.reference_model)
    loss = losses.resolve_margin("squared")
    session = task.prepare(loss, beta=0.5, mode="sampled", n_pairs=300, seed=1, run_dir=tmp_path)
    assert counter.calls == 1  # one pass over the dataset: winners and losers together
    pairs = session.pairs
    assert pairs.winner.shape == (300, 3) and pairs.tokens is not None
    # the dataset's reference log-probs agree with the enumerated table (the chain rule both ways)
    index = session.finite.pairs
    table = torch.as_tensor(task.reference_logprobs)
    torch.testing.assert_close(pairs.reference_winner, table[index.prompt, index.winner], atol=1e-12, rtol=0)
    torch.testing.assert_close(pairs.reference_loser, table[index.prompt, index.loser], atol=1e-12, rtol=0)
    stored = torch.load(tmp_path / FILE_NAME, weights_only=True)
    torch.testing.assert_close(stored["logprobs"], torch.cat([pairs.reference_winner, pairs.reference_loser]))

    policy = session.build_policy(**MODEL)
    result = train(policy, pairs, loss,
                   TrainSettings(beta=0.5, steps=12, batch_size=100, optim=OptimConfig(lr=0.003), log_every=4,
                                 progress=False),
                   evaluate=session.evaluate)  # 4 epochs
    assert counter.calls == 1  # never recomputed per epoch
    assert result.final["tokens_per_s"] > 0
    summary = session.summarise(policy, result)
    assert summary["tv_to_optimum"] is not None and summary["tv_to_population_optimum"] is not None
    assert summary["reference_cache_reused"] is False

    again = task.prepare(loss, beta=0.5, mode="sampled", n_pairs=300, seed=1, run_dir=tmp_path)
    assert counter.calls == 1  # the same run folder and dataset: read from the file
    assert again.reference_cache_reused
    torch.testing.assert_close(again.pairs.reference_winner, pairs.reference_winner)
    task.prepare(loss, beta=0.5, mode="sampled", n_pairs=300, seed=2, run_dir=tmp_path)
    assert counter.calls == 2  # another dataset: recomputed


def test_bf16_training_runs(task):
    session = task.prepare(losses.resolve_margin("squared"), beta=0.5)
    policy = session.build_policy(**MODEL)
    result = train(policy, session.pairs, losses.resolve_margin("squared"),
                   TrainSettings(beta=0.5, steps=20, optim=OptimConfig(lr=0.01), log_every=10, progress=False,
                                 precision="bf16"),
                   evaluate=session.evaluate)
    assert np.isfinite(result.final["loss"]) and result.final["tv_to_optimum"] < result.history[0]["tv_to_optimum"]


def test_experiment_config_composes():
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["+experiment=sequence", "loss=squared"])
    assert cfg.task._target_ == "toy_tasks.sequence.task.sequence_task"
    assert cfg.model.kind == "transformer" and cfg.model.init == "reference"
    assert cfg.optim.lr == 0.003 and cfg.optim.warmup_steps == 20
    assert cfg.loss.name == "squared" and cfg.precision == "fp32"
    assert (cfg.task.n_symbols, cfg.task.max_length) == (3, 5)


def test_errors(task):
    with pytest.raises(ValueError, match="task.preference must be one of bradley_terry, nontransitive, got 'cyclic'"):
        sequence_task(preference="cyclic")
    with pytest.raises(ValueError, match="task.n_symbols=6 and task.max_length=6 give 55987 responses per prompt"):
        sequence_task(n_symbols=6, max_length=6)
    with pytest.raises(ValueError, match=r"task.cycle_strength must lie in \(0, 0.5\], got 0.7"):
        sequence_task(cycle_strength=0.7)
    with pytest.raises(ValueError, match="task.max_length must be an integer >= 1, got 0"):
        sequence_task(max_length=0)
    session = task.prepare(losses.resolve_margin("squared"), beta=0.5)
    with pytest.raises(ValueError, match="model.init must be one of reference, random, got 'zeros'"):
        session.build_policy(**MODEL, init="zeros")
    with pytest.raises(ValueError, match="model.context must be at least 3 for this task"):
        session.build_policy(**{**MODEL, "context": 2})
    from toy_tasks.families import bradley_terry

    finite = bradley_terry().prepare(losses.resolve_margin("squared"), beta=0.5)
    with pytest.raises(ValueError, match=r"model=transformer is a sequence model and needs a sequence task"):
        finite.build_policy(**MODEL)
    sampled = task.prepare(losses.resolve_margin("squared"), beta=0.5, mode="sampled", n_pairs=50)
    with pytest.raises(ValueError, match="model=tabular scores enumerated responses, not tokens"):
        sampled.build_policy(kind="tabular")


def _calibrated_logistic_optimum(entry: dict, beta: float) -> np.ndarray:
    """Cal-DPO's population optimum over the simplex (Xiao et al. 2024), solved with scipy and torch
    autograd alone: minimise sum_{i != j} mu_i mu_j P_ij [softplus(-(h_i - h_j)) + (h_i - 1/(2 beta))^2
    + (h_j + 1/(2 beta))^2] over logits z, h = log softmax(z) - log pi_ref."""
    mu, ref = np.asarray(entry["sampling"]), np.asarray(entry["reference"])
    r = np.asarray(entry["rewards"])
    p = 1.0 / (1.0 + np.exp(-(r[:, None] - r[None, :])))  # Bradley–Terry, 1952
    w = torch.as_tensor(mu[:, None] * mu[None, :] * p * (1 - np.eye(len(mu))))
    log_ref, target = torch.as_tensor(np.log(ref)), 1.0 / (2.0 * beta)

    def fun(z):
        z = torch.as_tensor(z, dtype=torch.float64).requires_grad_(True)
        h = torch.log_softmax(z, 0) - log_ref
        value = (w * (torch.nn.functional.softplus(-(h[:, None] - h[None, :])) + (h[:, None] - target) ** 2
                      + (h[None, :] + target) ** 2)).sum()
        value.backward()
        return float(value.detach()), z.grad.numpy()

    z = scipy.optimize.minimize(fun, np.log(ref), jac=True, method="L-BFGS-B",
                                options={"gtol": 1e-12, "ftol": 1e-15, "maxiter": 5000}).x
    return scipy.special.softmax(z)


@pytest.mark.slow
def test_a_group_objective_trains_the_transformer_on_the_sequence_pairs(tmp_path):
    # task=sequence with a group objective: every pair a group of two, the exact target, the tiny transformer
    out = tmp_path / "task.json"
    assert main(["export", "sequence", str(out), *[o for o in SMALL_OVERRIDES if o.startswith("task.")]]) == 0
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["task=sequence", "loss=calibrated_logistic", "beta=0.5",
                                           "train.steps=150", "train.progress=false", "optim.lr=0.01",
                                           *SMALL_OVERRIDES])
    summary = run(cfg, tmp_path / "run")
    data = json.loads(out.read_text())
    for x in range(2):
        np.testing.assert_allclose(summary["optimum"][x], _calibrated_logistic_optimum(data["prompts"][x], 0.5),
                                   atol=1e-6)
    assert summary["task"] == "sequence" and summary["n_responses"] == 40 and summary["group_size"] == 2
    assert summary["reached_optimum_tolerance"] == 0.05  # a sequence model's tolerance
    assert summary["tv_to_optimum"] < 0.05 and summary["reached_optimum"] is True
