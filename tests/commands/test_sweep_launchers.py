"""Sweeps on Hydra's own engines: a joblib sweep gives the sequential sweep's runs, folders and table.

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


def table(folder):
    return [{k: v for k, v in row.items() if k not in TIMED | {"folder"}}
            for row in json.loads((folder / "runs.json").read_text())]


@pytest.mark.slow
def test_a_joblib_sweep_equals_the_sequential_sweep_run_by_run(tmp_path, capsys):
    sequential, parallel = tmp_path / "sequential", tmp_path / "joblib"
    assert main(["train", "-m", *SWEEP, f"hydra.sweep.dir={sequential}"]) == 0
    assert main(["train", "-m", "hydra/launcher=joblib", "hydra.launcher.n_jobs=2", *SWEEP,
                 f"hydra.sweep.dir={parallel}"]) == 0
    out = capsys.readouterr().out
    assert f"sweep folder: {parallel} (3 runs; runs.txt, runs.json)" in out
    expected = summaries(sequential)
    assert sorted(expected) == ["beta=0.2,loss=squared,task=nontransitive,train.steps=60",
                                "beta=0.5,loss=squared,task=nontransitive,train.steps=60",
                                "beta=1.5,loss=squared,task=nontransitive,train.steps=60"]
    assert summaries(parallel) == expected
    assert table(parallel) == table(sequential)
