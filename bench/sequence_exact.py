"""Bench: the tiny transformer on the default sequence task, and bf16 against fp32.

    PYTHONPATH=. python bench/sequence_exact.py [--threads 1] [--steps 400] [--skip-training]

Prints, for the logistic and the squared loss in exact mode on ``task=sequence``
(the settings of ``+experiment=sequence``): the first logged step at which the
sequence-level tv_to_optimum is <= 0.05, the seconds it took, and the final
distance; then the forward+backward throughput of a wider transformer in
bfloat16 autocast against float32, and of one bare matrix product (ratios
measured in the same run). Figures only; nothing passes or fails.
"""

from __future__ import annotations

import argparse
import time

import torch
from hydra import compose, initialize_config_dir
from omegaconf import OmegaConf

from polopt import losses
from polopt.commands.config import CONFIG_DIR, build_task
from polopt.models.logprobs import sequence_logprobs
from polopt.models.transformer import TinyTransformer
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig

TARGET = 0.05


def exact_run(loss_name: str, steps: int, precision: str) -> dict:
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["+experiment=sequence", f"loss={loss_name}", f"train.steps={steps}"])
    task = build_task(cfg.task)
    loss = losses.resolve_margin(loss_name)
    start = time.perf_counter()
    session = task.prepare(loss, beta=float(cfg.beta), mode="exact")
    prepare_s = time.perf_counter() - start
    policy = session.build_policy(**OmegaConf.to_container(cfg.model))
    result = train(policy, session.pairs, loss,
                   TrainSettings(beta=float(cfg.beta), steps=steps,
                                 optim=OptimConfig(**OmegaConf.to_container(cfg.optim)), log_every=10, progress=False,
                                 precision=precision),
                   evaluate=session.evaluate)
    hit = next((h for h in result.history if h["tv_to_optimum"] <= TARGET), None)
    return {"responses": task.n_responses, "pairs": len(session.pairs), "prepare_s": prepare_s,
            "hit_step": None if hit is None else hit["step"], "hit_s": None if hit is None else hit["seconds"],
            "final_tv": result.final["tv_to_optimum"], "seconds": result.seconds,
            "s_per_step": result.seconds / steps}


def throughput(precision: str, *, width: int, batch: int, length: int, repeats: int) -> float:
    """Real tokens per second of forward + backward through sequence_logprobs."""
    model = TinyTransformer(64, context=length, width=width, layers=2, heads=4, seed=0)
    g = torch.Generator().manual_seed(0)
    prompt = torch.randint(0, 63, (batch, 4), generator=g)
    response = torch.randint(0, 63, (batch, length - 4), generator=g)

    def step():
        with torch.autocast("cpu", dtype=torch.bfloat16, enabled=precision == "bf16"):
            value = sequence_logprobs(model, prompt, response, pad_id=63).sum()
        value.backward()

    step()  # warm-up
    start = time.perf_counter()
    for _ in range(repeats):
        step()
    return repeats * batch * length / (time.perf_counter() - start)


def matmul_rate(dtype: torch.dtype, n: int = 1024) -> float:
    """GFLOP/s of one n x n matrix product."""
    a, b = torch.randn(n, n).to(dtype), torch.randn(n, n).to(dtype)
    a @ b  # warm-up
    repeats = 10
    start = time.perf_counter()
    for _ in range(repeats):
        a @ b
    return 2 * n**3 * repeats / (time.perf_counter() - start) / 1e9


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--threads", type=int, default=1, help="torch CPU threads (default 1)")
    parser.add_argument("--steps", type=int, default=400)
    parser.add_argument("--skip-training", action="store_true", help="only the bf16 / fp32 throughput")
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    print(f"torch {torch.__version__}, {args.threads} thread(s)")
    if not args.skip_training:
        print(f"exact mode, task=sequence defaults, +experiment=sequence, {args.steps} steps")
        print(f"{'loss':<10} {'precision':<9} {'K':>5} {'pairs':>7} {'s/step':>7} {'step tv<=0.05':>13} "
              f"{'seconds':>8} {'final tv':>9}")
        for loss_name in ("logistic", "squared"):
            for precision in ("fp32", "bf16"):
                r = exact_run(loss_name, args.steps, precision)
                hit = "-" if r["hit_step"] is None else str(r["hit_step"])
                hit_s = "-" if r["hit_s"] is None else f"{r['hit_s']:.1f}"
                print(f"{loss_name:<10} {precision:<9} {r['responses']:>5} {r['pairs']:>7} {r['s_per_step']:>7.3f} "
                      f"{hit:>13} {hit_s:>8} {r['final_tv']:>9.4f}", flush=True)
    print("forward+backward throughput, transformer width 256, 2 layers, batch 64 x 64 tokens")
    fp32 = throughput("fp32", width=256, batch=64, length=64, repeats=5)
    bf16 = throughput("bf16", width=256, batch=64, length=64, repeats=5)
    print(f"fp32 {fp32:,.0f} tokens/s   bf16 {bf16:,.0f} tokens/s   bf16 / fp32 = {bf16 / fp32:.2f}")
    mm32, mm16 = matmul_rate(torch.float32), matmul_rate(torch.bfloat16)
    print(f"one 1024 x 1024 matrix product: fp32 {mm32:.0f} GFLOP/s   bf16 {mm16:.0f} GFLOP/s   "
          f"bf16 / fp32 = {mm16 / mm32:.2f}")


if __name__ == "__main__":
    main()
