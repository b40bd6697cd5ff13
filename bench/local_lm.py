"""Bench: a local transformers causal LM trained on long-prompt pairs: full fine-tuning against LoRA,
shared-prompt scoring against separate scoring, as ratios measured in the same run.

    PYTHONPATH=. python bench/local_lm.py [--steps 3] [--rounds 2] [--prompt 192] [--response 24] [--batch 4]

The model is a randomly initialised Llama-shaped ``LlamaForCausalLM`` of about 20M parameters
(vocabulary 8000, width 384, 8 layers, 6 heads, MLP 1024), built here; nothing is downloaded.
The pairs are invented: seeded random token ids, prompts of 3/4 to all of ``--prompt`` tokens,
winners and losers of 1/2 to all of ``--response`` tokens, right-padded with -1 (the text path's
pad id). One training step is the logistic (DPO) loss of ``--batch`` pairs against reference
log-probs computed once before the clock starts, its backward and an AdamW step.

Four configurations: ``full`` (every weight trains) or ``lora`` (peft ``LoraConfig(r=8,
lora_alpha=16)`` on peft's default targets for Llama, the attention's query and value
projections), each scoring a pair ``separate`` ([x, y_w] and [x, y_l] as two rows of one pass,
:func:`polopt.models.prefix_scoring.separate_pair_logprobs`: packed and masked as the trainer's
``SequencePolicy`` does, logits at every position) or ``shared`` (the prompt once through the
key/value cache, :func:`polopt.models.prefix_scoring.prompt_cached_pair_logprobs`, which also
computes the output layer only where a logit is scored: the prompt's last position and the responses).

- tokens/s: real tokens per step as the trainer counts them (prompt with winner plus prompt with
  loser, padding excluded; the same count for both scorings, so the ratio is the time ratio),
  over the timed steps after one warm-up step. The four run interleaved in one process,
  ``--rounds`` times each, the fastest round counting (as timeit takes the minimum), so a burst of
  load on the shared machine slows one round rather than one configuration.
- peak memory: ``ru_maxrss`` of a fresh process per configuration that builds it and trains
  ``--steps`` steps, and its rise over the same process just before the first step (the
  training's own peak: activations, gradients, optimiser state).
- agreement: the largest difference between the two scorings' log-probabilities on the first
  batch, float32, no gradients.

The load average (os.getloadavg) is printed beside the figures. Figures only; nothing passes or fails.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import torch
import torch.nn.functional as F

if __package__ in (None, ""):
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from polopt.models.logprobs import pack  # noqa: E402
from polopt.models.prefix_scoring import prompt_cached_pair_logprobs, separate_pair_logprobs  # noqa: E402

PAD, BETA, LR = -1, 0.1, 1e-4
SHAPE = {"vocab_size": 8000, "hidden_size": 384, "intermediate_size": 1024, "num_hidden_layers": 8,
         "num_attention_heads": 6, "num_key_value_heads": 6, "max_position_embeddings": 512}
SCORINGS = ("separate", "separate-lean", "shared")
CONFIGURATIONS = [(adapter, scoring) for adapter in ("full", "lora") for scoring in SCORINGS]


def build_model(seed: int = 0):
    """The randomly initialised ~20M-parameter Llama-shaped model, float32, dropout-free."""
    from transformers import LlamaConfig, LlamaForCausalLM

    torch.manual_seed(seed)
    return LlamaForCausalLM(LlamaConfig(**SHAPE)).float()


def with_adapter(model, adapter: str):
    """``full``: the model itself; ``lora``: peft's LoRA around it (the base weights frozen)."""
    if adapter == "full":
        return model
    from peft import LoraConfig, get_peft_model

    return get_peft_model(model, LoraConfig(r=8, lora_alpha=16, lora_dropout=0.0))


def invented_pairs(n: int, prompt: int, response: int, seed: int = 0) -> dict[str, torch.Tensor]:
    """Right-padded random token ids: prompts of 3/4 to all of ``prompt`` tokens, responses of 1/2 to all
    of ``response`` tokens. (N, T_p), (N, T_r), (N, T_r)."""
    g = torch.Generator().manual_seed(seed)

    def rows(low: int, high: int) -> torch.Tensor:
        sizes = torch.randint(low, high + 1, (n,), generator=g)  # (N,)
        ids = torch.randint(0, SHAPE["vocab_size"], (n, high), generator=g)  # (N, T)
        return torch.where(torch.arange(high)[None, :] < sizes[:, None], ids, PAD)  # (N, T)

    return {"prompt": rows(3 * prompt // 4, prompt), "winner": rows(response // 2, response),
            "loser": rows(response // 2, response)}


def separate_lean_logprobs(model, prompt, winner, loser, *, pad_id: int):
    """Separate scoring whose output layer runs only where a logit is scored (transformers' boolean
    ``logits_to_keep``): the part of the shared path's gain that is not the prompt computed once."""
    width = max(winner.shape[1], loser.shape[1])
    responses = torch.cat([F.pad(t, (0, width - t.shape[1]), value=pad_id) for t in (winner, loser)])  # (2B, T_r)
    tokens, in_response = pack(torch.cat([prompt, prompt]), responses, pad_id=pad_id)  # (2B, T) each
    real, scored = tokens[:, :-1] != pad_id, in_response[:, 1:]  # (2B, T - 1) each
    logits = model(input_ids=torch.where(real, tokens[:, :-1], 0), attention_mask=real.long(),
                   logits_to_keep=scored).logits  # (K, V): the scored positions only
    picked = torch.log_softmax(logits.float(), dim=-1).gather(-1, tokens[:, 1:][scored][:, None]).squeeze(-1)  # (K,)
    both = torch.zeros(len(tokens)).index_add(0, scored.nonzero()[:, 0], picked)  # (2B,)
    return both[: len(prompt)], both[len(prompt):]


SCORERS = {"separate": separate_pair_logprobs, "separate-lean": separate_lean_logprobs,
           "shared": prompt_cached_pair_logprobs}


def real_tokens(batch: dict) -> int:
    """Prompt with winner plus prompt with loser, padding excluded (the trainer's tokens_per_s count)."""
    n = {k: int((v != PAD).sum()) for k, v in batch.items()}
    return 2 * n["prompt"] + n["winner"] + n["loser"]


class Run:
    """One configuration ready to train: its model, optimiser, scorer and the reference log-probs."""

    def __init__(self, adapter: str, scoring: str, batch: dict):
        self.name = f"{adapter}, {scoring}"
        self.model = with_adapter(build_model(), adapter).train()
        self.score = SCORERS[scoring]
        self.batch = batch
        with torch.no_grad():  # reference log-probs once, before the clock: the starting weights
            self.reference = prompt_cached_pair_logprobs(self.model, **batch, pad_id=PAD)
        trainable = [p for p in self.model.parameters() if p.requires_grad]
        self.trainable = sum(p.numel() for p in trainable)
        self.optimiser = torch.optim.AdamW(trainable, lr=LR)

    def step(self) -> float:
        """One DPO step: -log sigmoid(beta ((w - w_ref) - (l - l_ref))) over the batch, backward, AdamW."""
        winner, loser = self.score(self.model, **self.batch, pad_id=PAD)  # (B,) each
        margin = (winner - self.reference[0]) - (loser - self.reference[1])  # (B,)
        loss = -F.logsigmoid(BETA * margin).mean()  # logsigmoid: finite for any margin
        loss.backward()
        self.optimiser.step()
        self.optimiser.zero_grad(set_to_none=True)
        return float(loss.detach())


def time_round(run: Run, steps: int) -> float:
    """Seconds per step over ``steps`` steps."""
    start = time.perf_counter()
    for _ in range(steps):
        run.step()
    return (time.perf_counter() - start) / steps


def agreement(batch: dict) -> dict:
    """Largest |shared - separate| of the log-probabilities on ``batch`` (float32, no gradients), absolute,
    relative to the value, and the float32 spacing (one unit in the last place) at the largest |value|."""
    model = build_model().eval()
    with torch.no_grad():
        shared = torch.cat(prompt_cached_pair_logprobs(model, **batch, pad_id=PAD))  # (2B,)
        separate = torch.cat(separate_pair_logprobs(model, **batch, pad_id=PAD))  # (2B,)
        lean = torch.cat(separate_lean_logprobs(model, **batch, pad_id=PAD))  # (2B,)
    diff = (shared - separate).abs()  # (2B,)
    largest = separate.abs().max()
    return {"max_abs_diff": float(diff.max()), "max_rel_diff": float((diff / separate.abs()).max()),
            "largest_value": float(largest), "ulp_at_largest": float(torch.nextafter(largest, 2 * largest) - largest),
            "lean_max_abs_diff": float((lean - separate).abs().max())}


def peak_memory(adapter: str, scoring: str, args) -> dict:
    """In this (fresh) process: ru_maxrss (MiB) before the first step and after ``args.steps`` steps."""
    torch.set_num_threads(args.threads)
    run = Run(adapter, scoring, invented_pairs(args.batch, args.prompt, args.response))
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux: KiB
    for _ in range(args.steps):
        run.step()
    after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return {"peak_mib": after, "rise_mib": after - before, "trainable": run.trainable}


def measure_memory(args) -> dict[str, dict]:
    """:func:`peak_memory` of each configuration, each in a fresh process."""
    out = {}
    for adapter, scoring in CONFIGURATIONS:
        command = [sys.executable, __file__, "--memory-of", adapter, scoring, "--steps", str(args.steps),
                   "--prompt", str(args.prompt), "--response", str(args.response), "--batch", str(args.batch),
                   "--threads", str(args.threads)]
        done = subprocess.run(command, capture_output=True, text=True, check=True)
        out[f"{adapter}, {scoring}"] = json.loads(done.stdout.strip().splitlines()[-1])
    return out


def measure_speed(args) -> dict[str, dict]:
    """Seconds per step of every configuration, interleaved over ``args.rounds`` rounds, the fastest kept."""
    torch.set_num_threads(args.threads)
    batch = invented_pairs(args.batch, args.prompt, args.response)
    runs = [Run(adapter, scoring, batch) for adapter, scoring in CONFIGURATIONS]
    for run in runs:
        run.step()  # warm-up: first-call allocations
    best = {run.name: float("inf") for run in runs}
    loads = {run.name: [] for run in runs}
    for _ in range(args.rounds):
        for run in runs:
            best[run.name] = min(best[run.name], time_round(run, args.steps))
            loads[run.name].append(os.getloadavg()[0])
    tokens = real_tokens(batch)
    return {name: {"step_s": s, "tokens_per_s": tokens / s, "load": max(loads[name])} for name, s in best.items()}


def report(args, speed: dict, memory: dict, diff: dict, loads: tuple[float, float]) -> str:
    lines = [f"local_lm bench: Llama-shaped, {sum(p.numel() for p in build_model().parameters()) / 1e6:.1f}M "
             f"parameters, batch {args.batch} pairs, prompts <= {args.prompt} tokens, responses <= {args.response}; "
             f"{args.threads} torch thread(s), {os.cpu_count()} CPUs; load {loads[0]:.2f} at start, "
             f"{loads[1]:.2f} at the end",
             f"{'configuration':<21} {'trainable':>10} {'tokens/s':>9} {'s/step':>7} {'peak MiB':>9} "
             f"{'rise MiB':>9} {'load':>5}"]
    for name in speed:
        s, m = speed[name], memory[name]
        lines.append(f"{name:<21} {m['trainable']:>10,} {s['tokens_per_s']:>9.0f} {s['step_s']:>7.2f} "
                     f"{m['peak_mib']:>9.0f} {m['rise_mib']:>9.0f} {s['load']:>5.2f}")
    for adapter in ("full", "lora"):
        tps = {scoring: speed[f"{adapter}, {scoring}"]["tokens_per_s"] for scoring in SCORINGS}
        lines.append(f"shared / separate tokens/s, {adapter}: {tps['shared'] / tps['separate']:.2f}x (target >= 1.3x); "
                     f"shared / separate-lean: {tps['shared'] / tps['separate-lean']:.2f}x (the prompt computed once "
                     f"alone), separate-lean / separate: {tps['separate-lean'] / tps['separate']:.2f}x (the output "
                     "layer on scored positions alone)")
    for scoring in SCORINGS:
        full, lora = memory[f"full, {scoring}"], memory[f"lora, {scoring}"]
        lines.append(f"peak memory, {scoring}: LoRA {lora['peak_mib']:.0f} MiB against full {full['peak_mib']:.0f} MiB "
                     f"(rise {lora['rise_mib']:.0f} against {full['rise_mib']:.0f}; target: LoRA below full)")
    lines.append(f"largest |shared - separate| log-probability, float32: {diff['max_abs_diff']:.2e} "
                 f"(relative {diff['max_rel_diff']:.1e}; log-probabilities down to -{diff['largest_value']:.0f}, "
                 f"where float32's spacing is {diff['ulp_at_largest']:.2e}; target <= 1e-5); separate-lean against "
                 f"separate: {diff['lean_max_abs_diff']:.2e}")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--steps", type=int, default=3, help="timed steps per round (and per memory run)")
    parser.add_argument("--rounds", type=int, default=2, help="interleaved rounds; the fastest counts")
    parser.add_argument("--prompt", type=int, default=192, help="longest prompt, tokens")
    parser.add_argument("--response", type=int, default=24, help="longest response, tokens")
    parser.add_argument("--batch", type=int, default=4, help="pairs per step")
    parser.add_argument("--threads", type=int, default=1, help="torch CPU threads")
    parser.add_argument("--memory-of", nargs=2, metavar=("ADAPTER", "SCORING"), help=argparse.SUPPRESS)
    parser.add_argument("--json", type=Path, default=None, help="also write the figures here")
    args = parser.parse_args(argv)
    if args.memory_of:
        print(json.dumps(peak_memory(*args.memory_of, args)))
        return 0
    start_load = os.getloadavg()[0]
    memory = measure_memory(args)
    speed = measure_speed(args)
    torch.set_num_threads(args.threads)
    diff = agreement(invented_pairs(args.batch, args.prompt, args.response))
    print(report(args, speed, memory, diff, (start_load, os.getloadavg()[0])))
    if args.json:
        args.json.write_text(json.dumps({"speed": speed, "memory": memory, "agreement": diff,
                                         "args": {k: v for k, v in vars(args).items() if k != "json"}}, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
