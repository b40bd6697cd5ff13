"""Self-play with the squared loss (polopt.methods.selfplay).

Checks against: the Nash equilibrium of the regularised preference game at
tau = beta / 2 (Munos et al. 2023; Calandriello et al., Human Alignment of Large
Language Models through Online Preference Optimisation, 2024), computed by
toy_tasks.methods.equilibrium independently of the trainer; the symmetry argument for a
symmetric cycle with a uniform reference; the offline squared optimum of Azar et
al. 2023 (toy_tasks.exact.margin) as the point self-play must *not* end at when the
reference is not the equilibrium.
"""

import numpy as np
import pytest
import scipy.special
import torch
from hydra import compose, initialize_config_dir

from polopt import losses
from polopt.commands.train import CONFIG_DIR, run
from polopt.methods.selfplay import best_response_divergence, selfplay_objective
from toy_tasks.families import bradley_terry, nontransitive
from toy_tasks.finite.task import make_task
from toy_tasks.methods.equilibrium import nash_equilibrium, tau_of_beta


def tv(p, q):
    return float(0.5 * np.abs(np.asarray(p) - np.asarray(q)).sum(-1).mean())


def trained(policy):
    with torch.no_grad():
        return policy.log_distribution().exp().numpy()


def equilibrium(task, beta):
    return nash_equilibrium(task.reference, task.preference, tau=tau_of_beta(beta)).policy


def test_symmetric_cycle_with_uniform_reference_ends_uniform(run_method):
    task = nontransitive(uniform_reference=True)
    _, policy, _ = run_method(task, "selfplay", beta=0.5, steps=300)
    np.testing.assert_allclose(trained(policy), np.full((1, 3), 1 / 3), atol=1e-6)


@pytest.mark.parametrize("task, beta", [(nontransitive(), 0.5), (nontransitive(seed=3), 0.2),
                                         (bradley_terry(seed=2), 1.0)])
def test_reaches_the_nash_equilibrium(run_method, task, beta):
    _, policy, _ = run_method(task, "selfplay", beta=beta, steps=1000)
    assert tv(trained(policy), equilibrium(task, beta)) < 1e-3


@pytest.mark.parametrize("seed", range(3))
def test_reaches_the_equilibrium_on_random_preferences(run_method, seed):
    rng = np.random.default_rng(seed)
    k = int(rng.integers(2, 7))
    upper = np.triu(rng.random((k, k)), 1)
    task = make_task(rng.dirichlet(np.ones(k)), upper + np.tril(1 - upper.T, -1) + 0.5 * np.eye(k))
    beta = float(rng.uniform(0.2, 2.0))
    _, policy, _ = run_method(task, "selfplay", beta=beta, steps=800, lr=0.1)
    assert tv(trained(policy), equilibrium(task, beta)) < 1e-3


def test_sampled_pairs_end_near_the_equilibrium(run_method):
    task = nontransitive()
    _, policy, _ = run_method(task, "selfplay", beta=0.5, steps=1000, estimator="sampled", batch_size=256)
    assert tv(trained(policy), equilibrium(task, 0.5)) < 0.02  # label noise: loose, seeded


def test_offline_squared_and_selfplay_end_at_different_policies_on_a_nontransitive_task(tmp_path):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        common = ["task=nontransitive", "beta=0.5", "train.steps=800", "train.progress=false"]
        offline = run(compose("config", overrides=[*common, "loss=squared"]), tmp_path / "offline")
        selfplay = run(compose("config", overrides=[*common, "method=selfplay"]), tmp_path / "selfplay")
    assert selfplay["tv_to_equilibrium"] < 1e-3 and selfplay["tv_to_optimum"] < 1e-3
    assert offline["tv_to_optimum"] < 1e-3  # it reaches its own (IPO) optimum ...
    assert offline["tv_to_equilibrium"] > 1e-2  # ... which is not the equilibrium
    assert tv(offline["policy"], selfplay["policy"]) > 1e-2
    np.testing.assert_allclose(selfplay["equilibrium"], equilibrium(nontransitive(), 0.5), atol=1e-12)
    assert any("Nash equilibrium" in note for note in selfplay["notes"])


def test_an_unconverged_gradient_run_says_so(tmp_path):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        summary = run(compose("config", overrides=["task=nontransitive", "beta=0.05", "task.seed=5", "train.steps=50",
                                                   "method=selfplay", "method.update=gradient",
                                                   "train.progress=false"]), tmp_path)
    assert summary["tv_to_optimum"] > 1e-3 and summary["reached_optimum"] is False
    assert any(note.startswith("gradient self-play has not converged (TV > 1e-3)") for note in summary["notes"])


def test_gradient_selfplay_still_reaches_the_equilibrium_at_moderate_beta(run_method):
    task = nontransitive()
    _, policy, _ = run_method(task, "selfplay", beta=0.5, steps=1000, update="gradient")
    assert tv(trained(policy), equilibrium(task, 0.5)) < 1e-3


def test_the_best_response_divergence_is_tau_times_the_jeffreys_divergence_and_zero_at_the_equilibrium():
    """D(pi) = tau (KL(pi || BR) + KL(BR || pi)), BR(pi) ∝ pi_ref exp(P pi / tau) (Munos et al. 2023),
    here against scipy's rel_entr; zero at the equilibrium of toy_tasks.methods.equilibrium."""
    task, beta = nontransitive(seed=3), 0.2
    tau = tau_of_beta(beta)
    reference, preference = torch.as_tensor(np.log(task.reference)), torch.as_tensor(task.preference)
    pi = task.reference
    best = scipy.special.softmax(np.log(task.reference) + np.einsum("xij,xj->xi", task.preference, pi) / tau, axis=1)
    expected = tau * (scipy.special.rel_entr(pi, best) + scipy.special.rel_entr(best, pi)).sum(1)
    got = best_response_divergence(reference, reference, preference, tau=tau).numpy()
    np.testing.assert_allclose(got, expected, rtol=1e-10)
    assert got[0] > 1e-3
    at_equilibrium = torch.as_tensor(np.log(equilibrium(task, beta)))
    assert float(best_response_divergence(at_equilibrium, reference, preference, tau=tau)[0]) < 1e-20


@pytest.mark.parametrize("keys, message", [
    ({"update": "fixed_point", "estimator": "sampled"}, r"method.update=fixed_point needs method.estimator=exact"),
    ({"update": "fixed_point", "loss": "hinge"}, r"method.update=fixed_point solves the squared loss's game .* "
                                                 r"got method.loss=hinge"),
    ({"update": "newton"}, r"method.update must be one of fixed_point, gradient or null, got 'newton'"),
])
def test_update_errors_name_the_key(keys, message):
    task = nontransitive()
    session = task.prepare(losses.resolve_margin("squared"), beta=0.5)
    env = session.for_method("selfplay").environment()
    with pytest.raises(ValueError, match=message):
        loss = losses.resolve_margin(keys.pop("loss", "squared"))
        selfplay_objective(session.build_policy("tabular"), env, loss, beta=0.5,
                           **keys)
