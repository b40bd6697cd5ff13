"""Memory per process and steps/s: train.strategy=fsdp against ddp (2 processes, gloo) against one process.

    PYTHONPATH=. python bench/sharding.py [--width 512] [--layers 4] [--steps 10] [--json out.json]

Runs ``polopt train task=pairs`` on a generated file of invented word pairs (bench/stream_file.py's
generator) with a transformer of ``--width`` and ``--layers`` (Adam: per replica the weights, their
gradients and two moments, 16 bytes a parameter in fp32), the same global batch each time: one
process; ``torchrun --nproc_per_node=2`` with ``train.strategy=ddp`` (every process holds all of it);
and with ``train.strategy=fsdp`` (each process holds half of the weights, gradients and moments,
plus one unit's gathered weights at a time). Each configuration runs in a wrapper process that
starts only it and reads ``resource.getrusage(RUSAGE_CHILDREN).ru_maxrss``: the largest peak
resident set of any one process below it (a rank; the launcher is smaller). steps/s is the
trainer's own (the last logged step over its ``seconds``), with the load average beside it: on a
shared machine compare the ratios of one run, and the memory, which load does not change. Prints
the figures; never passes or fails.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench.stream_file import free_port, write_file  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
CONFIGS = {"one process": (1, "ddp"), "ddp, 2 processes": (2, "ddp"), "fsdp, 2 processes": (2, "fsdp")}


def run_config(name: str, data: Path, tmp: Path, args) -> dict:
    processes, strategy = CONFIGS[name]
    run_dir = tmp / name.replace(" ", "").replace(",", "-")
    launcher = [] if processes == 1 else ["-m", "torch.distributed.run", f"--nproc_per_node={processes}",
                                          "--master_addr=127.0.0.1", f"--master_port={free_port()}"]
    cmd = [sys.executable, *launcher, "-m", "polopt", "train", "task=pairs", f"task.path={data}", "model=transformer",
           f"model.width={args.width}", f"model.layers={args.layers}", "model.heads=4", "model.context=128",
           "train.batch_size=16", f"train.steps={args.steps}", "train.log_every=1", "train.progress=false",
           f"train.strategy={strategy}", "train.threads=1", f"hydra.run.dir={run_dir}"]
    wrapper = subprocess.run([sys.executable, str(ROOT / "bench" / "stream_file.py"), "--child", json.dumps(cmd)],
                             cwd=ROOT, capture_output=True, text=True,
                             env={**os.environ, "PYTHONPATH": str(ROOT), "OMP_NUM_THREADS": "1"})
    out = json.loads(wrapper.stdout.strip().splitlines()[-1])
    if out["returncode"] != 0:
        raise RuntimeError(f"{name} failed: {out['stderr']}")
    metrics = [json.loads(x) for x in (run_dir / "metrics.jsonl").read_text().splitlines()]
    summary = json.loads((run_dir / "summary.json").read_text())
    # steps/s after the first step (which carries the process group's and the allocator's warm-up)
    first, last = metrics[0], metrics[-1]
    return {"config": name, "processes": processes, "strategy": strategy, "peak_rss_mib": out["peak_rss_mib"],
            "steps_per_s": (last["step"] - first["step"]) / (last["seconds"] - first["seconds"]),
            "loss": summary["loss"], "load": os.getloadavg()[0]}


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--width", type=int, default=512)
    parser.add_argument("--layers", type=int, default=4)
    parser.add_argument("--steps", type=int, default=10)
    parser.add_argument("--pairs", type=int, default=2000)
    parser.add_argument("--json", type=Path, default=None)
    args = parser.parse_args(argv)
    params = 12 * args.width ** 2 * args.layers  # the blocks' matrices (attention 4 C^2, MLP 8 C^2 a layer)
    print(f"transformer width {args.width}, {args.layers} layers: about {params / 1e6:.1f} M parameters in its "
          f"blocks, {16 * params / 2**20:.0f} MiB of weights, gradients and Adam moments per replica in fp32")
    rows = []
    with tempfile.TemporaryDirectory(prefix="polopt-sharding-") as tmp:
        data = write_file(Path(tmp) / "pairs.jsonl", args.pairs)
        for name in CONFIGS:
            rows.append(run_config(name, data, Path(tmp), args))
            r = rows[-1]
            print(f"  {name:18s} peak RSS {r['peak_rss_mib']:6.0f} MiB a process  {r['steps_per_s']:6.2f} steps/s  "
                  f"loss {r['loss']:.6f}  (load {r['load']:.1f})", flush=True)
    one, ddp, fsdp = rows
    print(f"fsdp / ddp peak RSS a process: {fsdp['peak_rss_mib'] / ddp['peak_rss_mib']:.3f}; "
          f"steps/s fsdp / ddp {fsdp['steps_per_s'] / ddp['steps_per_s']:.2f}, "
          f"ddp / one process {ddp['steps_per_s'] / one['steps_per_s']:.2f}")
    if args.json:
        args.json.write_text(json.dumps(rows, indent=1) + "\n")


if __name__ == "__main__":
    main()
