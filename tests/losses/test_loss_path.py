"""One loss path: every caller that turns log-probabilities into a loss goes through
:func:`polopt.losses.per_pair_losses` (DEVELOPERS.md's layout; issue 23).

A spy loss, registered for the test, looks at the call stack each time it is evaluated and records
whether :func:`polopt.losses.reduce.per_pair_losses` is on it. Each caller is then driven end to end:
the trainer on a finite task and on a pair file, the in-memory and the streamed summaries of a pair
file (the streamed one used to call margin losses directly and crashed on pair objectives), self-play,
the pair solver's population loss and ``polopt check``'s population check.
"""

from __future__ import annotations

import inspect
import json

import pytest
import torch
from hydra import compose, initialize_config_dir

from polopt import losses
from polopt.commands.train import CONFIG_DIR, run
from polopt.losses import reduce, registry
from polopt.methods.selfplay import selfplay_objective
from toy_tasks.exact.pairs import solve_pairs
from toy_tasks.families import nontransitive

CALLS: list[bool] = []


def _through_the_path() -> bool:
    """Whether :func:`per_pair_losses` is on the stack (or :func:`polopt.losses.registry.validate`, which
    probes a pair loss once when it is resolved: a check of the loss's contract, not a loss computed)."""
    allowed = (reduce.per_pair_losses.__code__, registry.validate.__code__)
    frame = inspect.currentframe()
    while frame is not None:  # the frames' code objects only (inspect.stack would read every source file)
        if frame.f_code in allowed:
            return True
        frame = frame.f_back
    return False


def spy_pair(pair, beta, *, weight=0.0):
    """DPO's loss plus ``weight`` times the winner's NLL, recording where it was called from."""
    CALLS.append(_through_the_path())
    return torch.nn.functional.softplus(-beta * (pair.logratio_winner - pair.logratio_loser)) - weight * pair.winner


def spy_margin(x):
    """The squared loss (x - 1)^2, recording where it was called from."""
    CALLS.append(_through_the_path())
    return (x - 1.0) ** 2


@pytest.fixture
def spies():
    losses.register("test_only_spy_pair", source="test")(spy_pair)
    losses.register("test_only_spy_margin", source="test")(spy_margin)
    CALLS.clear()
    yield
    losses.unregister("test_only_spy_pair")
    losses.unregister("test_only_spy_margin")


def _pair_file(tmp_path):
    rows = [{"prompt": f"q{i}?", "winner": "yes " * (1 + i % 3), "loser": f"no {i}"} for i in range(16)]
    path = tmp_path / "pairs.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    return path


@pytest.mark.parametrize("stream", [False, True])
def test_a_pair_file_run_and_its_summary_go_through_the_path(spies, tmp_path, stream):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=[
            "task=pairs", f"task.path={_pair_file(tmp_path)}", f"task.stream={str(stream).lower()}",
            "model.width=16", "model.layers=1", "model.heads=2", "model.context=32", "train.steps=3",
            "train.batch_size=8", "train.progress=false", "loss=custom", "loss.name=test_only_spy_pair"])
    summary = run(cfg, tmp_path / "run")
    assert (tmp_path / "run" / "summary.json").exists() and summary["n_pairs"] == 16
    assert CALLS and all(CALLS), f"{CALLS.count(False)} of {len(CALLS)} evaluations bypassed per_pair_losses"


def test_a_finite_task_run_with_its_exact_optimum_goes_through_the_path(spies, tmp_path):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["task=nontransitive", "train.steps=5", "train.progress=false",
                                           "loss=custom", "loss.name=test_only_spy_pair"])
    run(cfg, tmp_path / "run")
    assert CALLS and all(CALLS)


def test_selfplay_and_the_pair_solver_go_through_the_path(spies):
    task = nontransitive()
    session = task.prepare(losses.resolve("squared"), beta=0.5)
    env = session.for_method("selfplay").environment()
    policy = session.build_policy("tabular")
    margin, pair = losses.resolve("test_only_spy_margin"), losses.resolve("test_only_spy_pair")
    CALLS.clear()
    for estimator in ("exact", "sampled"):
        step = selfplay_objective(policy, env, margin, beta=0.5, estimator=estimator, batch_size=8)
        step(0)[0].backward()
    assert len(CALLS) == 2 and all(CALLS)
    solve_pairs(pair, task.win_weights(), task.reference, task.lengths, beta=0.5)
    assert len(CALLS) > 2 and all(CALLS)
