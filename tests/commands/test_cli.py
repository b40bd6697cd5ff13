"""The command line as a user meets it: run folders, summary.json, one-line errors."""

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from helpers_cli import polopt

from polopt.commands.main import main

ROOT = Path(__file__).resolve().parents[2]


SUMMARY_FIELDS = {"loss", "beta", "policy", "optimum", "optimum_finite", "tv_to_optimum", "loss_gap", "steps",
                  "seconds"}


def test_default_train_prints_the_policy_beside_the_optimum(tmp_path):
    out = polopt("train", f"hydra.run.dir={tmp_path}", "train.progress=false")
    assert out.returncode == 0, out.stderr
    assert "reference   trained   optimum" in out.stdout
    summary = json.loads((tmp_path / "summary.json").read_text())
    assert SUMMARY_FIELDS <= set(summary)
    assert summary["tv_to_optimum"] <= 1e-3
    lines = (tmp_path / "metrics.jsonl").read_text().splitlines()
    # the quick start stops once converged (train.tol, the finite tasks' default) and says so
    assert json.loads(lines[-1])["step"] == summary["steps"] < 2000 and summary["stopped"] == "tol"
    assert (tmp_path / "config.yaml").is_file() and list((tmp_path / "checkpoints").glob("ckpt-*.pt"))


def test_swapping_loss_task_and_mode_by_overrides(tmp_path):
    out = polopt("train", "loss=hinge", "beta=0.3", "task=nontransitive", "task.mode=sampled", "task.n_pairs=400",
                 "train.steps=300", "train.progress=false", f"hydra.run.dir={tmp_path}")
    assert out.returncode == 0, out.stderr
    summary = json.loads((tmp_path / "summary.json").read_text())
    assert summary["loss_name"] == "hinge" and summary["beta"] == 0.3 and summary["mode"] == "sampled"
    assert "tv_to_population_optimum" in summary


def test_user_loss_by_dotted_path(tmp_path):
    (tmp_path / "team_losses.py").write_text(
        "import torch\n\ndef soft_hinge(x):\n    return torch.nn.functional.softplus(1.0 - x)\n")
    env_dir = tmp_path / "run"
    out = subprocess.run([sys.executable, "-m", "polopt", "train", "loss=team_losses:soft_hinge",
                          "train.steps=200", "train.progress=false", f"hydra.run.dir={env_dir}"],
                         capture_output=True, text=True, cwd=ROOT, timeout=300,
                         env={**os.environ, "PYTHONPATH": f"{ROOT}{os.pathsep}{tmp_path}"})
    assert out.returncode == 0, out.stderr
    assert json.loads((env_dir / "summary.json").read_text())["loss_name"] == "team_losses:soft_hinge"


def test_logistic_on_deterministic_preferences_says_no_finite_optimum(tmp_path):
    out = polopt("train", "task=deterministic", "train.progress=false", f"hydra.run.dir={tmp_path}")
    assert out.returncode == 0, out.stderr
    assert "no finite optimum exists for logistic" in out.stdout and "still growing" in out.stdout
    summary = json.loads((tmp_path / "summary.json").read_text())
    assert summary["optimum"] is None and summary["optimum_finite"] is False


BAD_TASKS = {
    "negative": ({"reference": [0.6, -0.1, 0.5], "rewards": [0, 1, 2]}, "field 'reference' entry 1 is -0.1"),
    "not_normalised": ({"reference": [0.5, 0.4, 0.4], "rewards": [0, 1, 2]}, "field 'reference' sums to 1.3"),
    "antisymmetry": ({"reference": [0.5, 0.5], "preference": [[0.5, 0.9], [0.3, 0.5]]},
                     "P[0][1] + P[1][0] = 1.2, must be 1"),
    "shape": ({"reference": [0.5, 0.5], "preference": [[0.5, 0.9, 0.1]]}, "field 'preference' must have shape"),
}


@pytest.mark.parametrize("case", sorted(BAD_TASKS))
def test_bad_task_file_is_one_clear_line(tmp_path, case, capsys):
    """In process (the same error boundary as ``python -m polopt``, tested in a subprocess below)."""
    data, message = BAD_TASKS[case]
    path = tmp_path / "task.json"
    path.write_text(json.dumps(data))
    assert main(["train", "task=file", f"task.path={path}", f"hydra.run.dir={tmp_path / 'run'}"]) == 2
    err = capsys.readouterr().err
    assert message in err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1


@pytest.mark.parametrize("args,message", [
    (["loss=crossentropy"], "polopt train: error: unknown loss 'crossentropy'; choose one of: anchored_lower_both, "
                            "anchored_raise_lower, calibrated_logistic, chi_squared_link"),
    (["beta=0"], "polopt train: error: beta must be a number > 0"),
    (["beta=-2"], "polopt train: error: beta must be a number > 0"),
    (["task=file"], "task=file needs task.path=PATH"),
    (["task=bandit"], "polopt train: error: unknown task 'bandit'; choose one of: bradley_terry"),
    (["loss.name=nothing_here"], "polopt train: error: unknown loss 'nothing_here'; known losses: logistic"),
    (["optim=lbfgs", "task.mode=sampled", "train.batch_size=8"],
     "polopt train: error: optim=lbfgs's line search needs one fixed objective: set train.batch_size=null"),
])
def test_bad_options_are_one_clear_line(tmp_path, args, message, capsys):
    assert main(["train", *args, f"hydra.run.dir={tmp_path}"]) == 2
    err = capsys.readouterr().err
    assert message in err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1


def test_a_mistake_through_python_m_polopt_is_one_line_and_exit_2(tmp_path):
    out = polopt("train", "beta=0", f"hydra.run.dir={tmp_path}")
    assert out.returncode == 2
    assert out.stderr == "polopt train: error: beta must be a number > 0 (e.g. beta=0.1), got 0\n"


def test_help_explains_the_commands():
    out = polopt("--help")
    assert out.returncode == 0 and "train" in out.stdout and "export" in out.stdout
    train_help = polopt("train", "--help")
    assert train_help.returncode == 0 and "loss: " in train_help.stdout and "hydra.run.dir" in train_help.stdout


def test_export_writes_a_task_file_that_loads(tmp_path):
    out = polopt("export", "nontransitive", str(tmp_path / "cycle.json"))
    assert out.returncode == 0, out.stderr
    data = json.loads((tmp_path / "cycle.json").read_text())
    assert data["preference"][0][1] == pytest.approx(2 / 3)
    again = polopt("train", "task=file", f"task.path={tmp_path / 'cycle.json'}", "loss=squared", "train.steps=50",
                   "train.progress=false", f"hydra.run.dir={tmp_path / 'run'}")
    assert again.returncode == 0, again.stderr
