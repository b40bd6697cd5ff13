"""The command layer (polopt/commands/): one error boundary, one allow-listed way from config to a task,
one grammar of ``key=value`` config keys, polopt's own one-line config errors, fast help, no debris."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from polopt.commands import config
from polopt.commands.main import main

ROOT = Path(__file__).resolve().parents[2]


def _one_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    return err[0]


# ---------------------------------------------------------------- the allow-list, in every command

def _target_cases(marker: Path) -> dict[str, list[str]]:
    top = ["task._target_=os.makedirs", f"+task.name={marker}"]
    nested = [f"+task.extra={{_target_: os.makedirs, name: '{marker}'}}"]
    return {"top": top, "nested": nested}


@pytest.mark.parametrize("where", ["top", "nested"])
@pytest.mark.parametrize("command", ["train", "train -m", "export", "compare", "realign", "check", "demo",
                                     "data", "sft", "reward"])
def test_every_command_refuses_a_target_outside_the_task_packages_and_creates_nothing(
        command, where, tmp_path, monkeypatch, capsys):
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    marker = tmp_path / "made_by_target"
    keys = _target_cases(marker)[where]
    out = str(work / "out")
    argv = {"train": ["train", *keys, f"hydra.run.dir={out}"],
            "train -m": ["train", "-m", *keys, f"hydra.sweep.dir={out}"],
            "export": ["export", "bradley_terry", str(work / "task.json"), *keys],
            "compare": ["compare", *keys, f"hydra.run.dir={out}", "--quiet"],
            "realign": ["realign", *keys, f"hydra.run.dir={out}", "--quiet"],
            "check": ["check", "logistic", *keys, "--quick"],
            "demo": ["demo", *keys, "--quick", f"hydra.run.dir={out}"],
            "data": ["data", *keys],
            "sft": ["sft", *keys, f"hydra.run.dir={out}"],
            "reward": ["reward", *keys, f"hydra.run.dir={out}"]}[command]
    assert main(argv) == 2
    line = _one_line(capsys)
    assert line.startswith(f"polopt {command.split()[0]}: error: ")
    assert not marker.exists() and list(work.iterdir()) == []  # no file, no folder


def test_a_hydra_callback_cannot_name_code(tmp_path, capsys):
    marker = tmp_path / "made_by_callback"
    argv = ["train", f"+hydra.callbacks.x={{_target_: os.makedirs, name: '{marker}'}}",
            f"hydra.run.dir={tmp_path / 'run'}"]
    assert main(argv) == 2
    assert _one_line(capsys) == ("polopt train: error: hydra.callbacks.x: a _target_ ('os.makedirs') is not allowed "
                                 "here; config keys hold data only (a task's builder goes in task._target_)")
    assert not marker.exists() and not (tmp_path / "run").exists()


def test_build_task_is_the_one_way_and_admits_the_task_packages():
    task = config.build_task(config.compose(["task=nontransitive"]).task)
    assert type(task).__module__.startswith("toy_tasks.")
    with pytest.raises(ValueError, match=r"^task._target_ must name a task builder in toy_tasks or polopt, got "
                                         r"'os.getcwd'"):
        config.build_task(config.compose(["task._target_=os.getcwd"]).task)


# ---------------------------------------------------------------- polopt's own config errors

@pytest.mark.parametrize("argv, message", [
    (["train.stepz=10"], "unknown key 'train.stepz'; did you mean train.steps or train.seed?"),
    (["stepz=10"], "unknown key 'stepz'; did you mean train.steps"),
    (["optim.lrr=0.1"], "unknown key 'optim.lrr'; did you mean optim.lr?"),
    (["beta=0.1,0.3"], "'beta=0.1,0.3' is a list of values: to sweep over them, add -m (polopt train -m "
                       "beta=0.1,0.3); to give a list as one value, write beta=[0.1,0.3]"),
    (["-m", "loss=logistc,squared"], "unknown loss 'logistc'; choose one of: "),
    (["-m", "train.stepz=1,2"], "unknown key 'train.stepz'; did you mean train.steps or train.seed?"),
    (["-m", "model=tabular,transfomer"], "unknown model 'transfomer'; choose one of: "),
    (["loss.delta=0.5"], "loss=logistic has no key 'delta' (its keys: name, smoothing); delta belongs to "
                         "loss=huber: choose it first, e.g. loss=huber loss.delta=..."),
    (["beta=0"], "beta must be a number > 0 (e.g. beta=0.1), got 0"),
    (["--config-dir", "/tmp"], "polopt train reads the kit's own config folder; give settings as key=value "
                               "(or +experiment=NAME), not --config-path, --config-name or --config-dir"),
])
def test_train_config_mistakes_are_polopts_own_one_line(argv, message, tmp_path, capsys):
    run_dir = tmp_path / "runs" / "one"
    key = "hydra.sweep.dir" if "-m" in argv else "hydra.run.dir"
    assert main(["train", *argv, f"{key}={run_dir}"]) == 2
    line = _one_line(capsys)
    assert line.startswith(f"polopt train: error: {message}")
    assert "+" not in line.partition("error: ")[2].replace("+experiment", "")  # never advises +key for a typo
    assert not (tmp_path / "runs").exists()


@pytest.mark.parametrize("argv, message", [
    (["task.n_respones=4"], "polopt export: error: unknown key 'task.n_respones'; did you mean task.n_responses?"),
    (["beta=0.3"], "polopt export: error: polopt export reads task.KEY only; 'beta=0.3' would change nothing here"),
    (["task.n_responses=3,4"], "polopt export: error: 'task.n_responses=3,4' is a list of values: polopt export "
                               "takes one value a key (polopt train -m and polopt compare sweep over lists); "
                               "to give a list as one value, write task.n_responses=[3,4]"),
])
def test_export_keys_are_checked(argv, message, tmp_path, capsys):
    out = tmp_path / "task.json"
    assert main(["export", "bradley_terry", str(out), *argv]) == 2
    assert _one_line(capsys) == message and not out.exists()


def test_export_takes_task_keys(tmp_path, capsys):
    out = tmp_path / "task.json"
    assert main(["export", "bradley_terry", str(out), "task.n_responses=4"]) == 0
    assert len(json.loads(out.read_text())["reference"]) == 4


def test_compare_and_realign_check_every_combination_before_any_folder(tmp_path, capsys):
    out = tmp_path / "cmp"
    assert main(["compare", "loss=logistic,squaredd", f"hydra.run.dir={out}", "--quiet"]) == 2
    assert _one_line(capsys).startswith("polopt compare: error: unknown loss 'squaredd'; choose one of: ")
    assert main(["compare", "beta=0.5,0", f"hydra.run.dir={out}", "--quiet"]) == 2
    assert _one_line(capsys) == "polopt compare: error: beta must be a number > 0 (e.g. beta=0.1), got 0"
    assert main(["realign", "train.stepz=3", f"hydra.run.dir={out}", "--quiet"]) == 2
    assert _one_line(capsys) == "polopt realign: error: unknown key 'train.stepz'; did you mean train.steps or " \
                                "train.seed?"
    assert not out.exists()


def test_unknown_key_message_never_suggests_adding_the_key():
    known = ["train.steps", "train.seed", "beta", "loss.name"]
    text = config.unknown_key_message("train.zzzzzzzz", known)
    assert text == "unknown key 'train.zzzzzzzz'; the keys under train are: train.seed, train.steps"
    assert "+" not in text


# ---------------------------------------------------------------- one grammar

def test_check_takes_the_config_keys_of_train(capsys):
    assert main(["check", "huber", "loss.delta=0.5", "beta=0.1", "--quick", "--json", "--no-plot"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["beta"] == 0.1 and data["loss"] == "huber"
    # huber with delta = 0.5 is 2 * Huber_delta(1 - x): f(0) = 2 * delta * (1 - delta / 2) = 0.75 (by hand)
    taylor = next(c for c in data["checks"] if c["name"] == "taylor")
    assert "f(0) = 0.75" in taylor["reason"]


def test_demo_takes_the_config_keys_of_train():
    from polopt.commands import demo

    args = demo.build_parser().parse_intermixed_args(
        ["loss=squared", "beta=0.3", "train.steps=7", "optim.lr=0.001", "model.width=8", "task.n_pairs=50",
         "train.threads=2", "--bias", "0.2"])
    cfg, run_keys = demo.config_from_args(args)
    assert (cfg.loss, cfg.beta, cfg.steps, cfg.lr, cfg.width, cfg.n_pairs, cfg.bias) == \
        ("squared", 0.3, 7, 0.001, 8, 50, 0.2)
    assert run_keys == {"threads": 2, "progress": True}


# ---------------------------------------------------------------- the error boundary

def test_debug_shows_the_traceback_of_a_user_error(monkeypatch, tmp_path):
    monkeypatch.setenv("POLOPT_DEBUG", "1")
    with pytest.raises(ValueError, match="did you mean task.n_responses"):
        main(["export", "bradley_terry", str(tmp_path / "t.json"), "task.n_respones=4"])
    with pytest.raises(ValueError, match=r"beta must be a number > 0"):
        main(["train", "beta=0", f"hydra.run.dir={tmp_path / 'run'}"])
    path = tmp_path / "task.json"
    path.write_text(json.dumps({"reference": [0.5, 0.4, 0.4], "rewards": [0, 1, 2]}))
    with pytest.raises(ValueError, match=r"sums to 1.3"):  # raised inside Hydra's run, carried past it
        main(["train", "task=file", f"task.path={path}", f"hydra.run.dir={tmp_path / 'run2'}"])


def test_a_bug_keeps_its_traceback(monkeypatch, tmp_path):
    def broken(cfg):
        raise KeyError("a bug, not a user error")

    monkeypatch.setattr(config, "build_task", broken)
    with pytest.raises(KeyError, match="a bug"):
        main(["export", "bradley_terry", str(tmp_path / "t.json")])


def test_a_file_system_error_is_one_line(tmp_path, capsys):
    blocker = tmp_path / "file"
    blocker.write_text("")
    assert main(["export", "bradley_terry", str(blocker / "task.json")]) == 2
    line = _one_line(capsys)
    assert line.startswith("polopt export: error: ") and str(blocker) in line  # e.g. "File exists: PATH"


# ---------------------------------------------------------------- fast first output

def test_help_and_losses_import_no_torch():
    calls = [["--help"], ["losses"], ["train", "--help"], *[[c, "--help"] for c in (
        "losses", "export", "data", "sft", "demo", "compare", "realign", "checkpoints", "check", "reward")]]
    script = ("import contextlib, io, json, sys\nfrom polopt.commands.main import main\nseen = {}\n"
              f"for argv in {calls!r}:\n"
              "    with contextlib.redirect_stdout(io.StringIO()):\n"
              "        try:\n            main(argv)\n        except SystemExit:\n            pass\n"
              "    seen[' '.join(argv)] = 'torch' in sys.modules\nprint(json.dumps(seen))\n")
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, cwd=ROOT, env=env,
                         timeout=300)
    assert out.returncode == 0, out.stderr
    seen = json.loads(out.stdout.strip().splitlines()[-1])
    assert seen == {" ".join(c): False for c in calls}


def test_the_losses_catalogue_is_the_registry():
    from polopt import losses
    from polopt.commands.losses import CATALOGUE

    assert list(CATALOGUE) == losses.builtin_names("margin")
    for name, (d1, d2, convex, source) in CATALOGUE.items():
        loss = losses.resolve_margin(name)
        _, e1, e2 = loss.derivatives_at(0.0)  # autograd, float64
        assert (d1, d2) == pytest.approx((e1, e2), abs=1e-12) and (convex, source) == (loss.convex, loss.source)
    import inspect

    from polopt import losses
    from polopt.commands.losses import PAIR_CATALOGUE

    registry = []
    for name in losses.names("pair"):
        objective = losses.resolve(name)
        keys = {k: p.default for k, p in inspect.signature(objective.fn).parameters.items() if p.kind is p.KEYWORD_ONLY}
        registry.append((name, ", ".join(f"{k}={v}" for k, v in keys.items()) or "-", objective.source))
    assert PAIR_CATALOGUE == registry


def test_the_group_catalogue_is_the_registry():
    import inspect

    from polopt.commands.losses import GROUP_CATALOGUE
    from polopt.losses import registry as objectives
    from polopt.losses.group_objective import FEEDBACK_FIELDS

    registry = []
    for name in objectives.names("group"):
        objective = objectives.resolve(name)
        keys = {k: p.default for k, p in inspect.signature(objective.fn).parameters.items() if p.kind is p.KEYWORD_ONLY}
        feedback = ", ".join(k for k in FEEDBACK_FIELDS if objective.reads_feedback(k))
        registry.append((name, feedback, ", ".join(f"{k}={v}" for k, v in keys.items()) or "-",
                         objective.stop_gradient, objective.source))
    assert GROUP_CATALOGUE == registry


def test_check_prints_a_progress_line_per_check_with_its_time(capsys):
    assert main(["check", "logistic", "--quick", "--no-plot"]) == 0
    err = capsys.readouterr().err.strip().splitlines()
    assert err[0] == "polopt check: logistic at beta = 0.5: 7 checks"
    names = [re.fullmatch(r"  (\S+)\s+(PASS|WARN|FAIL|SKIP)\s+\d+\.\d s  \(total \d+\.\d s\)", line).group(1)
             for line in err[1:]]
    assert names == ["elementwise", "finite", "signal", "convexity", "taylor", "pair_optimum", "certainty", "scale"]


# ---------------------------------------------------------------- no debris

def test_a_run_refused_before_training_leaves_no_folder(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({"reference": [0.5, 0.4, 0.4], "rewards": [0, 1, 2]}))
    assert main(["train", "task=file", f"task.path={bad}"]) == 2  # refused by the task, after Hydra started
    assert "sums to 1.3" in _one_line(capsys)
    assert main(["train", "beta=-1"]) == 2  # refused before Hydra
    _one_line(capsys)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.json"]  # no runs/ folder at all


def test_a_refused_run_keeps_a_folder_that_was_there(tmp_path, capsys):
    run_dir = tmp_path / "mine"
    run_dir.mkdir()
    (run_dir / "notes.txt").write_text("keep me")
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({"reference": [0.5, 0.4, 0.4], "rewards": [0, 1, 2]}))
    assert main(["train", "task=file", f"task.path={bad}", f"hydra.run.dir={run_dir}"]) == 2
    _one_line(capsys)
    assert (run_dir / "notes.txt").read_text() == "keep me"


def test_a_sweep_names_its_folders_by_their_overrides_and_ends_with_one_table(tmp_path, capsys):
    sweep = tmp_path / "sweep"
    assert main(["train", "-m", "loss=logistic,squared", "train.steps=30", "train.progress=false",
                 f"hydra.sweep.dir={sweep}"]) == 0
    out = capsys.readouterr().out
    folders = sorted(p.name for p in sweep.iterdir() if p.is_dir())
    assert folders == ["loss=logistic,train.steps=30", "loss=squared,train.steps=30"]
    for name in folders:
        assert json.loads((sweep / name / "summary.json").read_text())["steps"] == 30
    lines = out.splitlines()
    table = lines[next(i for i, line in enumerate(lines) if line.startswith("run ") and "tv_to_optimum" in line):]
    assert table[0].split()[:2] == ["run", "tv_to_optimum"]
    assert [line.split()[0] for line in table[2:4]] == ["loss=logistic", "loss=squared"]
    rows = json.loads((sweep / "runs.json").read_text())
    tv = {r["run"]: r["tv_to_optimum"] for r in rows}
    for name in ("loss=logistic", "loss=squared"):
        run = f"{name},train.steps=30"
        assert tv[name] == json.loads((sweep / run / "summary.json").read_text())["tv_to_optimum"]
