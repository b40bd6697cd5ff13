"""Sweeps on Hydra's own engines: a joblib or submitit sweep gives the sequential sweep's runs, folders and
table; an Optuna sweep tunes beta to a KL target.

Held against: the same sweep run by Hydra's basic (sequential) launcher in this process; runs are seeded and
deterministic, so every run's summary.json must match field by field (wall-clock seconds aside).
"""

from __future__ import annotations

import json

import pytest

from polopt.commands.main import main

pytest.importorskip("hydra_plugins.hydra_joblib_launcher")

SWEEP = ["task=nontransitive", "loss=squared", "beta=0.2,0.5,1.5", "train.steps=60", "train.progress=false"]
TIMED = {"seconds", "tokens_per_s"}


def summaries(folder):
    return {p.parent.name: {k: v for k, v in json.loads(p.read_text()).items() if k not in TIMED}
            for p in sorted(folder.glob("*/summary.json"))}


def test_the_shipped_slurm_config_is_submitits_slurm_launcher():
    pytest.importorskip("hydra_plugins.hydra_submitit_launcher")
    from polopt.commands import config

    cfg = config.compose_all(["hydra/launcher=slurm", "hydra.launcher.partition=cpu", "task=nontransitive"],
                             sweep=True)[0]
    assert cfg.hydra.launcher._target_ == "hydra_plugins.hydra_submitit_launcher.submitit_launcher.SlurmLauncher"
    assert cfg.hydra.launcher.partition == "cpu" and cfg.hydra.launcher.timeout_min == 120


def table(folder):
    return [{k: v for k, v in row.items() if k not in TIMED | {"folder"}}
            for row in json.loads((folder / "runs.json").read_text())]


@pytest.mark.slow
@pytest.mark.parametrize("launcher", [["hydra/launcher=joblib", "hydra.launcher.n_jobs=2"],
                                      ["hydra/launcher=submitit_local"]])
def test_a_parallel_sweep_equals_the_sequential_sweep_run_by_run(launcher, tmp_path, capsys):
    # joblib: worker processes on this machine; submitit_local: submitit's local executor, as the shipped
    # SLURM config (conf/hydra/launcher/slurm.yaml) submits the same jobs to a cluster
    if "submitit" in launcher[0]:
        pytest.importorskip("hydra_plugins.hydra_submitit_launcher")
    sequential, parallel = tmp_path / "sequential", tmp_path / "parallel"
    assert main(["train", "-m", *SWEEP, f"hydra.sweep.dir={sequential}"]) == 0
    assert main(["train", "-m", *launcher, *SWEEP, f"hydra.sweep.dir={parallel}"]) == 0
    out = capsys.readouterr().out
    assert f"sweep folder: {parallel} (3 runs; runs.txt, runs.json)" in out
    expected = summaries(sequential)
    assert sorted(expected) == ["beta=0.2,loss=squared,task=nontransitive,train.steps=60",
                                "beta=0.5,loss=squared,task=nontransitive,train.steps=60",
                                "beta=1.5,loss=squared,task=nontransitive,train.steps=60"]
    assert summaries(parallel) == expected
    assert table(parallel) == table(sequential)


def exact_kl(task, beta: float) -> float:
    """KL(pi* || pi_ref) of the logistic loss's exact optimum at ``beta`` (toy_tasks.exact.margin's solve)."""
    from polopt import losses
    from toy_tasks.exact.margin import solve

    optimum = solve(losses.resolve_margin("logistic"), task.win_weights(), beta=beta)
    return task.kl_to_reference(task.policy_from_logratios(optimum.logratios))


@pytest.mark.slow
def test_an_optuna_sweep_finds_the_beta_nearest_a_kl_target(tmp_path, capsys):
    # held against an independent bisection (scipy's brentq) on the exact optimum's KL, which falls as beta
    # grows: the best trial must be a neighbour of the bisected beta among the trials (the sweep's resolution)
    pytest.importorskip("hydra_plugins.hydra_optuna_sweeper")
    import scipy.optimize

    from polopt.commands import config

    folder, target = tmp_path / "tuned", 0.05
    assert main(["train", "-m", "hydra/sweeper=optuna", "task=nontransitive", "loss=logistic",
                 "beta=interval(0.05,3.0)", "hydra.sweeper.n_trials=12", "sweep.objective=kl_to_reference",
                 f"sweep.target={target}", "train.progress=false", f"hydra.sweep.dir={folder}"]) == 0
    out = capsys.readouterr().out
    rows = json.loads((folder / "runs.json").read_text())
    assert len(rows) == 12 and "best: beta=" in out
    betas = sorted(float(r["run"].removeprefix("beta=")) for r in rows)
    best = float(out.split("best: beta=", 1)[1].split()[0])
    task = config.build_task(config.compose(["task=nontransitive"]).task)  # a FiniteTask
    bisected = scipy.optimize.brentq(lambda b: exact_kl(task, b) - target, 0.05, 3.0, xtol=1e-10)
    neighbours = {max((b for b in betas if b <= bisected), default=None),
                  min((b for b in betas if b >= bisected), default=None)} - {None}
    assert best in neighbours
    nearest = min(rows, key=lambda r: abs(r["kl_to_reference"] - target))
    assert float(nearest["run"].removeprefix("beta=")) == best


@pytest.mark.parametrize(("extra", "message"), [
    (["sweep.objective=kl_to_reference"], r"sweep.objective=kl_to_reference is read by a tuned sweep only"),
    (["sweep.target=0.05"], r"sweep.target=0.05 needs sweep.objective"),
    (["-m", "hydra/sweeper=optuna", "beta=interval(0.1,1.0)"], r"a tuned sweep \(hydra/sweeper=optuna\) needs "
                                                              r"sweep.objective"),
])
def test_sweep_keys_are_refused_where_nothing_reads_them(extra, message, tmp_path, capsys):
    pytest.importorskip("hydra_plugins.hydra_optuna_sweeper")
    import re

    folder = "hydra.sweep.dir" if "-m" in extra else "hydra.run.dir"
    assert main(["train", *extra, "task=nontransitive", f"{folder}={tmp_path / 'out'}"]) == 2
    line = capsys.readouterr().err.strip()
    assert re.search(message, line) and line.startswith("polopt train: error: ")
    assert not (tmp_path / "out").exists()
