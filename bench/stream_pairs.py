"""Peak memory of training on a million pairs: memory-mapped from disk against held in RAM.

    PYTHONPATH=. python bench/stream_pairs.py [--data skewed|toy] [--pairs 1000000] [--steps 50]
                                              [--batch-size 256] [--max-length 128]

Writes ``--pairs`` pairs as token lists with their reference log-probabilities to an Arrow
file in a temporary folder, chunk by chunk (:func:`polopt.pairfile.mapped.write_arrow`), and then trains
the tiny transformer for ``--steps`` minibatch steps twice, each in a fresh process: once from
the file through :class:`polopt.pairfile.mapped.MappedPairs` (memory-mapped, one batch read at a time),
once from the same pairs as in-memory tensors (:class:`polopt.training.loop.PairSet`, padded int64,
as ``polopt train`` holds them). Prints the peak resident set size (VmHWM) of each process and
its resident set after training (VmRSS), the size of the file, and the ratios; never passes or
fails.

- ``--data skewed`` (default): the length-skewed token pairs of bench/skewed_data.py (byte
  tokens, most responses 2..24 tokens, 5% at ``--max-length``), the shape of real preference
  files. The reference columns are 0 (the policy's log-probabilities are the margins' terms):
  this data measures memory, not a loss's optimum. The two runs draw different batches (the
  in-RAM set is grouped by length, the mapped one is read in its shuffled order), so their
  losses differ.
- ``--data toy``: pairs of the enumerable sequence task (3 symbols, responses of up to 5; pairs
  from the reference, labels from its Bradley–Terry reward) with its exact reference
  log-probabilities; rows this short are smaller than torch's own working set, so the two
  processes' peaks differ little.
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
    from toy_tasks.sequence.task import sequence_task

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


def skewed_chunk(n: int, k: int, max_length: int) -> dict[str, torch.Tensor]:
    """Chunk ``k`` of the length-skewed pairs (bench/skewed_data.py), from its own seed."""
    from bench.skewed_data import skewed_pairs

    return skewed_pairs(min(CHUNK, n - k * CHUNK), max_length=max_length, seed=1000 + k)


def write_skewed(path: Path, n: int, max_length: int) -> None:
    from bench.skewed_data import PAD_ID
    from polopt.pairfile.mapped import write_arrow

    def chunks():
        for k in range((n + CHUNK - 1) // CHUNK):
            c = {key: v.numpy() for key, v in skewed_chunk(n, k, max_length).items()}
            rows = np.arange(len(c["prompt"]))
            out = {key: list_array(v, (v != PAD_ID).sum(1), rows) for key, v in c.items()}
            yield {**out, "reference_winner": np.zeros(len(rows)), "reference_loser": np.zeros(len(rows))}

    write_arrow(path, chunks())


def skewed_in_ram(n: int, max_length: int):
    """The same pairs as one PairSet of padded int64 tensors (``polopt train``'s way)."""
    from bench.skewed_data import real_token_count
    from polopt.pairs import PairSet

    data = {}
    for k in range((n + CHUNK - 1) // CHUNK):  # filled in place: no second copy while concatenating
        chunk = skewed_chunk(n, k, max_length)
        for key, value in chunk.items():
            if key not in data:
                data[key] = torch.empty((n, value.shape[1]), dtype=value.dtype)
            data[key][k * CHUNK: k * CHUNK + len(value)] = value
    zeros = torch.zeros(n, dtype=torch.float64)
    return PairSet(data["prompt"], data["winner"], data["loser"], zeros, zeros.clone(), None, real_token_count(data))


def write(path: Path, n: int) -> None:
    from polopt.pairfile.mapped import write_arrow

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
    from polopt.pairs import PairSet

    t = task()
    parts = [draw(t, n, k) for k in range((n + CHUNK - 1) // CHUNK)]
    x, w, lo = (torch.as_tensor(np.concatenate(c)) for c in zip(*parts, strict=True))
    prompt, winner = t.rows(x, w)
    _, loser = t.rows(x, lo)
    ref = torch.as_tensor(t.reference_logprobs)
    pad = t.vocab.pad_id
    tokens = 2 * (prompt != pad).sum(1) + (winner != pad).sum(1) + (loser != pad).sum(1)
    return PairSet(prompt, winner, loser, ref[x, w], ref[x, lo], None, tokens)


def toy_policy_and_pairs(mode: str, path: Path, n: int):
    from polopt.models.transformer import build_model, copy_weights
    from polopt.pairfile.mapped import MappedPairs
    from toy_tasks.sequence.policy import EnumeratedSequencePolicy

    t = task()
    pairs = MappedPairs(path, pad_id=t.vocab.pad_id) if mode == "mapped" else in_ram(n)
    model = build_model("transformer", vocab_size=t.vocab.size, output_size=t.vocab.output_size,
                        context=t.context_needed)
    copy_weights(model, t.reference_model)
    return EnumeratedSequencePolicy(model, t), pairs


def skewed_policy_and_pairs(mode: str, path: Path, n: int, max_length: int):
    from bench.skewed_data import PAD_ID, VOCAB_SIZE
    from polopt.models.logprobs import SequencePolicy
    from polopt.models.transformer import TinyTransformer
    from polopt.pairfile.mapped import MappedPairs

    pairs = MappedPairs(path, pad_id=PAD_ID) if mode == "mapped" else skewed_in_ram(n, max_length)
    model = TinyTransformer(VOCAB_SIZE, context=8 + max_length, width=32, layers=2, heads=2, seed=1)
    return SequencePolicy(model, pad_id=PAD_ID), pairs


def train_once(mode: str, path: Path, n: int, steps: int, batch_size: int, data: str, max_length: int) -> dict:
    from polopt import losses
    from polopt.training.loop import TrainSettings, train
    from polopt.training.optim import OptimConfig

    torch.set_num_threads(1)
    before = peak_rss_mib()
    if data == "toy":
        policy, pairs = toy_policy_and_pairs(mode, path, n)
    else:
        policy, pairs = skewed_policy_and_pairs(mode, path, n, max_length)
    loaded = peak_rss_mib()
    start = time.perf_counter()
    result = train(policy, pairs, losses.resolve_margin("logistic"),
                   TrainSettings(beta=0.5, steps=steps, optim=OptimConfig("adam", 0.003), batch_size=batch_size,
                                 log_every=steps, progress=False))
    return {"mode": mode, "rows": len(pairs), "peak_rss_mb": peak_rss_mib(), "rss_end_mb": rss_now_mib(),
            "rss_after_setup_mb": loaded, "rss_at_start_mb": before,
            "seconds": time.perf_counter() - start, "loss": result.final["loss"],
            "tokens_per_s": result.final.get("tokens_per_s")}


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--data", choices=("skewed", "toy"), default="skewed",
                        help="skewed: length-skewed byte-token pairs (default); toy: the enumerable sequence task")
    parser.add_argument("--pairs", type=int, default=1_000_000, help="pairs in the file (default 1000000)")
    parser.add_argument("--steps", type=int, default=50, help="minibatch steps per process (default 50)")
    parser.add_argument("--batch-size", type=int, default=256, help="pairs per step (default 256)")
    parser.add_argument("--max-length", type=int, default=128,
                        help="--data skewed: the longest response in tokens (default 128)")
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here (JSON)")
    parser.add_argument("--child", choices=("mapped", "ram"), help=argparse.SUPPRESS)
    parser.add_argument("--file", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(train_once(args.child, Path(args.file), args.pairs, args.steps, args.batch_size, args.data,
                                    args.max_length)))
        return
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "pairs.arrow"
        start = time.perf_counter()
        if args.data == "toy":
            write(path, args.pairs)
        else:
            write_skewed(path, args.pairs, args.max_length)
        size = path.stat().st_size / 2**20
        print(f"wrote {args.pairs} {args.data} pairs to an Arrow file of {size:.1f} MiB "
              f"in {time.perf_counter() - start:.1f} s")
        out = {}
        for mode in ("mapped", "ram"):
            done = subprocess.run([sys.executable, __file__, "--child", mode, "--file", str(path), "--pairs",
                                   str(args.pairs), "--steps", str(args.steps), "--batch-size", str(args.batch_size),
                                   "--data", args.data, "--max-length", str(args.max_length)],
                                  capture_output=True, text=True, check=True)
            out[mode] = json.loads(done.stdout.strip().splitlines()[-1])
            r = out[mode]
            print(f"{mode:>6}: peak RSS {r['peak_rss_mb']:.0f} MiB (peak after building the pair set "
                  f"{r['rss_after_setup_mb']:.0f} MiB, before it {r['rss_at_start_mb']:.0f} MiB; "
                  f"RSS after training {r['rss_end_mb']:.0f} MiB); "
                  f"{args.steps} steps of {args.batch_size} in {r['seconds']:.1f} s; final loss {r['loss']:.4f}")
    ratios = {"peak_rss_mapped_over_ram": out["mapped"]["peak_rss_mb"] / out["ram"]["peak_rss_mb"],
              "rss_end_mapped_over_ram": out["mapped"]["rss_end_mb"] / out["ram"]["rss_end_mb"]}
    print(f"peak RSS mapped / in RAM: {ratios['peak_rss_mapped_over_ram']:.2f}; "
          f"RSS after training mapped / in RAM: {ratios['rss_end_mapped_over_ram']:.2f}")
    if args.json is not None:
        report = {"data": args.data, "pairs": args.pairs, "steps": args.steps, "batch_size": args.batch_size,
                  "max_length": args.max_length, "file_mib": size, "rss": "VmHWM (peak) and VmRSS of each process",
                  "runs": out, **ratios}
        args.json.write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
