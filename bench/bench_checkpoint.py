"""How much checkpointing costs a training run: seconds per step with a checkpoint after every
step, relative to the same run with one checkpoint at the end (both measured here, same process).

    PYTHONPATH=. python bench/bench_checkpoint.py [--steps 200]

Prints figures; never passes or fails.
"""

from __future__ import annotations

import argparse
import tempfile
import time
import uuid

from polopt import losses
from polopt.checkpoints import store as checkpoint
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig
from toy_tasks.families import contextual
from toy_tasks.finite.session import prepare


def one_run(steps: int, every: int, folder: str) -> tuple[float, int]:
    loss = losses.resolve_margin("logistic")
    session = prepare(contextual(n_prompts=4, n_responses=8), loss, beta=0.5, mode="sampled", n_pairs=2000)
    policy = session.build_policy()
    run_id, saves = uuid.uuid4().hex, []

    def save(state):
        saves.append(checkpoint.save(folder, state, run_id=run_id, fingerprint="bench", config={}))

    start = time.perf_counter()
    train(policy, session.pairs, loss,
          TrainSettings(beta=0.5, steps=steps, optim=OptimConfig(), batch_size=64, progress=False,
                        checkpoint_every=every),
          save_checkpoint=save)
    return time.perf_counter() - start, (saves[-1].stat().st_size if saves else 0)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=200)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as a, tempfile.TemporaryDirectory() as b:
        base, _ = one_run(args.steps, 0, a)
        every, size = one_run(args.steps, 1, b)
    print(f"steps {args.steps}; checkpoint size {size} bytes")
    print(f"one checkpoint at the end: {1e3 * base / args.steps:.2f} ms/step")
    print(f"a checkpoint every step:   {1e3 * every / args.steps:.2f} ms/step "
          f"(x{every / base:.2f}; {1e3 * (every - base) / args.steps:.2f} ms per checkpoint)")


if __name__ == "__main__":
    main()
