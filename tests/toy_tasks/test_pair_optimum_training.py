"""Training reaches the certified optimum of every pair objective (issue 12's acceptance), and the
``reached_optimum`` verdict of summary.json (docs/reference/run-folder.md: every run with an exact target reports it).

Held against: the exact solver's certified optimum (itself checked against independent solves and
closed forms in test_pair_solve.py), an independent L-BFGS solve written in that file, and the
definition of total variation.
"""

import json

import numpy as np
import pytest
import torch
from helpers_exact import independent_policy, random_task
from hydra import compose, initialize_config_dir

from polopt import losses
from polopt.commands.train import CONFIG_DIR, run
from polopt.training.loop import OptimConfig, TrainSettings, train
from polopt.training.verdict import REACHED_TOLERANCE


def train_exact(objective, task, beta: float, steps: int = 2000):
    session = task.prepare(objective, beta=beta, mode="exact")
    policy = session.build_policy()
    result = train(policy, session.pairs, objective, TrainSettings(beta=beta, steps=steps, optim=OptimConfig(lr=0.05),
                                                                   log_every=steps, progress=False))
    return session, session.summarise(policy, result)


@pytest.mark.parametrize("index", range(len(losses.names("pair"))))
def test_every_builtin_reaches_its_certified_optimum(index):
    # random tasks with lengths, K = 4..8, 1-3 prompts; Bradley–Terry and general preferences in turn
    name = losses.names("pair")[index]
    task = random_task(20 + index, bradley_terry=index % 2 == 0)
    _, summary = train_exact(losses.resolve(name), task, beta=0.7)
    assert summary["optimum_finite"] and summary["optimum_residual"] <= 1e-7
    assert summary["tv_to_optimum"] <= 1e-3
    assert summary["reached_optimum"] is True


USER = ["length_normalised_reference_free", "winner_anchored", "logistic_with_winner_likelihood", "forward_kl"]


@pytest.mark.parametrize("name", USER)
def test_user_objectives_by_dotted_path_reach_their_optimum(name, tmp_path):
    # a task file with lengths, the objective named as a user names it; train.steps raised to 3000
    task = random_task(31, bradley_terry=False)
    path = task.save(tmp_path / "task.json")
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["task=file", f"task.path={path}", "loss=custom",
                                           f"loss.name=user_objectives:{name}", "beta=0.7", "train.steps=3000",
                                           "train.progress=false"])
    summary = run(cfg, tmp_path / "run")
    reported = np.asarray(summary["optimum"])
    import user_objectives

    independent = independent_policy(getattr(user_objectives, name), task, 0.7)
    assert 0.5 * np.abs(reported - independent).sum(axis=1).max() <= 1e-4
    assert summary["tv_to_optimum"] <= 1e-3 and summary["reached_optimum"] is True
    on_disk = json.loads((tmp_path / "run" / "summary.json").read_text())
    assert on_disk["reached_optimum"] is True and on_disk["optimum_method"].startswith("Newton in the softmax logits")


def test_a_boundary_optimum_reports_null_and_the_limit_support(tmp_path, capsys):
    # SimPO-style objective on deterministic labels: no finite optimum (derived in test_pair_solve.py)
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["task=deterministic", "task.n_responses=4",
                                           "loss=length_normalised_free", "train.steps=300", "train.progress=false"])
    summary = run(cfg, tmp_path)
    assert summary["optimum_finite"] is False and summary["optimum"] is None
    assert summary["reached_optimum"] is None and summary["limit_support"] == [[0]]
    assert all(np.isfinite(v) for v in (summary["optimum_value"], summary["optimum_residual"]))
    assert "reached_optimum: null" in capsys.readouterr().out


def test_the_verdict_is_said_on_screen(tmp_path, capsys):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["train.steps=20", "train.progress=false"])
    summary = run(cfg, tmp_path)
    out = capsys.readouterr().out
    assert summary["reached_optimum"] is False and summary["reached_optimum_tolerance"] == REACHED_TOLERANCE
    assert f"reached_optimum: false (tv_to_optimum {summary['tv_to_optimum']:.3g} > 0.001)" in out
    torch.set_num_threads(1)  # the run set the finite task's thread count; keep the tests' setting
