"""Training pair objectives through the one trainer, on every model and task.

The target of the exact-mode runs is an independent solve written here: the population objective
``sum_{x, i != j} W[x, i, j] ell(log pi_i, log pi_j, log ref_i, log ref_j, n_i, n_j)`` minimised by
scipy (BFGS, gradient by torch autograd in float64) over the softmax logits of every prompt. A
trained policy within TV 1e-3 of it (tabular) or 0.05 (a transformer on the sequence task) has
reached the optimum of the objective that the trainer minimised, lengths included.
"""

import dataclasses

import numpy as np
import pytest
import scipy.optimize
import torch

from polopt import losses
from polopt.losses.pair import PairScores
from polopt.losses.reduce import pair_scores, per_pair_losses, weighted_mean
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig
from toy_tasks.families import noisy_labels
from toy_tasks.finite.session import prepare
from toy_tasks.measures import total_variation


def scipy_optimum(objective, task, beta: float) -> np.ndarray:
    """argmin over pi of the population objective of ``task``: scipy BFGS on the logits (X, K)."""
    weights = torch.as_tensor(task.win_weights())  # (X, K, K)
    x, i, j = (torch.as_tensor(a) for a in np.nonzero(task.win_weights()))
    log_ref = torch.as_tensor(np.log(task.reference))  # (X, K)
    lengths = torch.as_tensor(np.asarray(task.lengths, dtype=np.float64))  # (X, K)
    shape = task.reference.shape

    def value_and_grad(z_flat):
        z = torch.tensor(z_flat.reshape(shape), requires_grad=True)
        logp = torch.log_softmax(z, dim=1)  # (X, K)
        pair = PairScores(logp[x, i], logp[x, j], log_ref[x, i], log_ref[x, j], lengths[x, i],
                                     lengths[x, j])
        total = (weights[x, i, j] * losses.as_pair_loss(objective)(pair, beta)).sum()
        (grad,) = torch.autograd.grad(total, z)
        return float(total.detach()), grad.numpy().reshape(-1)

    start = np.log(task.reference).reshape(-1)
    result = scipy.optimize.minimize(value_and_grad, start, jac=True, method="BFGS", options={"gtol": 1e-11,
                                                                                             "maxiter": 5000})
    z = result.x.reshape(shape)
    return np.exp(z - z.max(axis=1, keepdims=True)) / np.exp(z - z.max(axis=1, keepdims=True)).sum(axis=1,
                                                                                                      keepdims=True)


def task_with_lengths(seed: int = 0):
    """A noisy 4-response task (Bradley–Terry ranks with 20% flipped labels) whose responses are
    1, 2, 3 and 5 tokens long."""
    task = noisy_labels(n_responses=4, flip_rate=0.2, seed=seed)
    return dataclasses.replace(task, lengths=np.array([[1.0, 2.0, 3.0, 5.0]]))


def trained_policy(objective, task, *, beta=0.5, steps=2000, kind="tabular", mode="exact", lr=0.05, **kwargs):
    """Train ``objective`` with the pairs of ``task`` (the pairs and weights do not depend on the loss)."""
    session = prepare(task, losses.resolve_margin("logistic"), beta=beta, mode=mode, n_pairs=300, seed=0)
    policy = session.build_policy(kind=kind)
    result = train(policy, session.pairs, objective, TrainSettings(beta=beta, steps=steps, optim=OptimConfig(lr=lr),
                                                                 progress=False, log_every=max(steps // 10, 1),
                                                                 **kwargs))
    with torch.no_grad():
        return policy.log_distribution().exp().double().numpy(), result


@pytest.mark.parametrize("name", losses.builtin_names("pair"))
def test_every_builtin_reaches_the_independent_optimum_with_lengths(name):
    task = task_with_lengths()
    objective = losses.resolve(name)
    target = scipy_optimum(objective, task, beta=0.5)
    policy, _ = trained_policy(objective, task)
    assert total_variation(policy, target, task.prompt_weights) <= 1e-3, (policy, target)


def test_lengths_reach_the_objective():
    """Length-normalised SimPO and R-DPO have different optima with lengths than without (so the
    lengths travel from the task through the PairSet to the objective)."""
    with_lengths = task_with_lengths()
    without = dataclasses.replace(with_lengths, lengths=np.ones((1, 4)))
    for name in ("length_normalised_free", "length_regularised"):
        objective = losses.resolve(name)
        a = scipy_optimum(objective, with_lengths, beta=0.5)
        b = scipy_optimum(objective, without, beta=0.5)
        assert total_variation(a, b, with_lengths.prompt_weights) > 0.01, name
        trained, _ = trained_policy(objective, with_lengths)
        assert total_variation(trained, a, with_lengths.prompt_weights) <= 1e-3


def test_a_users_pair_objective_by_dotted_path_reaches_its_optimum():
    task = task_with_lengths(seed=1)
    objective = losses.resolve("user_losses:anchored_squared", weight=2.0)
    target = scipy_optimum(objective, task, beta=0.5)
    policy, _ = trained_policy(objective, task)
    assert total_variation(policy, target, task.prompt_weights) <= 1e-3


def test_margin_losses_train_bit_for_bit_as_before():
    """The adapter is the margin path: the logistic loss and f-DPO's reverse KL member give the
    same trained policy (up to float64 rounding), and smoothing trains through the swap."""
    task = task_with_lengths()
    a, _ = trained_policy(losses.resolve_margin("logistic"), task, steps=200, smoothing=0.1)
    b, _ = trained_policy(losses.resolve("divergence_reverse_kl"), task, steps=200, smoothing=0.1)
    np.testing.assert_allclose(a, b, rtol=1e-12)


def test_loglinear_model_reaches_the_optimum_too():
    task = task_with_lengths()
    objective = losses.resolve("divergence_jensen_shannon")
    policy, _ = trained_policy(objective, task, kind="loglinear")
    assert total_variation(policy, scipy_optimum(objective, task, beta=0.5), task.prompt_weights) <= 1e-3


def test_sampled_minibatches_lower_the_objective_over_all_pairs():
    """Minibatches of 32 from 300 sampled pairs: the objective over every pair (the empirical one)
    falls from its value at the reference."""
    task = task_with_lengths()
    objective = losses.resolve("length_normalised_free")
    session = prepare(task, losses.resolve_margin("logistic"), beta=0.5, mode="sampled", n_pairs=300, seed=0)
    policy = session.build_policy(kind="tabular")

    def full_objective():
        with torch.no_grad():
            p = session.pairs
            logp = policy.logprobs(torch.cat([p.prompt, p.prompt]), torch.cat([p.winner, p.loser]))
            return float(weighted_mean(per_pair_losses(objective, pair_scores(p, *logp.chunk(2)), beta=0.5), p.weight))

    before = full_objective()
    result = train(policy, session.pairs, objective, TrainSettings(beta=0.5, steps=300, batch_size=32,
                                                                 optim=OptimConfig(lr=0.05), progress=False))
    assert result.steps == 300 and full_objective() < before - 0.01


def test_wrong_shape_at_run_time_is_one_line():
    """An objective built without the probe (e.g. by hand) is still checked on every batch."""
    bad = losses.PairLoss("sums", lambda pair, beta: (pair.winner - pair.loser).sum(), {}, "user-supplied")
    with pytest.raises(ValueError, match=r"loss 'sums' returned shape \(\) for a batch of \d+ pairs"):
        trained_policy(bad, task_with_lengths(), steps=2)


def test_non_finite_at_run_time_stops_with_one_line():
    """1 / h_w is infinite at the reference, where training starts; built by hand (no probe), the
    trainer's own guard stops it with one line naming the step."""
    from user_losses import inverse_logratio

    objective = losses.PairLoss("inverse_logratio", inverse_logratio, {}, "user-supplied")
    with pytest.raises(FloatingPointError, match=r"step 1: the loss is (nan|inf)"):
        trained_policy(objective, task_with_lengths(), steps=2)


def test_finite_pairs_carry_the_task_lengths_and_none_without():
    """Lengths travel with each pair (winner's and loser's, from the task's (X, K) lengths); a task
    without lengths (1 each) leaves them None, so its checkpoints' fingerprints are unchanged."""
    task = task_with_lengths()
    pairs = prepare(task, losses.resolve_margin("logistic"), beta=0.5).pairs
    lengths = torch.as_tensor(task.lengths[0])
    assert torch.equal(pairs.len_winner, lengths[pairs.winner]) and torch.equal(pairs.len_loser, lengths[pairs.loser])
    assert prepare(noisy_labels(n_responses=4), losses.resolve_margin("logistic"), beta=0.5).pairs.len_winner is None
    batch = pairs.select(torch.tensor([2, 0]))
    assert batch.len_winner.tolist() == [pairs.len_winner[2].item(), pairs.len_winner[0].item()]
