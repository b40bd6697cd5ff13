"""Pair objectives through the commands and on every task: the README's worked example (train and
check by dotted path), one-line errors with exit code 2, task=pairs (real token lengths), the
sequence task with a transformer against its exact optimum, and polopt.testing.

The sequence task's exact optimum is the pair solver's (toy_tasks/exact/pairs.py, checked against an
independent solve in tests/toy_tasks/test_pair_solve.py); the sequence runs are held to TV <= 0.05 of it.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
import torch
from hydra import compose, initialize_config_dir

from polopt import losses
from polopt.commands.main import main
from polopt.commands.train import CONFIG_DIR, run
from polopt.testing import assert_reaches_optimum, assert_sound_loss
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig
from toy_tasks.families import noisy_labels
from toy_tasks.sequence.task import sequence_task

ROOT = Path(__file__).resolve().parents[2]
TESTS = Path(__file__).resolve().parents[1]


def polopt(*args, extra_path: Path | None = None):
    path = os.pathsep.join(str(p) for p in (ROOT, TESTS, extra_path) if p is not None)
    env = {**os.environ, "PYTHONPATH": path}
    env.pop("POLOPT_DEBUG", None)
    return subprocess.run([sys.executable, "-m", "polopt", *args], capture_output=True, text=True, cwd=ROOT,
                          env=env, timeout=600)


def readme_example(tmp_path: Path) -> Path:
    """The worked example's team_objectives.py, taken from docs/guides/pair-objectives.md itself (so the page
    stays true)."""
    text = (ROOT / "docs" / "guides" / "pair-objectives.md").read_text(encoding="utf-8")
    code = re.search(r"```python\n(# team_objectives\.py\n.*?)```", text, re.S).group(1)
    (tmp_path / "team_objectives.py").write_text(code, encoding="utf-8")
    return tmp_path


@pytest.mark.slow
def test_the_readme_example_trains_and_checks_by_dotted_path(tmp_path):
    where = readme_example(tmp_path)
    out = polopt("train", "loss=team_objectives:my_objective", "loss.weight=2.0", "task=noisy_labels",
                 "train.progress=false", f"hydra.run.dir={tmp_path / 'run'}", extra_path=where)
    assert out.returncode == 0, out.stderr
    summary = json.loads((tmp_path / "run" / "summary.json").read_text())
    assert summary["loss_name"] == "team_objectives:my_objective" and summary["reached_optimum"] is True
    assert summary["tv_to_optimum"] <= 1e-3
    config = (tmp_path / "run" / "config.yaml").read_text()
    assert "weight: 2.0" in config  # loss.weight reached the function
    out = polopt("check", "team_objectives:my_objective", "loss.weight=2.0", "--tasks", "noisy_labels",
                 "--json", extra_path=where)
    assert out.returncode == 0, out.stderr
    report = json.loads(out.stdout)
    status = {c["name"]: c["status"] for c in report["checks"]}
    assert status["per_pair"] == status["finite"] == status["winner_signal"] == "pass"
    assert status["reference_pull"] == status["noisy_optimum"] == status["population:noisy_labels"] == "pass"
    assert status["taylor"] == status["pair_optimum"] == "skip"
    reason = {c["name"]: c["reason"] for c in report["checks"]}
    assert reason["pair_optimum"].startswith("not applicable: x*(p)")


@pytest.mark.parametrize("name, message", [
    ("user_losses:three_arguments", r"loss 'user_losses:three_arguments' takes \(pair, beta, gamma\)"),
    ("user_losses:batch_mean", r"loss 'user_losses:batch_mean' returned shape \(\) for a batch of 4 pairs"),
    ("user_losses:log_of_logratio", r"loss 'user_losses:log_of_logratio' returned non-finite values"),
    ("user_losses:inverse_logratio", r"returned non-finite values \[inf, .* on the same 4 pairs at the "
                                     r"reference"),
])
def test_bad_objectives_stop_with_one_line_and_exit_2(tmp_path, name, message, capsys):
    """In process (tests/ is on the path, as PYTHONPATH puts it for a user; the command line's own
    boundary is tested in tests/commands/test_cli.py)."""
    assert main(["train", f"loss={name}", "train.steps=5", "train.progress=false", f"hydra.run.dir={tmp_path}"]) == 2
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("polopt train: error: ") and re.search(message, lines[0]), err


def test_a_parameter_the_objective_does_not_take_is_named(tmp_path, capsys):
    assert main(["train", "loss=user_losses:anchored_squared", "loss.gamma=1", "train.steps=5",
                 "train.progress=false", f"hydra.run.dir={tmp_path}"]) == 2
    assert "got unknown parameter(s) gamma; it takes: weight" in capsys.readouterr().err


# ---------------------------------------------------------------- task=pairs: real token lengths


def test_task_pairs_trains_a_length_reading_objective(tmp_path):
    rows = [{"prompt": f"q{i}?", "winner": "yes " * (1 + i % 3), "loser": f"no {i}"} for i in range(16)]
    path = tmp_path / "pairs.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=[
            "task=pairs", f"task.path={path}", "model=transformer", "model.width=16", "model.layers=1",
            "model.heads=2", "model.context=32", "train.steps=4", "train.batch_size=8", "train.log_every=1",
            "train.progress=false", "loss=length_normalised_free"])
    summary = run(cfg, tmp_path / "run")
    assert summary["loss_name"] == "length_normalised_free" and summary["n_pairs"] == 16
    assert all(torch.isfinite(torch.tensor(summary[k])) for k in ("loss", "margin_mean"))


def test_token_lengths_of_task_pairs_are_the_responses_real_tokens(tmp_path):
    from polopt.pairfile.task import pair_task

    rows = [{"prompt": "q?", "winner": "ab", "loser": "abcde"}, {"prompt": "r?", "winner": "xyz", "loser": "x"}]
    path = tmp_path / "p.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    session = pair_task(path=str(path)).prepare(losses.resolve("length_regularised"), beta=0.5,
                                               mode="sampled", n_pairs=None, seed=0, run_dir=tmp_path)
    session.build_policy(kind="transformer", width=16, layers=1, heads=2, context=16)
    # byte tokens: the text's bytes plus the end token the encoder appends to a response
    assert session.pairs.len_winner.tolist() == [3, 4] and session.pairs.len_loser.tolist() == [6, 2]


# ---------------------------------------------------------------- the sequence task: a transformer


SMALL = dict(n_symbols=3, max_length=3, n_prompts=2, reference_width=16, reference_layers=1, reference_heads=2,
             reference_sharpness=10.0, seed=0)
MODEL = dict(kind="transformer", width=16, layers=1, heads=2, context=8, seed=0)


@pytest.fixture(scope="module")
def small_sequence_task():
    return sequence_task(**SMALL)


@pytest.mark.parametrize("name", ["length_normalised_free", "length_regularised", "odds_ratio_with_nll"])
def test_sequence_task_transformer_reaches_the_exact_optimum(small_sequence_task, name):
    objective = losses.resolve(name)
    session = small_sequence_task.prepare(objective, beta=0.5)
    assert session.finite.optimum.finite
    assert len(set(session.finite.task.lengths[0].tolist())) > 1  # responses of different token counts
    policy = session.build_policy(**MODEL, init="reference")
    result = train(policy, session.pairs, objective, TrainSettings(beta=0.5, steps=300, optim=OptimConfig(lr=0.01),
                                                                 log_every=50, progress=False),
                   evaluate=session.evaluate)
    assert result.final["tv_to_optimum"] <= 0.05


# ---------------------------------------------------------------- polopt.testing


def test_assert_reaches_optimum_takes_a_pair_objective():
    from user_losses import anchored_squared

    facts = assert_reaches_optimum(anchored_squared, noisy_labels(n_responses=4), beta=0.5, tol=1e-4)
    assert facts["tv_to_optimum"] <= 1e-4
    assert_sound_loss("divergence_jensen_shannon")


def test_assert_sound_loss_fails_a_pair_objective_rewarding_the_loser():
    def flipped(pair, beta):  # DPO with winner and loser exchanged: a sign error
        return torch.nn.functional.softplus(beta * (pair.logratio_winner - pair.logratio_loser))

    with pytest.raises(AssertionError, match="winner_signal: at the reference the loss rises with the winner"):
        assert_sound_loss(flipped)
