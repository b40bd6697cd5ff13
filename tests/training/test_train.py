"""The trainer reaches the exact optimum of finite tasks (exact and sampled modes).

The targets are the optima of toy_tasks.exact.margin, themselves pinned to the published
closed forms in test_solve.py. Tolerances are the foundation's acceptance bars:
TV <= 1e-3 for the smooth convex members, relative loss gap <= 1e-4 for hinge.
"""

import math

import numpy as np
import pytest
import torch

from polopt import losses
from polopt.training.loop import PairBatches, TrainSettings, train
from polopt.training.optim import OptimConfig
from toy_tasks import families
from toy_tasks.finite.task import make_task

SMOOTH = ["logistic", "squared", "huber", "exponential", "truncated_quadratic"]
STEPS = 2000  # the default train.steps


def random_task(seed, k):
    rng = np.random.default_rng(seed)
    upper = rng.random((k, k))
    pref = np.triu(upper, 1) + np.triu(1.0 - upper, 1).T + 0.5 * np.eye(k)
    return make_task(rng.dirichlet(np.ones(k)), pref, name=f"random{k}")


def run(task, name, beta=0.5, mode="exact", batch_size=None, **kwargs):
    loss = losses.resolve_margin(name)
    session = task.prepare(loss, beta=beta, mode=mode, **kwargs)
    policy = session.build_policy()
    result = train(policy, session.pairs, loss,
                   TrainSettings(beta=beta, steps=STEPS, optim=OptimConfig(), progress=False, log_every=100,
                                 batch_size=batch_size),
                   evaluate=session.evaluate)
    return session.summarise(policy, result), result


TASKS = {"bradley_terry": families.bradley_terry(), "noisy_labels": families.noisy_labels(),
         "nontransitive": families.nontransitive(), "contextual": families.contextual()}


@pytest.mark.parametrize("task_name", sorted(TASKS))
@pytest.mark.parametrize("name", SMOOTH)
def test_exact_mode_reaches_the_optimum(task_name, name):
    summary, _ = run(TASKS[task_name], name)
    assert summary["optimum_finite"]
    assert summary["tv_to_optimum"] <= 1e-3, summary["tv_to_optimum"]


@pytest.mark.parametrize("name,seed,beta", [("logistic", 0, 0.1), ("squared", 1, 1.0), ("exponential", 2, 0.3)])
def test_exact_mode_on_a_random_task_of_fifty_responses(name, seed, beta):
    summary, _ = run(random_task(seed, 50), name, beta=beta)
    assert summary["tv_to_optimum"] <= 1e-3


@pytest.mark.parametrize("task_name", ["bradley_terry", "nontransitive", "noisy_labels"])
def test_hinge_reaches_the_linear_programme_value(task_name):
    summary, _ = run(TASKS[task_name], "hinge")
    assert summary["relative_loss_gap"] <= 1e-4


def test_logistic_reaches_the_dpo_policy():
    # Rafailov et al. 2023: pi* ∝ pi_ref e^{r / beta}
    task, beta = families.bradley_terry(seed=4), 0.25
    summary, _ = run(task, "logistic", beta=beta)
    expected = task.reference * np.exp(task.rewards / beta)
    np.testing.assert_allclose(summary["policy"], expected / expected.sum(), atol=1e-4)


def test_squared_reaches_the_ipo_policy_on_a_cycle():
    # Azar et al. 2023: pi* ∝ pi_ref exp(p(i > mu) / tau), tau = beta / 2
    task, beta = families.nontransitive(), 0.4
    summary, _ = run(task, "squared", beta=beta)
    p_beats_mu = task.preference[0] @ task.sampling[0]
    expected = task.reference * np.exp(p_beats_mu / (beta / 2))
    np.testing.assert_allclose(summary["policy"], expected / expected.sum(), atol=1e-4)


def test_loglinear_policy_with_enough_features_reaches_the_optimum():
    task = families.bradley_terry(n_responses=5)
    loss = losses.resolve_margin("squared")
    session = task.prepare(loss, beta=0.5, mode="exact")
    policy = session.build_policy(kind="loglinear", width=16)
    result = train(policy, session.pairs, loss,
                   TrainSettings(beta=0.5, steps=STEPS, optim=OptimConfig(), progress=False))
    assert session.summarise(policy, result)["tv_to_optimum"] <= 1e-3


@pytest.mark.parametrize("name", ["logistic", "squared"])
def test_sampled_mode_reaches_the_empirical_optimum(name):
    summary, _ = run(families.bradley_terry(), name, mode="sampled", n_pairs=3000, seed=1)
    assert summary["tv_to_optimum"] <= 1e-3
    assert summary["tv_to_population_optimum"] is not None
    # with 3000 pairs the empirical optimum sits near the population one, but not on it
    assert 1e-4 < summary["tv_to_population_optimum"] < 0.1


def test_sampled_mode_with_minibatches_uses_every_pair():
    """Minibatches of 64 from 500 sampled pairs: each epoch (7 batches) visits 448 distinct pairs in a
    fresh order, so over the run every pair is drawn, and training still reaches the empirical optimum
    (the trainer's own batch step, PairBatches.batch, replayed with the run's seed)."""
    summary, result = run(families.bradley_terry(), "squared", mode="sampled", n_pairs=500, seed=2, batch_size=64)
    assert summary["n_pairs"] == 500 and result.steps == STEPS
    assert summary["tv_to_optimum"] <= 0.05  # minibatch noise: looser than the full-batch 1e-3
    session = families.bradley_terry().prepare(losses.resolve_margin("squared"), beta=0.5, mode="sampled",
                                               n_pairs=500, seed=2)
    settings = TrainSettings(beta=0.5, steps=STEPS, batch_size=64)
    objective = PairBatches(session.build_policy(), session.pairs, losses.resolve_margin("squared"), settings)
    objective.start(torch.Generator().manual_seed(settings.seed))
    seen, epoch = [], []
    for _ in range(3 * 7):
        index = objective.batch()[0]
        assert len(index) == 64
        if objective.cursor == 64:  # a new epoch began with this batch
            assert len(set(epoch)) == len(epoch) == (448 if epoch else 0)
            epoch = []
        epoch += index.tolist()
        seen += index.tolist()
    assert set(seen) == set(range(500))


def test_logistic_on_deterministic_preferences_reports_divergence_without_nan():
    summary, result = run(families.deterministic(), "logistic")
    assert summary["optimum_finite"] is False and summary["optimum"] is None and summary["tv_to_optimum"] is None
    assert summary["margin_growth"]["growing"] is True
    assert any("no finite optimum exists for logistic" in n and "still growing" in n for n in summary["notes"])
    numbers = [v for record in result.history for v in record.values() if isinstance(v, float)]
    assert all(math.isfinite(v) for v in numbers)
    assert all(math.isfinite(p) for row in summary["policy"] for p in row)
    assert summary["loss_gap"] >= 0


def test_metrics_have_the_documented_names():
    _, result = run(families.bradley_terry(), "logistic")
    record = result.history[-1]
    for key in ("loss", "margin_mean", "pair_accuracy", "logratio_winner", "logratio_loser", "kl_to_reference",
                "tv_to_optimum", "grad_norm", "lr"):
        assert key in record, key
    assert 0.0 <= record["pair_accuracy"] <= 1.0


def test_training_is_reproducible():
    a, _ = run(families.noisy_labels(), "logistic", mode="sampled", n_pairs=200, seed=3)
    b, _ = run(families.noisy_labels(), "logistic", mode="sampled", n_pairs=200, seed=3)
    assert a["policy"] == b["policy"]


def test_train_rejects_bad_settings():
    task = families.bradley_terry()
    loss = losses.resolve_margin("logistic")
    session = task.prepare(loss, beta=0.5)
    policy = session.build_policy()
    with pytest.raises(ValueError, match=r"train.steps must be a positive integer, got 0"):
        train(policy, session.pairs, loss, TrainSettings(beta=0.5, steps=0, optim=OptimConfig()))
    with pytest.raises(ValueError, match=r"optim.name must be one of adam, adamw, sgd, lbfgs, got 'lion'"):
        train(policy, session.pairs, loss, TrainSettings(beta=0.5, steps=5, optim=OptimConfig(name="lion")))
    with pytest.raises(ValueError, match=r"task.mode must be one of exact, sampled, got 'online'"):
        task.prepare(loss, beta=0.5, mode="online")
    with pytest.raises(ValueError, match=r"precision must be one of fp32, bf16, fp64, got 'fp8'"):
        train(policy, session.pairs, loss, TrainSettings(beta=0.5, steps=5, optim=OptimConfig(), precision="fp8"))
    with pytest.raises(ValueError, match=r"optim.betas must be two numbers in \[0, 1\)"):
        train(policy, session.pairs, loss, TrainSettings(beta=0.5, steps=5, optim=OptimConfig(betas=[0.9, 1.0])))
    with pytest.raises(ValueError, match=r"optim.betas applies to adam and adamw, not sgd"):
        train(policy, session.pairs, loss, TrainSettings(beta=0.5, steps=5, optim=OptimConfig("sgd", betas=[0.9, 0.9])))


def test_optim_betas_reach_torch_adam():
    """``optim.betas`` is torch.optim.Adam's own ``betas`` argument; None keeps torch's default (0.9, 0.999)."""
    from polopt.training.optim import make_optimiser

    weights = [torch.nn.Parameter(torch.zeros(3))]
    assert make_optimiser(weights, OptimConfig(betas=[0.9, 0.9]), 10)[0].param_groups[0]["betas"] == (0.9, 0.9)
    assert make_optimiser(weights, OptimConfig(), 10)[0].param_groups[0]["betas"] == (0.9, 0.999)


def test_reference_log_probs_are_cached_in_the_pairs():
    task = families.bradley_terry()
    session = task.prepare(losses.resolve_margin("logistic"), beta=0.5)
    log_ref = torch.log(torch.as_tensor(task.reference))
    torch.testing.assert_close(session.pairs.reference_winner, log_ref[session.pairs.prompt, session.pairs.winner])
