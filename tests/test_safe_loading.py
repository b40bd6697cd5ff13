"""Safe loading: checkpoints through torch.load(weights_only=True) only, configs and data files never
import or run code, and a user loss is imported only from an explicit dotted path.

The source scan uses Python's own parser (the ast module) over every module of polopt and toy_tasks.
"""

from __future__ import annotations

import ast
import json
from pathlib import Path

import pytest
from hydra import compose, initialize_config_dir

from polopt.commands.config import CONFIG_DIR, build_task
from polopt.commands.main import main
from toy_tasks.finite.task import load_task

ROOT = Path(__file__).resolve().parent.parent
SOURCES = sorted([*ROOT.glob("polopt/**/*.py"), *ROOT.glob("toy_tasks/**/*.py")])  # subpackages too


def test_the_scan_reaches_every_module_of_the_subpackages():
    names = {p.relative_to(ROOT).as_posix() for p in SOURCES}
    assert {"polopt/data/read.py", "polopt/methods/rl.py", "polopt/checkpoints/store.py"} <= names
    for package in ("polopt", "toy_tasks"):  # as many files as the file system holds, at any depth
        assert len([p for p in SOURCES if p.parts[len(ROOT.parts)] == package]) == \
            sum(1 for _ in (ROOT / package).rglob("*.py"))


def _calls(path: Path):
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Call):
            yield node, ast.unparse(node.func)


def test_every_torch_load_is_weights_only():
    loads = [(p, node) for p in SOURCES for node, name in _calls(p) if name == "torch.load"]
    assert loads, "the checkpoint module loads with torch.load"
    for path, node in loads:
        kw = {k.arg: k.value for k in node.keywords}
        assert isinstance(kw.get("weights_only"), ast.Constant) and kw["weights_only"].value is True, \
            f"{path.name}:{node.lineno}"


@pytest.mark.parametrize("forbidden", ["eval", "exec", "compile", "__import__", "pickle.load", "pickle.loads",
                                       "yaml.load", "yaml.unsafe_load", "marshal.loads", "runpy.run_path"])
def test_no_code_from_data(forbidden):
    found = [f"{p.name}:{node.lineno}" for p in SOURCES for node, name in _calls(p) if name == forbidden]
    assert found == []


def test_imports_by_name_only_for_the_dotted_loss_path():
    """Only polopt.losses.registry.import_dotted (loss=, evaluate.scorer=) imports by a name read at run
    time; the dispatcher imports each command by a plain import statement (polopt/commands/main.py, _command)."""
    found = [p.relative_to(ROOT).as_posix() for p in SOURCES for node, name in _calls(p)
             if name in ("importlib.import_module", "import_module")]
    assert found == ["polopt/losses/registry.py"]


def test_the_dispatcher_imports_only_its_own_command_modules():
    from polopt.commands import main

    commands = ROOT / "polopt" / "commands"
    for name in main.COMMANDS:
        assert (commands / f"{name}.py").is_file(), name
        assert main._command(name).__module__ == f"polopt.commands.{name}", name


def _cfg(*overrides):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose("config", overrides=list(overrides))


@pytest.mark.parametrize("target", ["os.system", "builtins.eval", "subprocess.run", "toy_tasks", None])
def test_a_task_target_outside_the_kit_is_refused(target):
    cfg = _cfg(f"task._target_={target}" if target else "~task._target_")
    with pytest.raises(ValueError, match=r"task._target_ must name a task builder in toy_tasks or polopt, got"):
        build_task(cfg.task)


def test_a_nested_target_is_refused(tmp_path):
    cfg = _cfg("+task.rewards={_target_: os.getcwd}")
    with pytest.raises(ValueError, match=r"task: a nested _target_ \('os.getcwd'\) is not allowed; task keys hold"):
        build_task(cfg.task)


def test_the_cli_refuses_a_target_in_one_line(tmp_path, capsys):
    marker = tmp_path / "created"
    code = main(["train", "task._target_=pathlib.Path.touch", f"+task.self={marker}", f"hydra.run.dir={tmp_path}"])
    assert code == 2 and not marker.exists()
    assert capsys.readouterr().err.startswith("polopt train: error: task._target_ must name a task builder")


def test_a_task_file_cannot_name_code(tmp_path):
    path = tmp_path / "task.json"
    path.write_text(json.dumps({"reference": [0.5, 0.5], "rewards": [0, 1], "_target_": "os.system"}))
    with pytest.raises(ValueError, match=r"unknown field\(s\) \['_target_'\]; allowed: "):
        load_task(path)
