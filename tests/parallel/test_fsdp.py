"""train.strategy=fsdp: FSDP2 over 2 gloo processes trains like one process, its sharded checkpoints
(torch.distributed.checkpoint) resume on 1 plain process and on 2 sharded ones, a killed run resumes to
the same end state; raising train.steps continues a finished run; bad input is one line, exit 2.

The reference is the same run on one process: FSDP2 all-gathers the parameters and reduce-scatters
(averages) the gradients, and the loss scale of polopt.parallel.distributed.sharded_loss makes that average the
one-process gradient of the global batch (derived in its docstring and checked in test_distributed.py),
so the runs differ only in floating-point summation order.

Tolerance: the float32 sequence task's policy probabilities within 1e-5 absolute and the final loss
within 1e-5 relative after 12 Adam steps, as for DDP in test_distributed.py (measured: about 3e-8 and
1e-9; float32 rounding is ~6e-8 per operation, and Adam can amplify it).
"""

from __future__ import annotations

import hashlib
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import torch
from helpers_distributed import free_port
from helpers_resume import assert_same_state
from hydra import compose, initialize_config_dir

from polopt.checkpoints import sharded as sharded_checkpoint
from polopt.checkpoints import store as checkpoint
from polopt.commands.train import CONFIG_DIR, run
from polopt.models.transformer import TinyTransformer
from polopt.parallel import distributed

ROOT = Path(__file__).resolve().parents[2]
SEQUENCE = ["+experiment=sequence", "task.mode=sampled", "task.n_pairs=40", "task.n_symbols=2", "task.max_length=3",
            "task.reference_width=16", "task.reference_layers=1", "model.width=16", "model.layers=1",
            "train.batch_size=8", "train.steps=12", "train.log_every=4", "train.checkpoint_every=6",
            "train.keep_checkpoints=3", "train.progress=false"]


def _env() -> dict:
    env = {**os.environ, "PYTHONPATH": str(ROOT), "OMP_NUM_THREADS": "1", "HF_HUB_OFFLINE": "1"}
    for key in ("RANK", "WORLD_SIZE", "LOCAL_RANK", "MASTER_ADDR", "MASTER_PORT"):
        env.pop(key, None)
    return env


def _command(run_dir: Path, processes: int, *extra: str) -> list[str]:
    launcher = [] if processes == 1 else ["-m", "torch.distributed.run", f"--nproc_per_node={processes}",
                                          "--master_addr=127.0.0.1", f"--master_port={free_port()}"]
    return [sys.executable, *launcher, "-m", "polopt", "train", *SEQUENCE, *extra, f"hydra.run.dir={run_dir}"]


def polopt_train(run_dir: Path, processes: int, *extra: str, ok: bool = True) -> subprocess.CompletedProcess:
    done = subprocess.run(_command(run_dir, processes, *extra), cwd=ROOT, env=_env(), capture_output=True, text=True,
                          timeout=300)
    if ok:
        assert done.returncode == 0, done.stderr[-3000:]
    return done


def summary(run_dir: Path) -> dict:
    return json.loads((run_dir / "summary.json").read_text())


def assert_close_runs(got: dict, want: dict) -> None:
    assert got["steps"] == want["steps"]
    assert abs(got["loss"] - want["loss"]) <= 1e-5 * abs(want["loss"])
    for a, b in zip(got["policy"], want["policy"], strict=True):
        torch.testing.assert_close(torch.tensor(a), torch.tensor(b), rtol=0, atol=1e-5)


def only_checkpoint(source: Path, step: int, target: Path) -> None:
    """A fresh run folder holding only ``source``'s checkpoint of ``step`` (listed in a manifest)."""
    entry = next(e for e in checkpoint.list_checkpoints(source / "checkpoints") if e["step"] == step)
    assert entry["ok"] and entry["sharded"]
    (target / "checkpoints").mkdir(parents=True)
    shutil.copytree(source / "checkpoints" / entry["file"], target / "checkpoints" / entry["file"])
    run_id = json.loads((source / "checkpoints" / checkpoint.MANIFEST).read_text())["run_id"]
    checkpoint.write_manifest(target / "checkpoints", run_id, [{k: entry[k] for k in
                                                               ("file", "step", "sha256", "bytes", "sharded")}])


@pytest.mark.slow
def test_fsdp_matches_one_process_and_its_checkpoint_resumes_on_one_and_on_two(tmp_path):
    polopt_train(tmp_path / "fsdp", 2, "train.strategy=fsdp")
    polopt_train(tmp_path / "one", 1)
    fsdp, one = summary(tmp_path / "fsdp"), summary(tmp_path / "one")
    assert fsdp["processes"] == 2
    assert_close_runs(fsdp, one)
    entries = checkpoint.list_checkpoints(tmp_path / "fsdp" / "checkpoints")
    assert [(e["file"], e["ok"]) for e in entries] == [("ckpt-00000006.dcp", True), ("ckpt-00000012.dcp", True)]
    shards = sorted(p.name for p in (tmp_path / "fsdp" / "checkpoints" / entries[0]["file"]).glob("*.distcp"))
    assert shards == ["__0_0.distcp", "__1_0.distcp"]  # each rank wrote its own shards
    for processes, extra in ((1, ()), (2, ("train.strategy=fsdp",))):
        resumed = tmp_path / f"resumed-on-{processes}"
        only_checkpoint(tmp_path / "fsdp", 6, resumed)
        done = polopt_train(resumed, processes, *extra)
        assert "resuming from" in done.stderr and "(step 6 of 12)" in done.stderr
        assert_close_runs(summary(resumed), one)
        assert [json.loads(x)["step"] for x in (resumed / "metrics.jsonl").read_text().splitlines()] == [1, 4, 8, 12]


def test_fsdp_without_torchrun_is_one_line_and_exit_2(tmp_path):
    done = polopt_train(tmp_path / "run", 1, "train.strategy=fsdp", ok=False)
    assert done.returncode == 2
    assert done.stderr.strip() == ("polopt train: error: train.strategy=fsdp shards the policy over processes started "
                                   "by torchrun: run torchrun --nproc_per_node=N -m polopt train ... "
                                   "train.strategy=fsdp, or use train.strategy=ddp on one process")
    with pytest.raises(ValueError, match=r"train.strategy must be one of ddp, fsdp, got 'zero'"):
        distributed.with_strategy(distributed.SINGLE, "zero", {})


def _end_state(run_dir: Path):
    """The final sharded checkpoint as one plain dict (DCP's own converter), the trainer state,
    summary.json and metrics.jsonl, wall-clock fields aside."""
    from torch.distributed.checkpoint.format_utils import dcp_to_torch_save

    state = checkpoint.load_latest(run_dir / "checkpoints")
    whole = run_dir / "whole.pt"
    dcp_to_torch_save(state["sharded"], whole)
    tensors = torch.load(whole, weights_only=True)
    rest = {k: state[k] for k in ("scheduler", "generator", "torch_rng", "order", "cursor", "history", "skipped",
                                  "step")}
    out = [summary(run_dir), *[json.loads(x) for x in (run_dir / "metrics.jsonl").read_text().splitlines()]]
    for record in [*out, *rest["history"]]:  # wall-clock fields, and the run folder's own path
        for key in ("seconds", "tokens_per_s", "reference_cache", "reference_cache_reused"):
            record.pop(key, None)
    return tensors, rest, out


def _newest_step(ckpt_dir: Path) -> int:
    manifest = checkpoint.read_manifest(ckpt_dir)
    return max((e["step"] for e in manifest["checkpoints"]), default=0) if manifest else 0


@pytest.mark.slow
def test_a_killed_fsdp_run_resumes_to_the_same_end_state(tmp_path):
    args = ("train.strategy=fsdp", "train.steps=24", "train.checkpoint_every=2")
    polopt_train(tmp_path / "whole", 2, *args)
    want = _end_state(tmp_path / "whole")
    run_dir = tmp_path / "killed"
    target = random.Random(20261202).randint(2, 16)  # kill once the checkpoints reach a random step
    proc = subprocess.Popen(_command(run_dir, 2, *args), cwd=ROOT, env=_env(), stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, start_new_session=True)
    while proc.poll() is None and _newest_step(run_dir / "checkpoints") < target:
        time.sleep(0.01)
    assert proc.poll() is None, "the run ended before it could be killed"
    os.killpg(proc.pid, signal.SIGKILL)  # the launcher and both ranks at once
    proc.wait()
    cut = _newest_step(run_dir / "checkpoints")
    assert 0 < cut < 24
    done = polopt_train(run_dir, 2, *args)
    assert "resuming from" in done.stderr
    got = _end_state(run_dir)
    assert_same_state(want[0], got[0])
    assert_same_state(want[1], got[1])
    assert [k for k in want[2][0] if want[2][0][k] != got[2][0].get(k)] == []
    assert got[2] == want[2]


# ----------------------------------------------------------------------------
# One process: raising train.steps, another model shape, a damaged sharded checkpoint
# ----------------------------------------------------------------------------

FINITE = ["task.mode=sampled", "task.n_pairs=30", "train.batch_size=7", "train.log_every=2", "train.checkpoint_every=3",
          "train.progress=false", "optim.schedule=constant"]


def _cfg(*overrides):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose("config", overrides=[*FINITE, *overrides])


def test_raising_train_steps_continues_a_finished_run_as_one_longer_run(tmp_path, capsys):
    """With a constant learning rate, steps 13..20 after a finished 12-step run are the steps 13..20 of a
    20-step run (the batch order, RNG and optimiser moments come back from the checkpoint): bit-identical."""
    run(_cfg("train.steps=20"), tmp_path / "long")
    run(_cfg("train.steps=12"), tmp_path / "raised")
    run(_cfg("train.steps=20"), tmp_path / "raised")
    assert "(step 12 of 20)" in capsys.readouterr().err
    keys = ("policy", "optimiser", "scheduler", "generator", "torch_rng", "order", "cursor", "history", "step")
    want, got = (checkpoint.load_latest(tmp_path / d / "checkpoints") for d in ("long", "raised"))
    assert_same_state({k: want[k] for k in keys}, {k: got[k] for k in keys})
    lines = [(tmp_path / d / "metrics.jsonl").read_text().splitlines() for d in ("long", "raised")]
    assert [json.loads(x)["step"] for x in lines[1]] == [json.loads(x)["step"] for x in lines[0]]


def _digest(folder: Path) -> str:
    h = hashlib.sha256()
    for p in sorted(folder.rglob("*")):
        if p.is_file():
            h.update(p.name.encode() + p.read_bytes())
    return h.hexdigest()


def test_a_checkpoint_of_another_model_shape_is_one_line_and_keeps_everything(tmp_path):
    base = ("task=bradley_terry", "model=loglinear", "train.steps=6")
    run(_cfg(*base, "model.width=6"), tmp_path)
    before = _digest(tmp_path / "checkpoints")
    env = {**_env(), "PYTHONPATH": str(ROOT)}
    cmd = [sys.executable, "-m", "polopt", "train", *FINITE, *base, "model.width=8", f"hydra.run.dir={tmp_path}"]
    done = subprocess.run(cmd, cwd=ROOT, env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 2
    assert len(done.stderr.strip().splitlines()) == 1
    assert "belong to another run (model.width: 6 -> 8)" in done.stderr
    assert _digest(tmp_path / "checkpoints") == before  # nothing lost, nothing rewritten


def _sharded_save(directory: Path, width: int) -> tuple[torch.nn.Module, torch.optim.Optimizer]:
    model = TinyTransformer(7, context=4, width=width, layers=1, heads=2, seed=0)
    optimiser = torch.optim.Adam(model.parameters(), lr=0.1)
    model(torch.zeros(2, 3, dtype=torch.long)).sum().backward()
    optimiser.step()
    scheduler = torch.optim.lr_scheduler.ConstantLR(optimiser, factor=1.0, total_iters=0)
    state = checkpoint.training_state(step=3, policy=model, optimiser=optimiser, scheduler=scheduler,
                                      generator=torch.Generator(), order=torch.arange(4), cursor=0, history=[],
                                      skipped=[], seconds=0.0, sharded=True)
    sharded_checkpoint.save(directory, state, run_id="r", fingerprint="f", config={}, keep=2, is_main=True)
    return model, optimiser


def test_a_sharded_checkpoint_loads_exactly_and_refuses_another_shape(tmp_path):
    model, optimiser = _sharded_save(tmp_path, width=8)
    state = checkpoint.load_latest(tmp_path)
    assert state["step"] == 3 and state["sharded"].endswith("ckpt-00000003.dcp")
    fresh = TinyTransformer(7, context=4, width=8, layers=1, heads=2, seed=1)
    fresh_optimiser = torch.optim.Adam(fresh.parameters(), lr=0.1)
    checkpoint.restore_training_state(state, policy=fresh, optimiser=fresh_optimiser, scheduler=torch.optim.
                                      lr_scheduler.ConstantLR(fresh_optimiser, factor=1.0, total_iters=0),
                                      generator=torch.Generator())
    assert_same_state(model.state_dict(), fresh.state_dict())
    assert_same_state(optimiser.state_dict()["state"], fresh_optimiser.state_dict()["state"])
    other = TinyTransformer(7, context=4, width=16, layers=1, heads=2, seed=0)
    other_optimiser = torch.optim.Adam(other.parameters(), lr=0.1)
    before = _digest(tmp_path)
    with pytest.raises(ValueError, match=r"^the checkpoint of step 3 does not fit this model and optimiser: the "
                                         r"checkpoint .*ckpt-00000003.dcp holds a policy of another shape "):
        checkpoint.restore_training_state(state, policy=other, optimiser=other_optimiser, scheduler=torch.optim.
                                          lr_scheduler.ConstantLR(other_optimiser, factor=1.0, total_iters=0),
                                          generator=torch.Generator())
    assert _digest(tmp_path) == before


def test_a_damaged_shard_is_passed_over_with_a_warning(tmp_path):
    _sharded_save(tmp_path, width=8)
    shard = next((tmp_path / "ckpt-00000003.dcp").glob("*.distcp"))
    data = bytearray(shard.read_bytes())
    data[len(data) // 2] ^= 0xFF  # one flipped byte
    shard.write_bytes(bytes(data))
    warnings: list[str] = []
    assert checkpoint.load_latest(tmp_path, warn=warnings.append) is None
    assert len(warnings) == 1 and "is truncated or altered" in warnings[0]
