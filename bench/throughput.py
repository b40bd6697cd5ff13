"""Bench: trainer throughput on a length-skewed dataset, with ratios measured in the same run.

    PYTHONPATH=. python bench/throughput.py [--widths 64 256] [--layers 4] [--steps 40] [--batch 32] [--json out.json]
    PYTHONPATH=. python bench/throughput.py --widths 256 --versus-loop --steps 16 --no-isolate

Runs :func:`polopt.training.loop.train` (the logistic loss) on the tiny transformer over a
length-skewed synthetic dataset (bench/skewed_data.py: most responses short, 5%
at the maximum length) and prints a table, then writes the same figures as JSON:

- tokens/s: the trainer's own ``tokens_per_s`` metric (real tokens of winners and
  losers, prompt included, padding excluded), and the share of computed positions
  that are padding;
- step time and steps/s of the loop, and steps/s with the one-off reference pass
  added (the cache's cost, spread over the run);
- peak memory: ``resource.getrusage(RUSAGE_SELF).ru_maxrss`` of a fresh process
  that runs only that configuration (the whole process: torch itself, the data,
  the model, the optimiser); ``--no-isolate`` skips it;
- timing: the configurations run interleaved, ``--rounds`` times each (with
  ``--versus-loop`` only the trainer and the hand-written loop: trainer, loop,
  trainer, loop, ...), each round's figures printed with the load average as they
  come; the table shows the fastest round (as timeit takes the minimum), and the
  ratio to the hand-written loop is the median over the rounds of each round's
  ratio, the two runs of a round being next to each other in time: on a shared
  machine a burst of load then moves one round, not one side;
- MFU: achieved model FLOP/s over the FLOP/s of a matrix product of the model's
  own shape (tokens per batch x width times width x 4 width) measured in the same
  process just before, in the same precision. Model FLOPs count real positions
  only: per sequence of n real input positions, 6 N n + 6 L n^2 C, where N is the
  number of weights of the linear layers (attention, MLP, head: the matrix
  products; embeddings are lookups) and L, C the layers and width. This is the
  forward 2 N + 2 L n_ctx C per token of Kaplan et al., Scaling Laws for Neural
  Language Models, 2020, with n_ctx = n and the backward twice the forward;
- configurations: fp32 vs bf16 autocast; length handling on vs off (on: length
  bucketing of the batches and the length split of the forward pass in
  polopt/models/logprobs.py; off: random batches, each one pass padded to its own longest
  pair, which on this data is nearly always the maximum); the reference cache on vs off (off: the reference model
  recomputes its log-probabilities every step, over several epochs); and the
  hand-written loop of bench/baseline_loop.py (no polopt, every batch padded to the
  maximum, torch's default Adam) for a side-by-side ratio; the model has ``--layers``
  blocks (4 by default) of 4 heads;
- the loss's share of a step: the time of ``per_pair_losses`` + ``weighted_mean``
  forward and its backward (from the margins), over the step time.

Figures only; nothing passes or fails. The machine may be shared: the load
average (os.getloadavg) is printed beside the figures.
"""

from __future__ import annotations

import argparse
import json
import multiprocessing
import os
import resource
import statistics
import sys
import time
from pathlib import Path

import torch

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench import baseline_loop  # noqa: E402
from bench.skewed_data import PAD_ID, VOCAB_SIZE, real_token_count, skewed_pairs  # noqa: E402
from polopt import losses  # noqa: E402
from polopt.losses.reduce import pair_scores, per_pair_losses, weighted_mean  # noqa: E402
from polopt.models.logprobs import SequencePolicy, batched_logprobs, length_split  # noqa: E402
from polopt.models.transformer import TinyTransformer  # noqa: E402
from polopt.pairs import PairSet  # noqa: E402
from polopt.training.batching import Batcher  # noqa: E402
from polopt.training.loop import TrainSettings, train  # noqa: E402
from polopt.training.optim import OptimConfig  # noqa: E402

HEADS, BETA = 4, 0.5
TRAINER, LOOP = "fp32, bucketing, cache", "hand-written loop"  # the side-by-side pair of --versus-loop


class RecomputedReference(torch.nn.Module):
    """Cache off: a policy whose ``logprobs`` is the log-ratio ``log pi - log pi_ref``, the reference
    recomputed on every call; paired with zero reference columns, the margin is the same as with the cache."""

    def __init__(self, policy: SequencePolicy, reference: SequencePolicy):
        super().__init__()
        self.policy, self.reference = policy, reference.requires_grad_(False)
        self.pad_id = policy.pad_id

    def logprobs(self, prompt: torch.Tensor, response: torch.Tensor) -> torch.Tensor:
        with torch.no_grad():
            ref = self.reference.logprobs(prompt, response)  # (B,)
        return self.policy.logprobs(prompt, response) - ref


def linear_weights(model: torch.nn.Module) -> int:
    return sum(m.weight.numel() for m in model.modules() if isinstance(m, torch.nn.Linear))


def model_flops(n_real: torch.Tensor, *, weights: int, layers: int, width: int) -> float:
    """Forward + backward FLOPs over sequences of n_real input positions each (see the module docstring)."""
    n = n_real.to(torch.float64)
    return float((6 * weights * n + 6 * layers * width * n**2).sum())


def cpu_features() -> dict:
    """What decides the bf16 ratio: torch's CPU kernel level and the CPU's bf16 instructions
    (avx512_bf16, amx_bf16 in the Linux /proc/cpuinfo flags); without them bf16 matrix products
    are emulated and autocast can be slower than fp32."""
    flags: set[str] = set()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("flags"):
                flags = set(line.split(":", 1)[1].split())
                break
    except OSError:
        pass
    return {"capability": torch.backends.cpu.get_cpu_capability(),
            "bf16_instructions": sorted(flags & {"avx512_bf16", "amx_bf16", "amx_tile"}) if flags else None}


def matmul_flops_per_s(m: int, k: int, n: int, dtype: torch.dtype, seconds: float = 0.5) -> float:
    a, b = torch.randn(m, k).to(dtype), torch.randn(k, n).to(dtype)
    for _ in range(3):
        a @ b  # warm-up
    count, start = 0, time.perf_counter()
    while time.perf_counter() - start < seconds:
        a @ b
        count += 1
    return 2 * m * k * n * count / (time.perf_counter() - start)


def build(cfg: dict):
    data = skewed_pairs(cfg["pairs"], max_length=cfg["max_length"], seed=0)
    context = data["prompt"].shape[1] + data["winner"].shape[1]
    layers = cfg.get("layers", 2)
    model = TinyTransformer(VOCAB_SIZE, context=context, width=cfg["width"], layers=layers, heads=HEADS, seed=1)
    reference = SequencePolicy(TinyTransformer(VOCAB_SIZE, context=context, width=cfg["width"], layers=layers,
                                               heads=HEADS, seed=2), pad_id=PAD_ID).eval()
    return data, SequencePolicy(model, pad_id=PAD_ID), reference


def positions(batch: PairSet) -> tuple[torch.Tensor, torch.Tensor]:
    """Real input positions per pair of a batch (B,) in the row the trainer computes (prompt, then winner
    and loser less their last tokens: polopt.models.logprobs.pack_pairs, train.share_prompt=true), and the
    lengths (B,) that polopt.models.logprobs.length_split cuts on (prompt + winner + loser tokens)."""
    n_p, n_w, n_l = ((t != PAD_ID).sum(1) for t in (batch.prompt, batch.winner, batch.loser))  # (B,) each
    return n_p + (n_w - 1).clamp(min=0) + (n_l - 1).clamp(min=0), n_p + n_w + n_l


def computed_positions(row: torch.Tensor, n: torch.Tensor, split: bool) -> int:
    """Positions the forward pass computes, padding included, for rows of ``row`` real positions (one
    pass at the longest, or the two passes of polopt.models.logprobs.length_split on ``n``)."""
    order, k = length_split(n) if split else (None, 0)
    if k == 0:
        return len(row) * int(row.max())
    short, long = row[order[:k]], row[order[k:]]
    return len(short) * int(short.max()) + len(long) * int(long.max())


def prepare(cfg: dict) -> dict:
    """Data, policy and reference log-probabilities of one configuration, warmed up."""
    torch.set_num_threads(cfg["threads"])
    if cfg["kind"] == "baseline":
        return {"cfg": cfg}
    data, policy, reference = build(cfg)
    policy.split_lengths = cfg["bucketing"]  # off: one pass at each batch's longest pair, as before
    batched_logprobs(reference.model, data["prompt"][:8], data["winner"][:8], pad_id=PAD_ID)  # warm-up
    start = time.perf_counter()
    both = batched_logprobs(reference.model, torch.cat([data["prompt"]] * 2),
                            torch.cat([data["winner"], data["loser"]]), pad_id=PAD_ID, batch_size=256)  # (2N,)
    reference_s = time.perf_counter() - start
    ref_w, ref_l = both.chunk(2)
    weights = linear_weights(policy)
    if not cfg["cache"]:
        ref_w, ref_l = torch.zeros_like(ref_w), torch.zeros_like(ref_l)
        policy = RecomputedReference(policy, reference)
    pairs = PairSet(data["prompt"], data["winner"], data["loser"], ref_w, ref_l, tokens=real_token_count(data))
    kwargs = dict(beta=BETA, optim=OptimConfig("adam", 1e-4, schedule="constant"), batch_size=cfg["batch"],
                  progress=False, log_every=10**9, precision=cfg["precision"], bucketing=cfg["bucketing"])
    state = {"cfg": cfg, "policy": policy, "pairs": pairs, "loss": losses.resolve_margin("logistic"), "kwargs": kwargs,
             "reference_s": reference_s, "weights": weights}
    train(policy, pairs, state["loss"], TrainSettings(steps=3, seed=10**6, **kwargs))  # warm-up: kernels, allocator
    return state


def drawn_batches(state: dict, seed: int) -> tuple[torch.Tensor, int, list[PairSet]]:
    """Real input positions (all sequences of the run), computed positions, and the batches that
    ``train(seed=seed)`` draws: the same Batcher and generator as the trainer."""
    cfg, pairs = state["cfg"], state["pairs"]
    batcher = Batcher(pairs, batch_size=cfg["batch"], pad_id=PAD_ID, bucketing=cfg["bucketing"])
    generator = torch.Generator().manual_seed(seed)
    order, cursor, real, padded, batches = batcher.epoch_order(generator), 0, [], 0, []
    for _ in range(cfg["steps"]):
        if cursor + cfg["batch"] > len(pairs):
            order, cursor = batcher.epoch_order(generator), 0
        batch = batcher.take(order[cursor:cursor + cfg["batch"]])
        cursor += cfg["batch"]
        row, n = positions(batch)
        real.append(row)
        padded += computed_positions(row, n, split=cfg["bucketing"])
        batches.append(batch)
    return torch.cat(real), padded, batches


def time_round(state: dict, seed: int) -> dict:
    """One timed run of ``cfg["steps"]`` steps with the matrix-product reference measured just before."""
    cfg = state["cfg"]
    if cfg["kind"] == "baseline":
        out = baseline_loop.run(width=cfg["width"], layers=cfg["layers"], heads=HEADS, n_pairs=cfg["pairs"],
                                batch=cfg["batch"], steps=cfg["steps"], max_length=cfg["max_length"], beta=BETA,
                                seed=seed)
        return {**cfg, **out, "load": os.getloadavg()[0]}
    real, padded, batches = drawn_batches(state, seed)
    dtype = torch.bfloat16 if cfg["precision"] == "bf16" else torch.float32
    mm = matmul_flops_per_s(max(int(real.sum()) // cfg["steps"], 1), cfg["width"], 4 * cfg["width"], dtype)
    result = train(state["policy"], state["pairs"], state["loss"],
                   TrainSettings(steps=cfg["steps"], seed=seed, **state["kwargs"]))
    step_s = result.seconds / cfg["steps"]
    flops = model_flops(real, weights=state["weights"], layers=cfg["layers"], width=cfg["width"])
    ref_s = state["reference_s"] if cfg["cache"] else 0.0
    return {**cfg, "tokens_per_s": result.final["tokens_per_s"], "step_s": step_s, "steps_per_s": 1 / step_s,
            "steps_per_s_with_reference": cfg["steps"] / (result.seconds + ref_s),
            "reference_pass_s": state["reference_s"], "padding_share": 1 - int(real.sum()) / padded,
            "model_flops_per_s": flops / result.seconds, "matmul_flops_per_s": mm, "mfu": flops / result.seconds / mm,
            "loss_share": loss_share(batches[:8], state["policy"], state["loss"], cfg, step_s),
            "load": os.getloadavg()[0]}


def peak_memory(cfg: dict) -> float:
    """ru_maxrss (MiB) of a process that prepares ``cfg`` and runs it (run in a fresh process)."""
    time_round(prepare(cfg), seed=0)
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def loss_share(batches: list[PairSet], policy, loss, cfg: dict, step_s: float) -> float:
    """Seconds of the loss (margins, reduction, their backward) per step over the step time."""
    with torch.no_grad():
        logp = [policy.logprobs(torch.cat([b.prompt] * 2), torch.cat([b.winner, b.loser])).chunk(2) for b in batches]
    seconds = 0.0
    for batch, (lw, ll) in zip(batches, logp, strict=True):
        lw, ll = lw.clone().requires_grad_(), ll.clone().requires_grad_()
        start = time.perf_counter()
        weighted_mean(per_pair_losses(loss, pair_scores(batch, lw, ll), beta=BETA)).backward()  # the trainer's path
        seconds += time.perf_counter() - start
    return seconds / len(batches) / step_s


def configurations(args) -> list[dict]:
    base = dict(pairs=args.pairs, batch=args.batch, steps=args.steps, max_length=args.max_length,
                threads=args.threads, layers=args.layers, kind="polopt", precision="fp32", bucketing=True, cache=True)
    out = []
    for width in args.widths:
        out += [dict(base, width=width, name=TRAINER),
                dict(base, width=width, bucketing=False, name="fp32, padding to the longest"),
                dict(base, width=width, cache=False, name="fp32, bucketing, no cache"),
                dict(base, width=width, precision="bf16", name="bf16, bucketing, cache"),
                dict(base, width=width, kind="baseline", bucketing=False, name=LOOP)]
    if args.versus_loop:
        out = [c for c in out if c["name"] in (TRAINER, LOOP)]
    if args.only:
        out = [c for c in out if any(word in c["name"] for word in args.only)]
    return out


def versus_loop(rounds: list[list[dict]]) -> dict[int, dict]:
    """Per width: the trainer's real tokens/s over the hand-written loop's, round by round (each ratio of
    two runs next to each other in time, so under one load) and their median."""
    out = {}
    for width in sorted({r["width"] for r in rounds[0]}):
        per_round = []
        for rows in rounds:
            by = {r["name"]: r for r in rows if r["width"] == width}
            if TRAINER in by and LOOP in by:
                per_round.append({"trainer": by[TRAINER]["tokens_per_s"], "loop": by[LOOP]["tokens_per_s"],
                                  "ratio": by[TRAINER]["tokens_per_s"] / by[LOOP]["tokens_per_s"],
                                  "load": [by[TRAINER]["load"], by[LOOP]["load"]]})
        if per_round:
            out[width] = {"rounds": per_round, "median": statistics.median(r["ratio"] for r in per_round)}
    return out


def ratios(rows: list[dict], against_loop: dict[int, dict]) -> list[dict]:
    """The targets of the issue, per width, from figures of the same run."""
    out = []
    for width in sorted({r["width"] for r in rows}):
        by = {r["name"]: r for r in rows if r["width"] == width}
        checks = []
        if len(by) == 5:  # --only, --versus-loop: some configurations were not run
            main = by[TRAINER]
            checks = [
                ("reference cache: steps/s on / off",
                 main["steps_per_s"] / by["fp32, bucketing, no cache"]["steps_per_s"], 1.25),
                ("bucketing: real tokens/s on / padding", main["tokens_per_s"]
                 / by["fp32, padding to the longest"]["tokens_per_s"], 2.0),
                ("fp32 MFU (real tokens)", main["mfu"], 0.5 if width >= 256 else None),
                ("bf16 / fp32 tokens/s", by["bf16, bucketing, cache"]["tokens_per_s"] / main["tokens_per_s"], 2.5),
                ("loss share of a step (at most)", main["loss_share"], 0.02),
            ]
        if width in against_loop:
            checks.append(("polopt / hand-written loop (median of rounds)", against_loop[width]["median"], 4.0))
        for name, value, target in checks:
            met = None if target is None else (value <= target if "at most" in name else value >= target)
            out.append({"width": width, "figure": name, "value": value, "target": target, "met": met})
    return out


def round_lines(r: int, rows: list[dict]) -> list[str]:
    """One round's figures as they came, in the order they ran, each with the load it ran under."""
    return [f"  round {r + 1}: width {row['width']:>4}  {row['name']:<30} {row['tokens_per_s']:>9,.0f} real tokens/s"
            f"  {row['step_s'] * 1000:>8.1f} ms/step  load {row['load']:.2f}" for row in rows]


def table(rows: list[dict], checks: list[dict]) -> str:
    lines = [f"{'width':>5}  {'configuration':<30} {'tokens/s':>9} {'ms/step':>8} {'steps/s':>7} "
             f"{'+ref s/s':>8} {'pad %':>6} {'MFU':>6} {'loss %':>6} {'RSS MiB':>8} {'load':>5}"]

    def fmt(r, key, spec, scale=1.0):
        return format(r[key] * scale, spec) if key in r else format("-", spec[0] + spec[1:].split(".")[0])

    for r in rows:
        rss = "-" if r["peak_rss_mib"] is None else f"{r['peak_rss_mib']:.0f}"
        lines.append(f"{r['width']:>5}  {r['name']:<30} {r['tokens_per_s']:>9,.0f} {r['step_s'] * 1000:>8.1f} "
                     f"{1 / r['step_s']:>7.2f} {fmt(r, 'steps_per_s_with_reference', '>8.2f')} "
                     f"{fmt(r, 'padding_share', '>6.1f', 100)} {fmt(r, 'mfu', '>6.2f')} "
                     f"{fmt(r, 'loss_share', '>6.2f', 100)} {rss:>8} {r['load']:>5.2f}")
    lines.append("")
    lines.append(f"{'width':>5}  {'figure':<44} {'value':>7} {'target':>7}  met")
    for c in checks:
        target = "-" if c["target"] is None else f"{c['target']:.2f}"
        met = "-" if c["met"] is None else ("yes" if c["met"] else "no")
        lines.append(f"{c['width']:>5}  {c['figure']:<44} {c['value']:>7.3f} {target:>7}  {met}")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--widths", type=int, nargs="+", default=[64, 256], help="model widths (default 64 256)")
    parser.add_argument("--pairs", type=int, default=512, help="pairs in the dataset (default 512)")
    parser.add_argument("--batch", type=int, default=32, help="pairs per step (default 32)")
    parser.add_argument("--steps", type=int, default=40, help="timed steps per configuration (default 40)")
    parser.add_argument("--max-length", type=int, default=128, help="longest response in tokens (default 128)")
    parser.add_argument("--threads", type=int, default=torch.get_num_threads(), help="torch CPU threads")
    parser.add_argument("--only", nargs="+", default=None,
                        help="run only the configurations whose name contains one of these words (e.g. bf16)")
    parser.add_argument("--rounds", type=int, default=3,
                        help="timed runs per configuration, interleaved; the table shows the fastest, the ratio "
                             "to the hand-written loop is the median of the rounds' ratios (default 3)")
    parser.add_argument("--layers", type=int, default=4, help="transformer blocks (default 4)")
    parser.add_argument("--versus-loop", action="store_true",
                        help=f"run only {TRAINER!r} and the {LOOP}, alternating")
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here (JSON)")
    parser.add_argument("--no-isolate", action="store_true",
                        help="skip the fresh process per configuration that measures its peak memory")
    args = parser.parse_args(argv)
    cpu = cpu_features()
    print(f"torch {torch.__version__}, {args.threads} thread(s), {os.cpu_count()} CPUs, "
          f"load average {os.getloadavg()[0]:.2f} at the start; CPU kernels {cpu['capability']}, "
          f"bf16 instructions: {', '.join(cpu['bf16_instructions'] or []) or 'none found'}")
    print(f"{args.pairs} pairs, responses 2..24 tokens or (5%) {args.max_length}, batch {args.batch}, "
          f"{args.steps} timed steps x {args.rounds} interleaved rounds (the fastest shown), {args.layers} layers, "
          f"{HEADS} heads")
    configs = configurations(args)
    # peak memory first, while this process is small: a child starts from the parent's resident size
    floor = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    memory: list[float | None] = [None] * len(configs)
    if not args.no_isolate:
        context = multiprocessing.get_context("spawn")
        for i, cfg in enumerate(configs):
            with context.Pool(1) as pool:
                memory[i] = pool.apply(peak_memory, (dict(cfg, steps=min(cfg["steps"], 3)),))
    states = [prepare(cfg) for cfg in configs]
    best: list[dict | None] = [None] * len(configs)
    rounds: list[list[dict]] = []
    for r in range(args.rounds):  # configurations interleaved, so that a change of load hits them all
        rows = [time_round(state, seed=r) for state in states]
        for i, row in enumerate(rows):
            if best[i] is None or row["tokens_per_s"] > best[i]["tokens_per_s"]:
                best[i] = {**row, "round": r}
        rounds.append(rows)
        print("\n".join(round_lines(r, rows)), flush=True)
    rows = best
    for row, peak in zip(rows, memory, strict=True):
        row["peak_rss_mib"] = peak
    against_loop = versus_loop(rounds)
    checks = ratios(rows, against_loop)
    print(table(rows, checks))
    for width, v in against_loop.items():
        each = ", ".join(f"{x['ratio']:.2f}x (load {x['load'][0]:.2f}/{x['load'][1]:.2f})" for x in v["rounds"])
        print(f"width {width}: polopt / hand-written loop, real tokens/s, round by round: {each}; "
              f"median {v['median']:.2f}x")
    print(f"peak memory: ru_maxrss of a fresh process per configuration; the parent held {floor:.0f} MiB")
    report = {"torch": torch.__version__, "parent_rss_mib": floor, "threads": args.threads, "cpus": os.cpu_count(),
              "cpu": cpu, "load_end": os.getloadavg()[0],
              "peak_memory": "ru_maxrss of a fresh process that ran only that configuration",
              "timing": "rows: fastest of the interleaved rounds; versus_loop: median of the rounds' ratios",
              "flops": "6 N n + 6 L n^2 C per sequence of n real input positions (Kaplan et al. 2020)",
              "rows": rows, "targets": checks, "rounds": rounds,
              "versus_loop": {str(w): v for w, v in against_loop.items()}}
    text = json.dumps(report, indent=2)
    if args.json is not None:
        args.json.write_text(text + "\n", encoding="utf-8")
    print("JSON:")
    print(text)


if __name__ == "__main__":
    main()
