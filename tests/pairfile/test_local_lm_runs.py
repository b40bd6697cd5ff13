"""``polopt train task=pairs model=local_lm`` as whole processes: two processes under torchrun (DDP, FSDP2) end
where one does, and a run killed with SIGKILL and rerun ends in the state of an uninterrupted one.

The model is the tiny Llama-shaped one of tests/helpers_local_lm.py with a LoRA adapter whose dropout draws
from torch's random stream every step (so the resumed run must restore it), built in the test.
What the runs are held to: the one-process run (DDP averages the ranks' gradients of the same global
batch, so the two agree up to float rounding) and the uninterrupted run (bit for bit: torch.equal).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import torch

transformers = pytest.importorskip("transformers")
peft = pytest.importorskip("peft")

from helpers_distributed import free_port  # noqa: E402
from helpers_local_lm import CHAT_ROWS, PLAIN_ROWS, save_llama, write_pairs  # noqa: E402
from hydra import compose, initialize_config_dir  # noqa: E402

from polopt.checkpoints import store as checkpoint  # noqa: E402
from polopt.commands.config import rewrite_overrides  # noqa: E402
from polopt.commands.train import CONFIG_DIR, run  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
STEPS = 16
pytestmark = pytest.mark.slow  # fresh interpreters that import torch and transformers


def arguments(model_dir: Path, pairs: Path, *extra: str, adapter: str = "lora", dropout: float = 0.1) -> list[str]:
    lora = ["model.adapter=lora", f"model.lora.dropout={dropout}", "model.lora.r=4"] if adapter == "lora" else []
    return ["task=pairs", f"task.path={pairs}", "model=local_lm", f"model.path={model_dir}", *lora,
            f"train.steps={STEPS}", "train.batch_size=4", "train.checkpoint_every=1", "train.log_every=4",
            "train.progress=false", "optim.lr=0.02", "optim.warmup_steps=2", *extra]


def environment() -> dict:
    env = {**os.environ, "PYTHONPATH": str(ROOT), "OMP_NUM_THREADS": "1", "HF_HUB_OFFLINE": "1"}
    for key in ("RANK", "WORLD_SIZE", "LOCAL_RANK", "MASTER_ADDR", "MASTER_PORT", "POLOPT_DEBUG"):
        env.pop(key, None)
    return env


def command(args: list[str], run_dir: Path, processes: int = 1) -> list[str]:
    launcher = [] if processes == 1 else ["-m", "torch.distributed.run", f"--nproc_per_node={processes}",
                                          "--master_addr=127.0.0.1", f"--master_port={free_port()}"]
    return [sys.executable, *launcher, "-m", "polopt", "train", *args, f"hydra.run.dir={run_dir}"]


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("runs")
    return save_llama(root / "llama"), write_pairs(root / "pairs.jsonl", PLAIN_ROWS + CHAT_ROWS)


def in_process(args: list[str], run_dir: Path) -> dict:
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=rewrite_overrides(args))
    return run(cfg, run_dir)


def saved_weights(run_dir: Path, adapter: bool) -> dict:
    from safetensors.torch import load_file

    return load_file(run_dir / "policy" / ("adapter_model.safetensors" if adapter else "model.safetensors"))


@pytest.mark.parametrize("strategy,adapter", [("ddp", "lora"), ("fsdp", "null")])
def test_two_processes_end_where_one_does(setup, tmp_path, strategy, adapter):
    """DDP with a LoRA adapter, FSDP2 (a unit per decoder layer: polopt/parallel/fsdp.py shards each element
    of the model's layer list) with every weight training: the saved policy and the summary of one process."""
    model_dir, pairs = setup
    args = arguments(model_dir, pairs, "train.checkpoint_every=0", adapter=adapter, dropout=0.0)
    done = subprocess.run(command([*args, f"train.strategy={strategy}"], tmp_path / "two", processes=2), cwd=ROOT,
                          env=environment(), capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    two = json.loads((tmp_path / "two" / "summary.json").read_text())
    one = in_process(args, tmp_path / "one")
    assert two["processes"] == 2 and two["steps"] == one["steps"] == STEPS
    for key in ("loss", "margin_mean", "logratio_winner", "logratio_loser", "pair_accuracy"):
        assert two[key] == pytest.approx(one[key], rel=1e-4, abs=1e-5), key
    got, want = (saved_weights(tmp_path / run, adapter == "lora") for run in ("two", "one"))
    assert got.keys() == want.keys()
    for name in want:
        torch.testing.assert_close(got[name], want[name], rtol=1e-4, atol=1e-5)


def newest_step(run_dir: Path) -> int:
    entries = checkpoint.list_checkpoints(run_dir / "checkpoints") if (run_dir / "checkpoints").is_dir() else []
    return max((e["step"] for e in entries), default=0)


def test_a_killed_run_resumes_to_the_same_end_state(setup, tmp_path):
    model_dir, pairs = setup
    args = arguments(model_dir, pairs)
    want_summary = in_process(args, tmp_path / "uninterrupted")
    want = checkpoint.load_latest(tmp_path / "uninterrupted" / "checkpoints")

    run_dir = tmp_path / "killed"
    proc = subprocess.Popen(command(args, run_dir), cwd=ROOT, env=environment(), stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    while proc.poll() is None and newest_step(run_dir) < STEPS // 2:
        time.sleep(0.002)
    assert proc.poll() is None, "the run ended before it could be killed"
    proc.send_signal(signal.SIGKILL)
    assert proc.wait() == -signal.SIGKILL and 0 < newest_step(run_dir) < STEPS
    again = subprocess.run(command(args, run_dir), cwd=ROOT, env=environment(), capture_output=True, text=True,
                           timeout=600)
    assert again.returncode == 0, again.stderr[-3000:]
    assert "resuming from" in again.stderr
    got = checkpoint.load_latest(run_dir / "checkpoints")
    assert got["step"] == want["step"] == STEPS
    for name, value in want["policy"].items():
        assert torch.equal(got["policy"][name], value), name
    summary = json.loads((run_dir / "summary.json").read_text())
    for record in (summary, want_summary):
        for key in ("seconds", "reference_cache_reused", "saved_policy", "rejects_file", "reference_cache"):
            record.pop(key, None)
    assert summary == json.loads(json.dumps(want_summary))  # JSON's view of the uninterrupted summary
    got_adapter, want_adapter = saved_weights(run_dir, True), saved_weights(tmp_path / "uninterrupted", True)
    assert all(torch.equal(got_adapter[k], want_adapter[k]) for k in want_adapter)
