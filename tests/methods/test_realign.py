"""Decoding-time realignment (polopt.methods.realign).

Checks against: the optimum re-solved at beta / lambda by toy_tasks.exact.margin (closed
forms of Rafailov et al. 2023 and Azar et al. 2023, and the Newton
solve for the exponential loss of Tang et al. 2024); the identities lambda = 0
-> the reference and lambda = 1 -> the trained policy (Liu et al., Decoding-time
Realignment of Language Models, 2024).
"""

import numpy as np
import pytest
import torch
from hydra import compose, initialize_config_dir

from polopt import losses
from polopt.commands.train import CONFIG_DIR, run
from polopt.methods.realign import equivalent_beta, realign
from toy_tasks.exact.margin import solve
from toy_tasks.families import bradley_terry, contextual, noisy_labels, nontransitive


def optimum_policy(task, loss, beta):
    opt = solve(loss, task.win_weights(), beta=beta, rewards=task.rewards, sampling=task.sampling,
                preference=task.preference, population=True)
    return task.policy_from_logratios(opt.logratios)


def test_lambda_zero_is_the_reference_and_one_the_trained_policy():
    generator = torch.Generator().manual_seed(0)
    reference = torch.log_softmax(torch.randn(3, 5, generator=generator, dtype=torch.float64), -1)
    trained = torch.log_softmax(torch.randn(3, 5, generator=generator, dtype=torch.float64), -1)
    torch.testing.assert_close(realign(reference, trained, 0.0), reference, atol=1e-15, rtol=0)
    torch.testing.assert_close(realign(reference, trained, 1.0), trained, atol=1e-15, rtol=0)


@pytest.mark.parametrize("task, loss", [(bradley_terry(), "logistic"), (contextual(seed=2), "logistic"),
                                        (nontransitive(), "squared"), (noisy_labels(), "exponential")])
@pytest.mark.parametrize("lam", [0.25, 0.5, 2.0, 3.0])
def test_realigned_optimum_is_the_optimum_at_beta_over_lambda(task, loss, lam):
    beta, f = 0.6, losses.resolve_margin(loss)
    trained = torch.as_tensor(np.log(optimum_policy(task, f, beta)))
    pi = realign(torch.as_tensor(np.log(task.reference)), trained, lam).exp().numpy()
    target = optimum_policy(task, f, equivalent_beta(beta, lam))
    assert float(task.prompt_weights @ (0.5 * np.abs(pi - target).sum(1))) < 1e-6


def test_offline_run_reports_the_realignment_sweep(tmp_path):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["train.steps=600", "train.progress=false", "method.realign=[0,0.5,2]"])
        summary = run(cfg, tmp_path)
    assert [r["lambda"] for r in summary["realigned"]] == [0.0, 0.5, 2.0]
    assert all(r["tv_to_optimum"] < 1e-3 for r in summary["realigned"])
    np.testing.assert_allclose(summary["realigned"][0]["policy"], summary["reference"], atol=1e-12)
    assert summary["realigned"][1]["beta_equivalent"] == pytest.approx(2 * summary["beta"])


def test_negative_lambda_is_refused():
    with pytest.raises(ValueError, match=r"realign lambda must be a finite number >= 0 \(0: the reference, 1: the "
                                         r"trained policy\), got -1"):
        realign(torch.zeros(2), torch.zeros(2), -1)
