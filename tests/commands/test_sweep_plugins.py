"""Hydra's launcher and sweeper plugins pass polopt's ``_target_`` allow-list; every other callable still does not.

Held against Hydra's own plugin registry (``hydra.core.plugins.Plugins.discover``): the admitted targets are
exactly the classes it finds installed (the ``sweep`` extra: hydra-joblib-launcher, hydra-optuna-sweeper,
hydra-submitit-launcher).
"""

from __future__ import annotations

import pytest

from polopt.commands import config
from polopt.commands.main import main

pytest.importorskip("hydra_plugins.hydra_joblib_launcher")
pytest.importorskip("hydra_plugins.hydra_optuna_sweeper")
pytest.importorskip("hydra_plugins.hydra_submitit_launcher")


@pytest.mark.parametrize(("choice", "node", "cls"), [
    ("hydra/launcher=joblib", "launcher", "JoblibLauncher"),
    ("hydra/launcher=submitit_local", "launcher", "LocalLauncher"),
    ("hydra/launcher=submitit_slurm", "launcher", "SlurmLauncher"),
    ("hydra/sweeper=optuna", "sweeper", "OptunaSweeper"),
])
def test_installed_plugins_are_admitted(choice, node, cls):
    from hydra.core.plugins import Plugins
    from hydra.plugins.launcher import Launcher
    from hydra.plugins.sweeper import Sweeper

    cfg = config.compose_all([choice, "task=nontransitive"], sweep=True)[0]
    target = cfg.hydra[node]._target_
    assert target.endswith(f".{cls}")
    plugins = Plugins.instance()
    discovered = {f"{c.__module__}.{c.__name__}" for kind in (Launcher, Sweeper) for c in plugins.discover(kind)}
    assert target in discovered


@pytest.mark.parametrize("override", ["hydra.launcher._target_=os.system", "hydra.sweeper._target_=os.system",
                                      "hydra.sweeper.sampler._target_=os.system",
                                      "hydra.launcher._target_=hydra_plugins.not_installed.Launcher"])
def test_any_other_callable_is_refused(override, tmp_path, capsys):
    choices = ["hydra/sweeper=optuna"] if "sweeper" in override else ["hydra/launcher=joblib"]
    argv = ["train", "-m", *choices, override, "task=nontransitive", f"hydra.sweep.dir={tmp_path / 'sweep'}"]
    assert main(argv) == 2
    line = capsys.readouterr().err.strip()
    path = override.partition("._target_")[0]
    assert line.startswith(f"polopt train: error: {path}: a _target_ (") and "is not allowed here" in line
    assert not (tmp_path / "sweep").exists()
