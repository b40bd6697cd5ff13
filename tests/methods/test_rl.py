"""KL-regularised REINFORCE (polopt.methods.rl).

Checks against: the KL-regularised optimum pi* ∝ pi_ref e^{r / beta} (Rafailov
et al., Direct Preference Optimization, 2023, eq. 4), computed here with
scipy.special.softmax; torch autograd of the objective E_pi r - beta KL(pi || pi_ref)
for the exact estimator's gradient; the mean of many sampled gradients for the
sampled estimator's unbiasedness (tolerance from the spread of the samples).
"""

import numpy as np
import pytest
import scipy.special
import torch

from polopt import losses
from polopt.methods.rl import regularised_objective, rl_objective
from polopt.models.tabular import TabularPolicy
from toy_tasks.families import bradley_terry, contextual, nontransitive


def tv(p, q, weights):
    return float(weights @ (0.5 * np.abs(p - q).sum(1)))


def kl_optimum(task, rewards, beta):
    return scipy.special.softmax(np.log(task.reference) + rewards / beta, axis=1)


def trained(policy):
    with torch.no_grad():
        return policy.log_distribution().exp().numpy()


@pytest.mark.parametrize("estimator", ["exact", "sampled"])
def test_reaches_the_kl_regularised_optimum_on_the_fixed_task(run_method, estimator):
    task = bradley_terry()
    _, policy, _ = run_method(task, "rl", beta=0.5, steps=600, estimator=estimator, batch_size=32)
    assert tv(trained(policy), kl_optimum(task, task.rewards, 0.5), task.prompt_weights) < 1e-3


@pytest.mark.parametrize("seed", range(3))
def test_reaches_the_optimum_on_random_contextual_instances(run_method, seed):
    rng = np.random.default_rng(seed)
    task = contextual(n_prompts=int(rng.integers(1, 4)), n_responses=int(rng.integers(2, 7)), seed=seed)
    beta = float(rng.uniform(0.3, 2.0))
    _, policy, _ = run_method(task, "rl", beta=beta, steps=800, lr=0.1)
    assert tv(trained(policy), kl_optimum(task, task.rewards, beta), task.prompt_weights) < 1e-3


def test_win_rate_reward_on_a_task_without_rewards(run_method):
    task = nontransitive()
    view, policy, _ = run_method(task, "rl", beta=0.5, steps=800, reward="win_rate")
    win_rate = np.einsum("xij,xj->xi", task.preference, task.sampling)  # r(y) = P(y > mu)
    assert tv(trained(policy), kl_optimum(task, win_rate, 0.5), task.prompt_weights) < 1e-3


def _setup(seed=0):
    task = contextual(n_prompts=2, n_responses=4, seed=seed)
    view = task.prepare(losses.resolve_margin("logistic"), beta=0.7).for_method("rl")
    policy = TabularPolicy(view.environment().reference)
    with torch.no_grad():
        policy.scores.normal_(generator=torch.Generator().manual_seed(seed))
    return view.environment(), policy


def _grad(policy, value):
    policy.zero_grad()
    value.backward()
    return policy.scores.grad.clone()


def test_exact_surrogate_gradient_is_minus_the_objective_gradient():
    env, policy = _setup()
    surrogate, _ = rl_objective(policy, env, beta=0.7)(1)
    g_surrogate = _grad(policy, surrogate)
    g_objective = _grad(policy, regularised_objective(policy.log_distribution(), env, beta=0.7))
    torch.testing.assert_close(g_surrogate, -g_objective, atol=1e-12, rtol=0)


def test_sampled_surrogate_gradient_is_unbiased():
    env, policy = _setup(1)
    exact = -_grad(policy, regularised_objective(policy.log_distribution(), env, beta=0.7))
    step = rl_objective(policy, env, beta=0.7, estimator="sampled", batch_size=8,
                        generator=torch.Generator().manual_seed(0))
    draws = torch.stack([_grad(policy, step(i)[0]) for i in range(1000)])
    mean, spread = draws.mean(0), draws.std(0) / len(draws) ** 0.5
    assert torch.all((mean - exact).abs() <= 5 * spread + 1e-12)


def test_a_task_without_rewards_is_refused(run_method):
    with pytest.raises(ValueError, match=r"method=rl needs rewards and task 'nontransitive' has none"):
        run_method(nontransitive(), "rl")


def test_unknown_estimator_is_refused(run_method):
    with pytest.raises(ValueError, match=r"method.estimator must be one of exact, sampled, got 'mc'"):
        run_method(bradley_terry(), "rl", estimator="mc")


def test_the_train_command_refuses_in_one_line(tmp_path, capsys):
    from polopt.commands.main import main

    assert main(["train", "method=rl", "task=nontransitive", f"hydra.run.dir={tmp_path}"]) == 2
    assert capsys.readouterr().err.startswith("polopt train: error: method=rl needs rewards and task "
                                              "'nontransitive' has none")


def test_the_run_summary_carries_the_common_fields(tmp_path):
    from hydra import compose, initialize_config_dir

    from polopt.commands.train import CONFIG_DIR, run

    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        summary = run(compose("config", overrides=["method=rl", "train.steps=600", "train.progress=false"]), tmp_path)
    task = bradley_terry()
    np.testing.assert_allclose(summary["optimum"], kl_optimum(task, task.rewards, 0.5), atol=1e-12)
    assert summary["tv_to_optimum"] < 1e-3 and summary["loss_gap"] < 1e-6
    assert summary["steps"] == 600 and summary["seconds"] > 0
    assert summary["kl_to_reference"] == pytest.approx(float(scipy.special.rel_entr(
        np.asarray(summary["policy"]), task.reference).sum()), abs=1e-12)
    assert (tmp_path / "summary.json").is_file() and (tmp_path / "metrics.jsonl").is_file()


class _SessionWithoutMethods:
    """A task session that offers only offline training (as a pairs-file task may)."""

    def build_policy(self, **model):
        return TabularPolicy(torch.zeros(1, 2, dtype=torch.float64))


def task_without_methods(**keys):
    task = type("TaskWithoutMethods", (), {})()
    task.prepare = lambda loss, **run_keys: _SessionWithoutMethods()
    return task


def test_a_task_that_does_not_offer_the_method_is_refused(tmp_path, monkeypatch):
    from hydra import compose, initialize_config_dir

    from polopt.commands import config
    from polopt.commands.train import CONFIG_DIR, run

    monkeypatch.setattr(config, "TASK_PACKAGES", (*config.TASK_PACKAGES, f"{__name__}."))  # admit this test's builder

    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["method=rl", f"task._target_={__name__}.task_without_methods"])
    with pytest.raises(ValueError, match=r"method=rl needs a task that offers it \(the finite tasks do\); this task "
                                         r"trains with method=offline only"):
        run(cfg, tmp_path)
