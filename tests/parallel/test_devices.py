"""``train.device``: names resolved to torch devices, the process-group backend, and the GPU path.

The backend choice follows torch.distributed's documentation ("Use the NCCL backend
for distributed GPU training. Use the Gloo backend for distributed CPU training",
https://pytorch.org/docs/stable/distributed.html#which-backend-to-use). The GPU test
runs only where torch sees a CUDA GPU; on a CPU-only machine (CI) it is skipped, and
the CPU path is what every other test of the trainer exercises.
"""

from __future__ import annotations

import json
import math

import pytest
import torch
from hydra import compose, initialize_config_dir

from polopt.commands.train import CONFIG_DIR, run
from polopt.pairs import PairSet
from polopt.parallel import devices

GPU = torch.cuda.is_available()


@pytest.mark.parametrize(("name", "available", "local_rank", "want"), [
    (None, False, 0, "cpu"),
    ("cpu", True, 0, "cpu"),
    (" CPU ", False, 0, "cpu"),
    ("auto", False, 0, "cpu"),
    ("auto", True, 0, "cuda:0"),
    ("cuda", True, 0, "cuda:0"),
    ("cuda", True, 3, "cuda:3"),  # torchrun: rank r on the GPU of its LOCAL_RANK
    ("cuda:2", True, 0, "cuda:2"),
])
def test_names_resolve_to_devices(name, available, local_rank, want):
    assert devices.resolve(name, local_rank=local_rank, cuda_available=available) == torch.device(want)


@pytest.mark.parametrize(("name", "available", "processes", "message"), [
    ("gpu0", True, 1, r"train.device must be cpu, cuda, cuda:N or auto .*got 'gpu0'"),
    ("mps", True, 1, r"polopt trains on the CPU or on CUDA GPUs"),
    ("cuda", False, 1, r"torch sees no GPU .*use train.device=cpu"),
    ("cuda:1", True, 2, r"would put them all on one GPU; give train.device=cuda"),
])
def test_bad_devices_say_what_to_set(name, available, processes, message):
    with pytest.raises(ValueError, match=message):
        devices.resolve(name, processes=processes, cuda_available=available)


def test_a_gpu_index_beyond_the_gpus_present():
    if torch.cuda.is_available():
        count = torch.cuda.device_count()
        with pytest.raises(ValueError, match=rf"GPU {count} asked for, but torch sees {count}"):
            devices.resolve(f"cuda:{count}")
    else:
        with pytest.raises(ValueError, match="torch sees no GPU"):
            devices.resolve("cuda:0")


def test_backend_nccl_for_gpus_gloo_for_the_cpu():
    assert devices.process_group_backend(torch.device("cuda", 0)) == "nccl"
    assert devices.process_group_backend(torch.device("cpu")) == "gloo"


def test_pair_sets_move_whole():
    pairs = PairSet(torch.ones(3, 2, dtype=torch.long), torch.ones(3, 4, dtype=torch.long),
                    torch.zeros(3, 4, dtype=torch.long), torch.zeros(3, dtype=torch.float64),
                    torch.ones(3, dtype=torch.float64), None, torch.full((3,), 12))
    moved = pairs.to(torch.device("meta"))  # a device with shapes and no data: any tensor left behind shows
    assert all(t.device.type == "meta" for t in (moved.prompt, moved.winner, moved.loser, moved.reference_winner,
                                                  moved.reference_loser, moved.tokens))
    assert moved.weight is None and moved.winner.shape == (3, 4) and moved.reference_loser.dtype == torch.float64


TINY_PAIRS = ["task=pairs", "model=transformer", "model.width=16", "model.layers=1", "model.heads=2",
              "model.context=48", "train.steps=6", "train.batch_size=4", "train.log_every=2", "train.progress=false",
              "optim.lr=0.01"]


def _pairs_cfg(path, *overrides):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose("config", overrides=[*TINY_PAIRS, f"task.path={path}", *overrides])


@pytest.fixture()
def pair_file(tmp_path):
    path = tmp_path / "pairs.jsonl"
    rows = [{"prompt": f"dish {i}?", "winner": f"bake it for {10 + i} minutes", "loser": "no idea"} for i in range(10)]
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    return path


def test_the_toy_tasks_stay_on_the_cpu(tmp_path):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["train.steps=2", "train.progress=false", "train.device=cuda:0"])
    with pytest.raises(ValueError, match="torch sees no GPU" if not GPU else "trains task=pairs with method=offline"):
        run(cfg, tmp_path)


@pytest.mark.skipif(not GPU, reason="needs a CUDA GPU (torch.cuda.is_available() is False here)")
def test_a_gpu_run_follows_the_cpu_run(pair_file, tmp_path):
    # same seeded model, data and batches; float32 on two devices differs by rounding only
    # (tolerance: 1e-4 relative on the final loss after 6 Adam steps; cuBLAS and the CPU sum in other orders)
    cpu = run(_pairs_cfg(pair_file), tmp_path / "cpu")
    gpu = run(_pairs_cfg(pair_file, "train.device=cuda"), tmp_path / "gpu")
    assert gpu["steps"] == cpu["steps"] == 6
    assert math.isclose(gpu["loss"], cpu["loss"], rel_tol=1e-4)
    assert math.isclose(gpu["margin_mean"], cpu["margin_mean"], rel_tol=1e-3, abs_tol=1e-5)


def test_auto_on_a_machine_without_a_gpu_is_the_cpu_run(pair_file, tmp_path):
    if GPU:
        pytest.skip("torch sees a GPU: auto picks it")
    default = run(_pairs_cfg(pair_file), tmp_path / "default")
    auto = run(_pairs_cfg(pair_file, "train.device=auto"), tmp_path / "auto")
    assert auto["loss"] == default["loss"] and auto["margin_mean"] == default["margin_mean"]
