"""Peak memory of training on a million pairs: memory-mapped from disk against held in RAM.

    PYTHONPATH=. python bench/stream_pairs.py [--pairs 1000000] [--steps 50] [--batch-size 1024]

Draws ``--pairs`` labelled pairs of the enumerable sequence task (3 symbols, responses of up
to 5; pairs from the reference, labels from its Bradley–Terry reward), writes them as token
lists with the cached reference log-probabilities to an Arrow file in a temporary folder,
chunk by chunk (:func:`polopt.stream.write_arrow`), and then trains the tiny transformer for
``--steps`` minibatch steps twice, each in a fresh process: once from the file through
:class:`polopt.stream.MappedPairs` (memory-mapped, one batch read at a time), once from the
same pairs as in-memory tensors (:class:`polopt.train.PairSet`, as ``polopt train`` holds
them). Prints the peak resident set size (VmHWM) of each process and its resident set
after training (VmRSS), the size of the file, and the ratios; never passes or fails.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

import numpy as np  # noqa: E402
import torch  # noqa: E402

CHUNK = 20_000  # the toy sampler holds a (2 CHUNK, K) table of cumulative probabilities


def task():
    from toy_tasks.sequences import sequence_task

    return sequence_task()


def draw(t, n: int, k: int):
    """Chunk ``k`` of the pairs: (prompt, winner, loser) indices, drawn from its own seed."""
    m = min(CHUNK, n - k * CHUNK)
    s = t.finite_task().sample_pairs(m, seed=1000 + k)
    return s.prompt, s.winner, s.loser


def peak_rss_mib() -> float:
    """The peak resident set size of this process image (Linux VmHWM; unlike getrusage's ru_maxrss it
    does not carry the parent's peak across exec), else ru_maxrss."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def rss_now_mib() -> float:
    """The resident set size now (Linux VmRSS; file pages of a memory map count while resident); NaN elsewhere."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return float("nan")


def list_array(table: np.ndarray, lengths: np.ndarray, rows: np.ndarray):
    """A pyarrow list<int16> array of the rows ``rows`` of a padded token table, without padding."""
    import pyarrow as pa

    n = lengths[rows]
    offsets = np.concatenate([[0], np.cumsum(n)]).astype(np.int32)
    mask = np.arange(table.shape[1])[None, :] < n[:, None]
    return pa.ListArray.from_arrays(pa.array(offsets), pa.array(table[rows][mask].astype(np.int16)))


def write(path: Path, n: int) -> None:
    from polopt.stream import write_arrow

    t = task()
    responses = t.response_tokens.numpy()
    r_len = (responses != t.vocab.pad_id).sum(1)
    prompts = t.prompt_tokens.numpy()
    p_len = np.ones(len(prompts), dtype=np.int64)
    ref = t.reference_logprobs  # (X, K)

    def chunks():
        for k in range((n + CHUNK - 1) // CHUNK):
            x, w, lo = draw(t, n, k)
            yield {"prompt": list_array(prompts, p_len, x), "winner": list_array(responses, r_len, w),
                   "loser": list_array(responses, r_len, lo), "reference_winner": ref[x, w],
                   "reference_loser": ref[x, lo]}

    write_arrow(path, chunks())


def in_ram(n: int):
    """The same pairs as one PairSet of int64 tensors (``polopt train``'s way)."""
    from polopt.train import PairSet

    t = task()
    parts = [draw(t, n, k) for k in range((n + CHUNK - 1) // CHUNK)]
    x, w, lo = (torch.as_tensor(np.concatenate(c)) for c in zip(*parts, strict=True))
    prompt, winner = t.rows(x, w)
    _, loser = t.rows(x, lo)
    ref = torch.as_tensor(t.reference_logprobs)
    pad = t.vocab.pad_id
    tokens = 2 * (prompt != pad).sum(1) + (winner != pad).sum(1) + (loser != pad).sum(1)
    return PairSet(prompt, winner, loser, ref[x, w], ref[x, lo], None, tokens)


def train_once(mode: str, path: Path, n: int, steps: int, batch_size: int) -> dict:
    from polopt import losses
    from polopt.models import build_model, copy_weights
    from polopt.stream import MappedPairs
    from polopt.train import OptimConfig, train
    from toy_tasks.sequences import EnumeratedSequencePolicy

    torch.set_num_threads(1)
    t = task()
    before = peak_rss_mib()
    pairs = MappedPairs(path, pad_id=t.vocab.pad_id) if mode == "mapped" else in_ram(n)
    loaded = peak_rss_mib()
    model = build_model("transformer", vocab_size=t.vocab.size, output_size=t.vocab.output_size,
                        context=t.context_needed)
    copy_weights(model, t.reference_model)
    start = time.perf_counter()
    result = train(EnumeratedSequencePolicy(model, t), pairs, losses.get("logistic"), beta=0.5, steps=steps,
                   optim=OptimConfig("adam", 0.003), batch_size=batch_size, log_every=steps, progress=False)
    return {"mode": mode, "rows": len(pairs), "peak_rss_mb": peak_rss_mib(), "rss_end_mb": rss_now_mib(),
            "rss_after_setup_mb": loaded, "rss_at_start_mb": before,
            "seconds": time.perf_counter() - start, "loss": result.final["loss"],
            "tokens_per_s": result.final.get("tokens_per_s")}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pairs", type=int, default=1_000_000)
    parser.add_argument("--steps", type=int, default=50)
    parser.add_argument("--batch-size", type=int, default=1024)
    parser.add_argument("--child", choices=("mapped", "ram"), help=argparse.SUPPRESS)
    parser.add_argument("--file", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        print(json.dumps(train_once(args.child, Path(args.file), args.pairs, args.steps, args.batch_size)))
        return
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "pairs.arrow"
        start = time.perf_counter()
        write(path, args.pairs)
        print(f"wrote {args.pairs} pairs to an Arrow file of {path.stat().st_size / 2**20:.1f} MiB "
              f"in {time.perf_counter() - start:.1f} s")
        out = {}
        for mode in ("mapped", "ram"):
            done = subprocess.run([sys.executable, __file__, "--child", mode, "--file", str(path), "--pairs",
                                   str(args.pairs), "--steps", str(args.steps), "--batch-size", str(args.batch_size)],
                                  capture_output=True, text=True, check=True)
            out[mode] = json.loads(done.stdout.strip().splitlines()[-1])
            r = out[mode]
            print(f"{mode:>6}: peak RSS {r['peak_rss_mb']:.0f} MiB (peak after building the pair set "
                  f"{r['rss_after_setup_mb']:.0f} MiB, before it {r['rss_at_start_mb']:.0f} MiB; "
                  f"RSS after training {r['rss_end_mb']:.0f} MiB); "
                  f"{args.steps} steps of {args.batch_size} in {r['seconds']:.1f} s; final loss {r['loss']:.4f}")
        print(f"peak RSS mapped / in RAM: {out['mapped']['peak_rss_mb'] / out['ram']['peak_rss_mb']:.2f}; "
              f"RSS after training mapped / in RAM: {out['mapped']['rss_end_mb'] / out['ram']['rss_end_mb']:.2f}")


if __name__ == "__main__":
    main()
