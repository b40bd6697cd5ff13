"""The GPU path in one script: correctness against the CPU, then throughput. Runs as is on a CUDA machine.

    PYTHONPATH=. python bench/gpu_check.py [--pairs 2000] [--steps 20] [--timeout 240]

Where torch sees no GPU it prints one line saying so and exits 0 (nothing to check). Otherwise:

1. ``pytest tests/parallel/test_devices.py``: the tests' GPU parts (skipped on a CPU-only machine).
2. ``polopt train task=pairs`` on a generated file of ``--pairs`` invented word pairs, fp32 and SGD
   (a constant learning rate: differences stay at rounding size, where Adam's normalised first steps
   can amplify a rounding difference to the step size), ``train.device=cpu`` against ``cuda``, and
   ``task.stream=true`` on cuda. Tolerance: the final loss, margin and log-ratios over all pairs within
   1e-4 relative (plus 1e-6 absolute) of the CPU run. Why: the GPU's matrix products and attention
   kernels sum in another order than the CPU's (float32 rounding ~6e-8 per operation, over 20 steps
   of a 2-layer transformer), and TF32 stays off (torch's default for matrix products).
   2b. the same for ``model=local_lm`` (examples/tiny_local_lm.py's random Llama-shaped model with a chat
   template), fully and with LoRA, and its ``policy/`` written on the device.
3. With 2 or more GPUs: the same run under torchrun on 2 processes (NCCL), train.strategy=ddp and
   fsdp, against the one-process CPU run, same tolerance.
4. Throughput: tokens/s and steps/s (the trainer's own ``tokens_per_s`` metric, and steps over the
   loop's seconds) of a wider model (width 256, 4 layers, batch 64): cpu fp32 (8 steps), cuda fp32 and bf16 (30 steps).

Exit status 0 when every check holds, 1 when one fails (each failure is printed with its figures).
"""

from __future__ import annotations

import argparse
import json
import os
import random
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import torch

ROOT = Path(__file__).resolve().parent.parent
WORDS = ["amber", "birch", "cobalt", "dune", "ember", "fjord", "glade", "harbor", "iris", "juniper", "kelp", "lumen"]
KEYS = ("loss", "margin_mean", "logratio_winner", "logratio_loser")
RTOL, ATOL = 1e-4, 1e-6
CUDA = "cuda"  # the device under test (--rehearse-on-cpu: cpu)
BASE = ["task=pairs", "model=transformer", "model.context=48", "train.batch_size=32", "train.progress=false",
        "train.bucketing=false", "optim=sgd", "optim.lr=0.5", "optim.schedule=constant", "train.log_every=5"]


def _path() -> str:
    """The checkout first, then whatever PYTHONPATH already holds (packages carried to a bare machine)."""
    return os.pathsep.join(p for p in (str(ROOT), os.environ.get("PYTHONPATH", "")) if p)


def write_pairs(path: Path, n: int, seed: int = 0) -> Path:
    rng = random.Random(seed)

    def text(k: int) -> str:
        return " ".join(rng.choice(WORDS) for _ in range(rng.randint(1, k)))

    with path.open("w") as f:
        for _ in range(n):
            w, lo = text(4), text(4)
            f.write(json.dumps({"prompt": text(3), "winner": w, "loser": lo + ("" if w != lo else " kelp")}) + "\n")
    return path


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def polopt_train(run_dir: Path, args: list[str], *, processes: int = 1, timeout: float) -> dict:
    env = {**os.environ, "PYTHONPATH": _path(), "HF_HUB_OFFLINE": "1"}
    launcher = [] if processes == 1 else ["-m", "torch.distributed.run", f"--nproc_per_node={processes}",
                                          "--master_addr=127.0.0.1", f"--master_port={free_port()}"]
    cmd = [sys.executable, *launcher, "-m", "polopt", "train", *args, f"hydra.run.dir={run_dir}"]
    start = time.perf_counter()
    done = subprocess.run(cmd, cwd=ROOT, env=env, capture_output=True, text=True, timeout=timeout)
    if done.returncode != 0:
        raise RuntimeError(f"{' '.join(args)}: exit {done.returncode}: {done.stderr.strip()[-800:]}")
    summary = json.loads((run_dir / "summary.json").read_text())
    metrics = [json.loads(x) for x in (run_dir / "metrics.jsonl").read_text().splitlines()]
    summary["wall_s"] = time.perf_counter() - start
    summary["tokens_per_s"] = metrics[-1].get("tokens_per_s")
    summary["steps_per_s"] = metrics[-1]["step"] / metrics[-1]["seconds"]
    return summary


def compare(name: str, got: dict, want: dict, failures: list[str]) -> None:
    worst = max(abs(got[k] - want[k]) / (abs(want[k]) + ATOL / RTOL) for k in KEYS)
    ok = all(abs(got[k] - want[k]) <= RTOL * abs(want[k]) + ATOL for k in KEYS)
    print(f"  {name:34s} loss {got['loss']:.8f} (cpu {want['loss']:.8f})  worst relative difference {worst:.2e}  "
          f"{'ok' if ok else 'FAILED'}")
    if not ok:
        failures.append(f"{name}: " + ", ".join(f"{k} {got[k]!r} vs cpu {want[k]!r}" for k in KEYS))


def local_lm_on_the_device(tmp: Path, args, failures: list[str]) -> None:
    """A local transformers causal LM (examples/tiny_local_lm.py: a random Llama-shaped model with a chat
    template, plain and chat rows), fully and with LoRA: the device against the CPU, same tolerance."""
    subprocess.run([sys.executable, str(ROOT / "examples" / "tiny_local_lm.py"), str(tmp / "lm")], check=True,
                   capture_output=True, env={**os.environ, "PYTHONPATH": _path()})
    lm = ["task=pairs", f"task.path={tmp / 'lm' / 'pairs.jsonl'}", "model=local_lm",
          f"model.path={tmp / 'lm' / 'model'}", f"train.steps={args.steps}", "train.progress=false",
          "optim=sgd", "optim.lr=0.1", "optim.schedule=constant", "train.log_every=5"]
    print(f"2b. model=local_lm (a tiny Llama-shaped model), cpu against {CUDA}, {args.steps} SGD steps")
    for adapter in ("null", "lora"):
        cpu = polopt_train(tmp / f"lm-cpu-{adapter}", [*lm, f"model.adapter={adapter}", "train.device=cpu"],
                           timeout=args.timeout)
        got = polopt_train(tmp / f"lm-dev-{adapter}", [*lm, f"model.adapter={adapter}", f"train.device={CUDA}"],
                           timeout=args.timeout)
        compare(f"local_lm, model.adapter={adapter}", got, cpu, failures)
        if not (tmp / f"lm-dev-{adapter}" / "policy").is_dir():
            failures.append(f"local_lm, model.adapter={adapter}: no policy/ written on {CUDA}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pairs", type=int, default=2000)
    parser.add_argument("--steps", type=int, default=20)
    parser.add_argument("--timeout", type=float, default=240.0, help="seconds allowed to each polopt train")
    parser.add_argument("--rehearse-on-cpu", action="store_true",
                        help="run every step with train.device=cpu where it says cuda (checks the script itself)")
    args = parser.parse_args(argv)
    global CUDA
    if args.rehearse_on_cpu:
        CUDA = "cpu"
    elif not torch.cuda.is_available():
        print("gpu_check: torch sees no GPU (torch.cuda.is_available() is False, torch "
              f"{torch.__version__}, CUDA build {torch.version.cuda}); nothing to check here: run this script "
              "on a machine with a CUDA GPU")
        return 0
    gpus = 2 if args.rehearse_on_cpu else torch.cuda.device_count()
    name = "none, a rehearsal on the CPU" if args.rehearse_on_cpu else torch.cuda.get_device_name(0)
    print(f"gpu_check: {gpus} GPU(s): {name}; torch {torch.__version__}, CUDA {torch.version.cuda}")
    failures: list[str] = []
    print("1. the tests' GPU parts: pytest tests/parallel/test_devices.py")
    done = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider",
                           "tests/parallel/test_devices.py"], cwd=ROOT, env={**os.environ, "PYTHONPATH": _path()},
                          capture_output=True, text=True)
    print("  " + (done.stdout.strip().splitlines() or ["(no output)"])[-1])
    if done.returncode != 0:
        failures.append(f"tests/parallel/test_devices.py: {done.stdout[-1500:]}")
    with tempfile.TemporaryDirectory(prefix="polopt-gpu-") as tmp:
        tmp = Path(tmp)
        data = write_pairs(tmp / "pairs.jsonl", args.pairs)
        common = [*BASE, f"task.path={data}", f"train.steps={args.steps}", "model.width=64", "model.layers=2"]
        print(f"2. cpu against cuda: {args.pairs} pairs, {args.steps} SGD steps, fp32 (tolerance {RTOL} relative)")
        cpu = polopt_train(tmp / "cpu", [*common, "train.device=cpu"], timeout=args.timeout)
        compare("cuda", polopt_train(tmp / "cuda", [*common, f"train.device={CUDA}"], timeout=args.timeout), cpu,
                failures)
        compare("cuda, task.stream=true", polopt_train(tmp / "stream", [*common, f"train.device={CUDA}",
                                                                       "task.stream=true"], timeout=args.timeout),
                cpu, failures)
        local_lm_on_the_device(tmp, args, failures)
        if gpus >= 2:
            print("3. torchrun on 2 GPUs (NCCL) against one CPU process")
            for strategy in ("ddp", "fsdp"):
                got = polopt_train(tmp / f"nccl-{strategy}", [*common, f"train.device={CUDA}",
                                                               f"train.strategy={strategy}"],
                                   processes=2, timeout=args.timeout)
                compare(f"2 GPUs, train.strategy={strategy}", got, cpu, failures)
        else:
            print("3. skipped: one GPU (two NCCL processes need a GPU each)")
        print("4. throughput: width 256, 4 layers, batch 64 (tokens/s of real tokens; steps/s of the loop)")
        wide = [*BASE, f"task.path={data}", "model.width=256", "model.layers=4",
                "model.heads=4", "train.batch_size=64", "optim=adam", "optim.lr=0.001"]
        for k, (device, precision, steps) in enumerate([("cpu", "fp32", 8), (CUDA, "fp32", 30), (CUDA, "bf16", 30)]):
            s = polopt_train(tmp / f"speed-{k}", [*wide, f"train.device={device}", f"precision={precision}",
                                                  f"train.steps={steps}"], timeout=args.timeout)
            print(f"  {device:5s} {precision}: {s['tokens_per_s']:10.0f} tokens/s  {s['steps_per_s']:7.2f} "
                  f"steps/s  (wall {s['wall_s']:.1f} s)")
    for line in failures:
        print(f"FAILED {line}")
    print("gpu_check: " + ("every check holds" if not failures else f"{len(failures)} check(s) failed"))
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
