"""Kill ``polopt train`` with SIGKILL at random moments, rerun the same command, and compare the
end state with an uninterrupted run: the final checkpoint bit for bit (torch.equal), summary.json
and metrics.jsonl field for field (wall-clock ``seconds`` aside).

The moments are random (a seeded generator picks a random delay or a random checkpoint count to
wait for); the verdict does not depend on them: whatever the moment, the rerun must end identical.
"""

from __future__ import annotations

import json
import os
import random
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from helpers_resume import assert_same_state
from hydra import compose, initialize_config_dir

from polopt.checkpoints import store as checkpoint
from polopt.commands.config import rewrite_overrides
from polopt.commands.train import CONFIG_DIR, run

ROOT = Path(__file__).resolve().parents[2]
STEPS = 60
ARGS = ["task=bradley_terry", "task.mode=sampled", "task.n_pairs=37", f"train.steps={STEPS}",
        "train.batch_size=8", "train.checkpoint_every=2", "train.log_every=5", "train.progress=false",
        "optim.warmup_steps=5", "loss=squared", "beta=0.3"]


def _command(run_dir: Path) -> list[str]:
    return [sys.executable, "-m", "polopt", "train", *ARGS, f"hydra.run.dir={run_dir}"]


def _env() -> dict:
    return {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}


def _newest_step(ckpt_dir: Path) -> int:
    steps = [int(m.group(1)) for p in (os.listdir(ckpt_dir) if ckpt_dir.is_dir() else [])
             if (m := re.fullmatch(r"ckpt-(\d+)\.pt", p))]
    return max(steps, default=0)


def _start(run_dir: Path, log: Path) -> subprocess.Popen:
    return subprocess.Popen(_command(run_dir), cwd=ROOT, env=_env(), stdout=subprocess.DEVNULL,
                            stderr=log.open("ab"))


def _kill_at_random(run_dir: Path, rng: random.Random, log: Path, by_delay: bool) -> bool:
    """Start a run and SIGKILL it after a random delay (which may fall in start-up) or once the
    checkpoints reach a random step. True if it died by the signal, False if it finished first."""
    proc = _start(run_dir, log)
    ckpt_dir = run_dir / "checkpoints"
    if by_delay:
        deadline = time.monotonic() + rng.uniform(0.5, 4.0)
        while time.monotonic() < deadline and proc.poll() is None:
            time.sleep(0.005)
    else:
        target = rng.randint(_newest_step(ckpt_dir) + 1, STEPS - 5)
        while proc.poll() is None and _newest_step(ckpt_dir) < target:
            time.sleep(0.001)
    if proc.poll() is not None:
        return False
    proc.send_signal(signal.SIGKILL)
    return proc.wait() == -signal.SIGKILL


def _end_state(run_dir: Path):
    state = checkpoint.load_latest(run_dir / "checkpoints")
    summary = json.loads((run_dir / "summary.json").read_text())
    metrics = [json.loads(line) for line in (run_dir / "metrics.jsonl").read_text().splitlines()]
    for record in [summary, *metrics]:
        record.pop("seconds", None)
    return state, summary, metrics


def _uninterrupted(run_dir: Path) -> None:
    """The same run in this process through Hydra's compose API (one process start fewer)."""
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=rewrite_overrides(ARGS))
    run(cfg, run_dir)


@pytest.mark.slow
def test_sigkill_and_rerun_ends_identical(tmp_path):
    reference = tmp_path / "uninterrupted"
    _uninterrupted(reference)
    want_state, want_summary, want_metrics = _end_state(reference)
    assert want_state["step"] == STEPS and [r["step"] for r in want_metrics] == [1, *range(5, STEPS + 1, 5)]

    rng = random.Random(20261201)
    resumed_mid_run = 0
    for trial in range(2):
        run_dir, log = tmp_path / f"trial{trial}", tmp_path / f"trial{trial}.log"
        killed = [_kill_at_random(run_dir, rng, log, by_delay=(trial == 0 and k == 0)) for k in range(2)]
        final = subprocess.run(_command(run_dir), cwd=ROOT, env=_env(), capture_output=True, text=True,
                               timeout=300)
        assert final.returncode == 0, final.stderr
        got_state, got_summary, got_metrics = _end_state(run_dir)
        assert_same_state({k: want_state[k] for k in ("policy", "optimiser", "scheduler", "generator", "torch_rng",
                                                      "order", "cursor", "history", "skipped", "step")},
                          {k: got_state[k] for k in ("policy", "optimiser", "scheduler", "generator", "torch_rng",
                                                     "order", "cursor", "history", "skipped", "step")})
        assert got_summary == want_summary
        assert got_metrics == want_metrics  # one line per logged step, none lost, none repeated
        text = log.read_text() + final.stderr
        resumed = [int(s) for s in re.findall(r"resuming from .* \(step (\d+) of", text)]
        resumed_mid_run += sum(0 < s < STEPS for s in resumed)
        assert sum(killed) >= 1, f"trial {trial}: every run finished before it could be killed"
    # the runs were really cut in the middle of training, not only before or after it
    assert resumed_mid_run >= 2
