"""torch.distributed: N processes with DDP train like one process on the same global batch.

Two processes on the CPU (gloo): the finite task through torch.multiprocessing's
spawn and :func:`polopt.training.loop.train`, the small sequence task through
``python -m torch.distributed.run --nproc_per_node=2 -m polopt train`` (what
``torchrun`` runs). The reference is the same run on one process: mathematically the
same objective and gradients (the loss scale of :func:`polopt.parallel.distributed.sharded_loss`),
numerically different only in summation order (two partial sums and an all_reduce).

Tolerances (stated, and why):
- finite task, float64: 1e-9 relative on the logged metrics and 1e-10 absolute on the
  parameters after 40 Adam steps (measured differences are about 1e-15 to 1e-12;
  rounding differences of float64 are ~1e-16 and Adam's normalisation can amplify
  them where a gradient is near 0).
- sequence task, float32 transformer: 1e-5 absolute on the sequence-level policy
  probabilities and 1e-5 relative on the final loss after 12 steps (measured: about
  1e-7 and 1e-8; float32 rounding is ~6e-8 per operation, and Adam can amplify it).
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest
import torch
import torch.multiprocessing as mp
from helpers_distributed import SETUPS, free_port, run, session_and_policy, worker
from helpers_losses import loss_of_margins, per_pair_of_margins

from polopt.checkpoints import store as checkpoint
from polopt.losses.reduce import margins
from polopt.parallel import distributed

ROOT = Path(__file__).resolve().parents[2]


# ----------------------------------------------------------------------------
# Pure parts: the environment, the slices, the loss scale
# ----------------------------------------------------------------------------


def test_one_process_without_torchrun_variables():
    assert distributed.from_environment({}) == distributed.SINGLE
    assert distributed.setup({}) is distributed.SINGLE  # no process group is created
    assert distributed.from_environment({"RANK": "1", "WORLD_SIZE": "3", "LOCAL_RANK": "1"}) == \
        distributed.Context(1, 3, 1)


@pytest.mark.parametrize("env, message", [
    ({"RANK": "a", "WORLD_SIZE": "2"}, r"RANK, WORLD_SIZE and LOCAL_RANK must be integers .*RANK='a'"),
    ({"RANK": "2", "WORLD_SIZE": "2"}, r"RANK must lie in 0..WORLD_SIZE-1 .*got RANK=2, WORLD_SIZE=2"),
])
def test_bad_environment_is_one_line(env, message):
    with pytest.raises(ValueError, match=message):
        distributed.from_environment(env)


@pytest.mark.parametrize("n, world", [(7, 2), (8, 2), (5, 3), (3, 3), (100, 7)])
def test_slices_partition_the_batch(n, world):
    parts = [distributed.local_slice(n, distributed.Context(r, world)) for r in range(world)]
    covered = [i for p in parts for i in range(n)[p]]
    assert covered == list(range(n))  # contiguous, in rank order, each position once
    sizes = [len(range(n)[p]) for p in parts]
    assert max(sizes) - min(sizes) <= 1


def test_a_batch_smaller_than_the_world_is_refused():
    session, _, _ = session_and_policy("sampled-minibatch")
    batch = session.pairs.select(torch.arange(2))
    with pytest.raises(ValueError, match=r"train.batch_size \(2 pairs a step\) must be at least the number of "
                                         r"processes \(3\)"):
        distributed.shard(batch, torch.arange(2), distributed.Context(0, 3))


def test_the_loss_scale_makes_the_averaged_gradient_the_global_one():
    """DDP averages gradients: (1/N) sum_r grad(N S_r / W) = grad(sum_i w_i l_i / W) (derived by hand in
    sharded_loss's docstring). Checked here without processes, by autograd on each shard, against the
    one-process weighted mean; and the plain per-shard weighted mean is shown to be wrong on these
    weighted pairs, so the distributed comparison below can tell the two apart."""
    session, policy, loss = session_and_policy("exact-weighted-fullbatch")
    pairs, world = session.pairs, 2
    total = pairs.weight.sum()

    def grad_of(objective_of_batch, part):
        policy.zero_grad()
        batch = pairs.select(part)
        logp = policy.logprobs(torch.cat([batch.prompt, batch.prompt]), torch.cat([batch.winner, batch.loser]))
        rho = margins(*logp.chunk(2), batch.reference_winner, batch.reference_loser)
        objective_of_batch(rho, batch).backward()
        return policy.scores.grad.clone()

    everything = torch.arange(len(pairs))
    full = grad_of(lambda rho, b: loss_of_margins(loss, rho, beta=0.5, weights=b.weight), everything)
    shards = [everything[distributed.local_slice(len(pairs), distributed.Context(r, world))] for r in range(world)]
    scaled = sum(grad_of(lambda rho, b: world * (b.weight * per_pair_of_margins(loss, rho, beta=0.5)).sum() / total, s)
                 for s in shards) / world
    naive = sum(grad_of(lambda rho, b: loss_of_margins(loss, rho, beta=0.5, weights=b.weight), s)
                for s in shards) / world
    torch.testing.assert_close(scaled, full, rtol=1e-12, atol=1e-15)
    assert float((naive - full).abs().max()) > 1e-3 * float(full.abs().max())


# ----------------------------------------------------------------------------
# Two processes against one: the finite task
# ----------------------------------------------------------------------------


def test_two_processes_match_one_on_the_finite_task(tmp_path):
    out = tmp_path / "two.pt"
    mp.spawn(worker, args=(2, free_port(), str(out)), nprocs=2)
    two = torch.load(out, weights_only=True)
    for setup in SETUPS:
        policy, result = run(setup)
        for name, value in policy.state_dict().items():
            torch.testing.assert_close(two[setup]["policy"][name], value, rtol=0, atol=1e-10, msg=setup)
        assert two[setup]["skipped"] == result.skipped and bool(result.skipped) == ("nan_pair" in SETUPS[setup])
        assert [r["step"] for r in two[setup]["history"]] == [r["step"] for r in result.history]
        for got, want in zip(two[setup]["history"], result.history, strict=True):
            for key in ("loss", "margin_mean", "pair_accuracy", "logratio_winner", "logratio_loser", "grad_norm",
                        "kl_to_reference", "tv_to_optimum"):
                if want.get(key) is not None:
                    assert math.isclose(got[key], want[key], rel_tol=1e-9, abs_tol=1e-13), (setup, key)


# ----------------------------------------------------------------------------
# Two processes against one: polopt train under torchrun, and a resume on one process
# ----------------------------------------------------------------------------

SEQUENCE = ["+experiment=sequence", "task.mode=sampled", "task.n_pairs=40", "task.n_symbols=2", "task.max_length=3",
            "task.reference_width=16", "task.reference_layers=1", "model.width=16", "model.layers=1",
            "train.batch_size=8", "train.steps=12", "train.log_every=4", "train.checkpoint_every=6",
            "train.keep_checkpoints=3", "train.progress=false"]


def polopt_train(run_dir: Path, processes: int, *extra: str) -> dict:
    """``polopt train`` on the sequence task in a fresh interpreter (or under torch.distributed.run)."""
    env = {**os.environ, "PYTHONPATH": str(ROOT), "OMP_NUM_THREADS": "1", "HF_HUB_OFFLINE": "1"}
    for key in ("RANK", "WORLD_SIZE", "LOCAL_RANK", "MASTER_ADDR", "MASTER_PORT"):
        env.pop(key, None)
    launcher = [] if processes == 1 else ["-m", "torch.distributed.run", f"--nproc_per_node={processes}",
                                          "--master_addr=127.0.0.1", f"--master_port={free_port()}"]
    cmd = [sys.executable, *launcher, "-m", "polopt", "train", *SEQUENCE, *extra, f"hydra.run.dir={run_dir}"]
    done = subprocess.run(cmd, cwd=ROOT, env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads((run_dir / "summary.json").read_text())


def polopt_train_on_two_nodes(run_dir: Path, *extra: str) -> dict:
    """``polopt train`` under two torchrun launchers on this machine acting as two nodes (``--nnodes=2``, one
    process each, c10d rendezvous on 127.0.0.1), as on a cluster whose nodes share the run folder."""
    env = {**os.environ, "PYTHONPATH": str(ROOT), "OMP_NUM_THREADS": "1", "HF_HUB_OFFLINE": "1"}
    for key in ("RANK", "WORLD_SIZE", "LOCAL_RANK", "MASTER_ADDR", "MASTER_PORT"):
        env.pop(key, None)
    port = free_port()
    launchers = [[sys.executable, "-m", "torch.distributed.run", "--nnodes=2", "--nproc_per_node=1",
                  f"--node_rank={node}", "--rdzv_backend=c10d", f"--rdzv_endpoint=127.0.0.1:{port}",
                  f"--rdzv_id=polopt-{port}", "-m", "polopt", "train", *SEQUENCE, *extra, f"hydra.run.dir={run_dir}"]
                 for node in (0, 1)]
    nodes = [subprocess.Popen(cmd, cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for cmd in launchers]
    for node in nodes:
        _, err = node.communicate(timeout=300)
        assert node.returncode == 0, err[-3000:]
    return json.loads((run_dir / "summary.json").read_text())


def assert_close_runs(got: dict, want: dict) -> None:
    assert got["steps"] == want["steps"]
    assert math.isclose(got["loss"], want["loss"], rel_tol=1e-5)
    for a, b in zip(got["policy"], want["policy"], strict=True):
        torch.testing.assert_close(torch.tensor(a), torch.tensor(b), rtol=0, atol=1e-5)


@pytest.mark.slow
def test_torchrun_matches_one_process_and_its_checkpoint_resumes_on_one(tmp_path):
    two = polopt_train(tmp_path / "two", 2)
    one = polopt_train(tmp_path / "one", 1)
    assert two["processes"] == 2 and "processes" not in one
    assert_close_runs(two, one)
    lines = (tmp_path / "two" / "metrics.jsonl").read_text().splitlines()
    assert [json.loads(line)["step"] for line in lines] == [1, 4, 8, 12]  # rank 0 alone wrote, once a step
    assert "module." not in "".join(checkpoint.load_latest(tmp_path / "two" / "checkpoints")["policy"])

    # the two-process checkpoint of step 6, alone in a fresh run folder, continued by one process
    resumed = tmp_path / "resumed"
    entries = checkpoint.list_checkpoints(tmp_path / "two" / "checkpoints")
    assert [e["step"] for e in entries] == [6, 12] and all(e["ok"] for e in entries)
    state = torch.load(tmp_path / "two" / "checkpoints" / entries[0]["file"], weights_only=True)
    checkpoint.save(resumed / "checkpoints", state, run_id=state["run_id"], fingerprint=state["fingerprint"],
                    config=state["config"])
    after = polopt_train(resumed, 1)
    assert_close_runs(after, one)
    assert [json.loads(line)["step"] for line in (resumed / "metrics.jsonl").read_text().splitlines()] == \
        [1, 4, 8, 12]



@pytest.mark.slow
def test_two_torchrun_nodes_train_to_the_one_process_result(tmp_path):
    # the multi-machine path: two launchers, one process each, meeting at a c10d rendezvous
    nodes = polopt_train_on_two_nodes(tmp_path / "nodes")
    one = polopt_train(tmp_path / "one", 1)
    assert nodes["processes"] == 2
    assert_close_runs(nodes, one)


@pytest.mark.slow
def test_torchrun_trains_a_pair_objective_as_one_process_does(tmp_path):
    """SimPO (reference-free, per-token lengths of the sampled token pairs) under torchrun: each rank
    scores its shard with the shard's own lengths, and the run ends where the one-process run does."""
    extra = ("loss=length_normalised_free", "train.checkpoint_every=0")
    two = polopt_train(tmp_path / "two", 2, *extra)
    one = polopt_train(tmp_path / "one", 1, *extra)
    assert two["loss_name"] == one["loss_name"] == "length_normalised_free"
    assert_close_runs(two, one)
