"""Early stopping on ``train.tol`` (polopt.training.stopping): when it stops, where it ends, and resumes.

The optimum to compare with is the closed form of the DPO paper (Rafailov et al., Direct
Preference Optimization, 2023): for the logistic loss on Bradley–Terry preferences,
pi* ∝ pi_ref e^{r / beta}; and the IPO paper's for the squared loss (Azar et al., A General
Theoretical Paradigm to Understand Learning from Human Preferences, 2023), both computed by
toy_tasks independently of the trainer.
"""

from __future__ import annotations

import copy
import json

import pytest
import torch
from helpers_resume import assert_same_state, without_seconds
from hydra import compose, initialize_config_dir

from polopt import losses
from polopt.checkpoints import store as checkpoint
from polopt.commands.train import CONFIG_DIR, run
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig
from polopt.training.stopping import FINITE_TASK_TOL, WINDOW, Convergence, validate_tol
from toy_tasks.families import bradley_terry, nontransitive


def test_one_quiet_step_does_not_stop_a_run():
    c = Convergence(1e-3)
    assert not c.update(1.0, 1e-9)  # no previous loss: its change is unknown
    quiet = [c.update(1.0, 1e-9) for _ in range(WINDOW - 1)]
    assert not any(quiet)
    assert not c.update(2.0, 1e-9)  # the loss moved: the window starts over
    assert not any(c.update(2.0, 1e-9) for _ in range(WINDOW - 1))
    assert c.update(2.0, 1e-9)  # WINDOW quiet steps in a row


def test_a_large_gradient_or_a_skipped_step_restarts_the_window():
    c = Convergence(1e-3)
    for _ in range(WINDOW):
        c.update(1.0, 1e-9)
    c.skip()
    assert not any(c.update(1.0, 1e-9) for _ in range(WINDOW))  # the first has no previous loss again
    assert not c.update(1.0, 1.0)  # a large gradient
    assert c.quiet == 0


def test_off_by_default_and_at_zero():
    for tol in (None, 0, 0.0):
        c = Convergence(tol)
        assert not any(c.update(1.0, 0.0) for _ in range(3 * WINDOW))


@pytest.mark.parametrize("tol", [-1e-3, "small", float("nan"), float("inf"), True])
def test_a_bad_tol_is_one_line(tol):
    with pytest.raises(ValueError, match=r"train.tol must be a number >= 0 \(0 or null: run every step\), got"):
        validate_tol(tol)


@pytest.mark.parametrize(("task", "loss_name", "beta"), [(bradley_terry(), "logistic", 0.5),
                                                         (nontransitive(), "squared", 0.3)])
def test_early_stopping_ends_within_the_tolerance_of_the_optimum(task, loss_name, beta):
    loss = losses.resolve_margin(loss_name)
    session = task.prepare(loss, beta=beta, mode="exact")
    policy = session.build_policy()
    result = train(policy, session.pairs, loss, TrainSettings(beta=beta, steps=2000, optim=OptimConfig(),
                                                              progress=False, log_every=2000, tol=FINITE_TASK_TOL))
    summary = session.summarise(policy, result)
    assert result.stopped == "tol" and result.steps < 2000 and summary["steps"] == result.steps
    # the gradient norm is below FINITE_TASK_TOL at the stop; the closed-form optimum is then within rounding
    # of float64 (the full 2000 steps reach about 1e-16; the README quotes the worst over all tasks)
    assert summary["tv_to_optimum"] < 1e-10, summary["tv_to_optimum"]
    assert abs(summary["loss_gap"]) < 1e-12
    assert result.final["grad_norm"] < FINITE_TASK_TOL


def test_a_run_that_does_not_converge_in_time_runs_every_step():
    loss = losses.resolve_margin("logistic")
    session = bradley_terry().prepare(loss, beta=0.5, mode="exact")
    result = train(session.build_policy(), session.pairs, loss,
                   TrainSettings(beta=0.5, steps=30, optim=OptimConfig(), progress=False, tol=FINITE_TASK_TOL))
    assert result.stopped == "steps" and result.steps == 30


def _exact_run(steps, **kwargs):
    loss = losses.resolve_margin("logistic")
    session = bradley_terry(n_responses=4, seed=3).prepare(loss, beta=0.5, mode="exact")
    policy = session.build_policy()
    result = train(policy, session.pairs, loss, TrainSettings(beta=0.5, steps=steps, optim=OptimConfig(),
                                                              progress=False, log_every=3, seed=7, tol=1e-7,
                                                              checkpoint_every=1), **kwargs)
    return policy, result


@pytest.mark.slow
def test_resume_inside_the_window_stops_at_the_same_step_bit_identical(tmp_path):
    saved = {}
    policy_full, full = _exact_run(2000, save_checkpoint=lambda s: saved.update(full=copy.deepcopy(s)))
    assert full.stopped == "tol" and full.steps < 2000
    k = full.steps - WINDOW // 2  # interrupted while the run counts its quiet steps

    class Stop(Exception):
        pass

    def save_then_stop(state):
        checkpoint.save(tmp_path, state, run_id="r", fingerprint="f", config={}, keep=2)
        if state["step"] == k:
            raise Stop

    with pytest.raises(Stop):
        _exact_run(2000, save_checkpoint=save_then_stop)
    state = checkpoint.load_latest(tmp_path)
    assert 0 < state["convergence"]["quiet"] < WINDOW
    policy_resumed, resumed = _exact_run(2000, resume=state,
                                         save_checkpoint=lambda s: saved.update(resumed=copy.deepcopy(s)))
    assert (resumed.steps, resumed.stopped) == (full.steps, "tol")
    for name, p in policy_full.state_dict().items():
        assert torch.equal(p, policy_resumed.state_dict()[name]), name
    assert_same_state(saved["full"], {key: v for key, v in saved["resumed"].items()})
    assert without_seconds(full.history) == without_seconds(resumed.history)
    # resuming from the final checkpoint of a converged run takes no further step
    again = copy.deepcopy(saved["full"])
    policy_again, after = _exact_run(2000, resume=again)
    assert (after.steps, after.stopped) == (full.steps, "tol")
    for name, p in policy_full.state_dict().items():
        assert torch.equal(p, policy_again.state_dict()[name]), name


def test_summary_says_how_many_steps_ran_and_why(tmp_path):
    def summary(*overrides):
        with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
            cfg = compose("config", overrides=["train.progress=false", *overrides])
        run_dir = tmp_path / str(len(list(tmp_path.iterdir())))
        run(cfg, run_dir)
        return json.loads((run_dir / "summary.json").read_text())

    quick = summary()  # the quick start: a finite task, train.tol null -> the finite tasks' default
    assert quick["stopped"] == "tol" and quick["steps"] < 2000 and quick["tv_to_optimum"] < 1e-10
    full = summary("train.tol=0", "train.steps=600")
    assert full["stopped"] == "steps" and full["steps"] == 600
