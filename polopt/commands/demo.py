"""``polopt demo``: the end-to-end walk-through on the invented Tern Island weather bot.

One command, five steps, all on the CPU (the default takes a few minutes on 2 cores):

1. supervised reference: the tiny transformer learns the bot's replies
   (:mod:`polopt.sft`) from a corpus that mixes good and poor ones
   (:mod:`polopt.demo_scenario`);
2. sample pairs: two replies per prompt drawn from the reference
   (:mod:`polopt.sampling`);
3. label them with the simulated judge, which picks the first-shown reply with
   probability ``bias`` and otherwise votes by Bradley–Terry on the hidden
   reward; the pairs go to ``pairs.jsonl`` and are read back through the data
   layer exactly as a user's file is (:mod:`polopt.pairs_task`; identical pairs
   are rejected and reported);
4. optimise with any loss of the registry (``--loss``), once per beta of the
   frontier, with the same trainer as ``polopt train`` (:func:`polopt.train.train`);
5. evaluate (:mod:`polopt.evaluate`): the win-rate of the trained policy over the
   reference under the ground truth with its Wilson interval, the same measured
   by the biased judge without and with order swapping, the Monte-Carlo KL to the
   reference, and two PNGs: training curves and the KL vs win-rate frontier.

The output folder gets reference.pt, pairs.jsonl, rejects.jsonl, one folder per
beta (metrics.jsonl, summary.json), training_curves.png, frontier.png and
summary.json (the run at ``--beta``, with the frontier beside it).
"""

from __future__ import annotations

import argparse
import copy
import dataclasses
import json
import random
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import torch

from polopt import losses
from polopt.demo_scenario import PositionBiasedJudge, Scenario
from polopt.encoding import SequenceIds, encode_prompts
from polopt.evaluate import ground_truth_win_rate, judged_win_rates
from polopt.objective import validate_hyperparameters
from polopt.optim import OptimConfig
from polopt.pairs_task import pair_task
from polopt.run_folder import RunFolder
from polopt.sampling import kl_estimate, sample_responses
from polopt.sft import build_model, encode_examples, save_reference, train_sft
from polopt.tokenizer import ByteTokenizer
from polopt.train import TrainSettings, train


@dataclass
class DemoConfig:
    """Every knob of the walk-through; the defaults are the measured default run."""

    loss: str = "logistic"
    beta: float = 0.1  # the run summary.json reports; always one of the frontier's betas
    betas: tuple[float, ...] = (0.1, 0.3, 1.0)
    bias: float = 0.3  # the judge's position bias
    sft_examples: int = 3000
    sft_steps: int = 250
    sft_lr: float = 3e-3
    sft_batch_size: int = 64
    width: int = 64
    layers: int = 2
    heads: int = 4
    n_pairs: int = 1000
    steps: int = 100
    batch_size: int = 32
    # Adam moves every weight by about lr a step: at 1e-3 the policy leaves the text it was taught within
    # 150 steps (both log-ratios fall by tens of nats, KL ~ 90, garbled replies), measured
    lr: float = 2e-4
    warmup_steps: int = 10
    eval_samples: int = 400
    max_new_tokens: int = 40
    seed: int = 0


# a reduced configuration that checks the mechanics in seconds (the tests use it)
QUICK = {"sft_examples": 200, "sft_steps": 20, "width": 16, "layers": 1, "heads": 2, "n_pairs": 40, "steps": 4,
         "batch_size": 16, "sft_batch_size": 16, "eval_samples": 24, "max_new_tokens": 30, "betas": (0.1, 1.0)}


def check_config(cfg: DemoConfig) -> None:
    losses.get(cfg.loss)  # an unknown name raises a ValueError listing the registered ones
    for b in (cfg.beta, *cfg.betas):
        validate_hyperparameters(b)
    if not 0.0 <= cfg.bias < 1.0:
        raise ValueError(f"--bias must lie in [0, 1), got {cfg.bias}")
    for name in ("sft_examples", "sft_steps", "n_pairs", "steps", "batch_size", "eval_samples", "max_new_tokens"):
        value = getattr(cfg, name)
        if not isinstance(value, int) or value < 1:
            raise ValueError(f"--{name.replace('_', '-')} must be a positive integer, got {value!r}")


def sample_texts(model, scenario_prompts: list[str], tokenizer, ids: SequenceIds, cfg: DemoConfig,
                 generator: torch.Generator, desc: str) -> tuple[list[str], list[list[int]], torch.Tensor]:
    """One reply per prompt: its text, its token ids, and the prompt tokens (N, T_p)."""
    prompt = encode_prompts(tokenizer, scenario_prompts, ids)  # (N, T_p)
    rows, _ = sample_responses(model, prompt, ids=ids, max_new_tokens=cfg.max_new_tokens, generator=generator,
                               desc=desc)
    texts = [tokenizer.decode([t for t in r if t != ids.eos]) for r in rows]
    return texts, rows, prompt


def write_pairs(path: Path, prompts: list[str], a: list[str], b: list[str], judge: PositionBiasedJudge,
                rng: random.Random) -> Path:
    with path.open("w", encoding="utf-8") as f:
        for x, first, second in zip(prompts, a, b, strict=True):
            f.write(json.dumps(judge.label(x, first, second, rng), ensure_ascii=False) + "\n")
    return path


def evaluate_policy(policy_model, reference_model, scenario: Scenario, judge: PositionBiasedJudge, tokenizer,
                    ids: SequenceIds, cfg: DemoConfig, *, seed: int) -> dict:
    """Step 5 for one trained policy; see the module docstring."""
    generator = torch.Generator().manual_seed(seed)
    rng = random.Random(seed)
    prompts = [rng.choice(scenario.prompts).text for _ in range(cfg.eval_samples)]
    mine, mine_ids, prompt = sample_texts(policy_model, prompts, tokenizer, ids, cfg, generator, "policy samples")
    theirs, _, _ = sample_texts(reference_model, prompts, tokenizer, ids, cfg, generator, "reference samples")
    out = ground_truth_win_rate(scenario.reward, prompts, mine, theirs)
    out.update(judged_win_rates(judge.prefers_first, prompts, mine, theirs, rng=random.Random(seed + 1)))
    kl, kl_se = kl_estimate(policy_model, reference_model, prompt, mine_ids, ids=ids)
    out.update({"kl_to_reference": kl, "kl_to_reference_se": kl_se,
                "mean_reward_policy": sum(map(scenario.reward, prompts, mine)) / len(prompts),
                "mean_reward_reference": sum(map(scenario.reward, prompts, theirs)) / len(prompts),
                "examples": [{"prompt": x, "policy": a, "reference": b}
                             for x, a, b in list(zip(prompts, mine, theirs, strict=True))[:6]]})
    return out


def run_demo(cfg: DemoConfig, out: Path, *, progress: bool = True, log=print) -> dict:
    """The whole walk-through into ``out``; returns summary.json's content."""
    check_config(cfg)
    start = time.perf_counter()
    betas = sorted(set(cfg.betas) | {cfg.beta})
    out.mkdir(parents=True, exist_ok=True)
    torch.manual_seed(cfg.seed)
    scenario = Scenario(cfg.seed)
    judge = PositionBiasedJudge(scenario, cfg.bias)
    tokenizer = ByteTokenizer()
    ids = SequenceIds.for_tokenizer(tokenizer)

    # 1. supervised reference
    examples = scenario.sft_corpus(cfg.sft_examples, cfg.seed)
    prompt, response = encode_examples(tokenizer, examples, ids)
    context = max(len(tokenizer.encode(p.text)) for p in scenario.prompts) + 1 + cfg.max_new_tokens
    arch = {"vocab_size": ids.vocab_size, "context": context, "width": cfg.width, "layers": cfg.layers,
            "heads": cfg.heads}
    reference = build_model(ids, context=context, width=cfg.width, layers=cfg.layers, heads=cfg.heads, seed=cfg.seed)
    sft = train_sft(reference, prompt, response, pad_id=ids.pad, steps=cfg.sft_steps, lr=cfg.sft_lr,
                    batch_size=cfg.sft_batch_size, seed=cfg.seed, progress=progress)
    reference_path = save_reference(out / "reference.pt", reference, ids=ids, tokenizer="byte", architecture=arch,
                                    history=sft.history, source="polopt.demo_scenario")
    log(f"1. reference: {cfg.sft_steps} SFT steps, next-token loss {sft.history[0]['loss']:.3f} -> "
        f"{sft.final_loss:.3f} nats ({sft.seconds:.0f} s)")

    # 2. sample pairs from the reference; 3. label them with the biased judge
    generator = torch.Generator().manual_seed(cfg.seed + 1)
    rng = random.Random(cfg.seed + 1)
    pair_prompts = [rng.choice(scenario.prompts).text for _ in range(cfg.n_pairs)]
    a, _, _ = sample_texts(reference, pair_prompts, tokenizer, ids, cfg, generator, "pair samples")
    b, _, _ = sample_texts(reference, pair_prompts, tokenizer, ids, cfg, generator, "pair samples")
    pairs_path = write_pairs(out / "pairs.jsonl", pair_prompts, a, b, judge, rng)
    loss = losses.get(cfg.loss)
    # a sample cut mid-character decodes to U+FFFD (3 bytes): cut such rare long replies back to the context
    task = pair_task(path=str(pairs_path), reference_checkpoint=str(reference_path), max_length=context - 1,
                     truncation="truncate_response", duplicates="keep")  # repeated samples are data
    base = task.prepare(loss, beta=cfg.beta, run_dir=out)
    acc = base.data.accounting
    log(f"2-3. {cfg.n_pairs} pairs sampled from the reference and labelled by the judge (position bias "
        f"{cfg.bias}): {acc['balance']} ({', '.join(f'{k} {v}' for k, v in acc['rejected_by_reason'].items())})")

    # 4. optimise, once per beta; 5. evaluate each
    frontier = []
    optim = OptimConfig(name="adam", lr=cfg.lr, warmup_steps=cfg.warmup_steps)
    for beta in betas:
        session = copy.copy(base)  # the same pairs and reference log-probs, another beta
        session.beta, session.notes = beta, []
        policy = session.build_policy("transformer", width=cfg.width, layers=cfg.layers, heads=cfg.heads,
                                      context=context, seed=cfg.seed, init="reference")
        folder = RunFolder(out / f"beta-{beta:g}")
        result = train(policy, session.pairs, loss,
                       TrainSettings(beta=beta, steps=cfg.steps, optim=optim, batch_size=cfg.batch_size,
                                     seed=cfg.seed, log_every=5, progress=progress),
                       metrics_path=folder.start_metrics())
        policy.eval()
        scores = evaluate_policy(policy.model, reference, scenario, judge, tokenizer, ids, cfg, seed=cfg.seed + 2)
        entry = {"beta": beta, **session.full_statistics(policy), **scores, "train_seconds": result.seconds,
                 "history": result.history}
        folder.write_summary({k: v for k, v in entry.items() if k != "history"})
        frontier.append(entry)
        lo, hi = scores["win_rate_ci"]
        log(f"4-5. {cfg.loss} beta {beta:g}: win_rate {scores['win_rate']:.3f} [{lo:.3f}, {hi:.3f}]  "
            f"judge_win_rate_policy_first {scores['judge_win_rate_policy_first']:.3f}  "
            f"judge_win_rate_both_orders {scores['judge_win_rate_both_orders']:.3f}  "
            f"kl_to_reference {scores['kl_to_reference']:.3f}  ({result.seconds:.0f} s)")

    main_entry = next(e for e in frontier if e["beta"] == cfg.beta)
    plots = plot_results(frontier, out, loss_name=cfg.loss)
    summary = {
        "scenario": "Tern Island weather-station bot (invented; polopt.demo_scenario)",
        "loss_name": cfg.loss,
        "beta": cfg.beta,
        **{k: main_entry[k] for k in ("win_rate", "win_rate_ci", "judge_win_rate_policy_first",
                                      "judge_win_rate_both_orders", "kl_to_reference", "kl_to_reference_se",
                                      "wins", "defeats", "ties",
                                      "comparisons", "win_rate_ties_half", "mean_reward_policy",
                                      "mean_reward_reference", "pair_accuracy", "margin_mean", "examples")},
        "judge_bias": cfg.bias,
        "sft_loss": [sft.history[0]["loss"], sft.final_loss],
        "data": acc,
        "rows_in": acc["rows_in"], "rows_accepted": acc["rows_accepted"], "rows_rejected": acc["rows_rejected"],
        "frontier": [{k: v for k, v in e.items() if k not in ("history", "examples")} for e in frontier],
        "plots": [str(p) for p in plots],
        "config": dataclasses.asdict(cfg),
        "seconds": time.perf_counter() - start,
        "notes": ["win_rate and win_rate_ci are over the comparisons the ground truth decides (equal rewards are "
                  "'ties'); the interval is Wilson's score interval at 95% (scipy.stats.binomtest)",
                  "judge_win_rate_policy_first shows the policy's reply first every time (inflated by the judge's "
                  "position bias); judge_win_rate_both_orders judges both orders and averages, which cancels it",
                  "defeats counts the comparisons the reference won under the ground truth",
                  "kl_to_reference is the Monte-Carlo mean of log pi - log pi_ref over the policy's samples"],
    }
    RunFolder(out).write_summary(summary)
    return summary


def plot_results(frontier: list[dict], out: Path, *, loss_name: str) -> list[Path]:
    """training_curves.png (loss, pair accuracy, margin per step) and frontier.png (KL vs win-rate)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 3, figsize=(12, 3.5))
    for e in frontier:
        steps = [h["step"] for h in e["history"]]
        for ax, key in zip(axes, ("loss", "pair_accuracy", "margin_mean"), strict=True):
            ax.plot(steps, [h[key] for h in e["history"]], label=f"beta {e['beta']:g}")
    for ax, key in zip(axes, ("loss", "pair_accuracy (batch)", "margin_mean (batch)"), strict=True):
        ax.set_xlabel("step")
        ax.set_title(key)
    axes[0].legend()
    fig.suptitle(f"{loss_name} on the judge-labelled pairs")
    fig.tight_layout()
    curves = out / "training_curves.png"
    fig.savefig(curves, dpi=100)
    plt.close(fig)

    fig, ax = plt.subplots(figsize=(5.5, 4))
    kl = [e["kl_to_reference"] for e in frontier]
    wr = [e["win_rate"] for e in frontier]
    err = [[w - e["win_rate_ci"][0] for w, e in zip(wr, frontier, strict=True)],
           [e["win_rate_ci"][1] - w for w, e in zip(wr, frontier, strict=True)]]
    ax.errorbar(kl, wr, yerr=err, fmt="o-", capsize=3, label="ground truth (95% Wilson)")
    ax.plot(kl, [e["judge_win_rate_policy_first"] for e in frontier], "s--", label="judge, policy shown first")
    ax.plot(kl, [e["judge_win_rate_both_orders"] for e in frontier], "^:", label="judge, both orders")
    for e in frontier:
        ax.annotate(f"beta {e['beta']:g}", (e["kl_to_reference"], e["win_rate"]), textcoords="offset points",
                    xytext=(4, -10), fontsize=8)
    ax.axhline(0.5, color="grey", linewidth=0.8)
    ax.set_xlabel("KL(policy || reference), nats (Monte-Carlo)")
    ax.set_ylabel("win-rate over the reference")
    ax.set_title(f"{loss_name}: KL vs win-rate across beta")
    ax.legend(fontsize=8)
    fig.tight_layout()
    path = out / "frontier.png"
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return [curves, path]


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="polopt demo",
        description="The end-to-end walk-through on an invented weather-station bot: SFT reference -> sample "
                    "pairs from it -> label them with a position-biased judge -> train with any loss -> win-rate "
                    "(ground truth, with a Wilson interval), judge win-rate without and with order swapping, KL, "
                    "and a KL vs win-rate frontier across beta.",
        epilog="examples:\n  polopt demo\n  polopt demo --loss squared --out runs/demo-squared\n"
               "  polopt demo --loss hinge --betas 0.1,0.3 --steps 100\n  polopt demo --quick   # seconds, "
               "checks the mechanics only", formatter_class=argparse.RawDescriptionHelpFormatter)
    d = DemoConfig()
    parser.add_argument("--out", default=None, help="output folder (default runs/demo/<time>-<loss>)")
    parser.add_argument("--loss", default=d.loss, help="any registered loss (polopt losses) or pkg.module:name")
    parser.add_argument("--beta", type=float, default=d.beta,
                        help="the beta summary.json reports (default %(default)s)")
    parser.add_argument("--betas", default=",".join(f"{b:g}" for b in d.betas),
                        help="comma-separated betas of the frontier (default %(default)s)")
    parser.add_argument("--bias", type=float, default=d.bias, help="the judge's position bias (default %(default)s)")
    for name, help_text in (("sft_steps", "SFT steps"), ("sft_examples", "SFT examples"),
                            ("n_pairs", "pairs sampled and labelled"), ("steps", "preference training steps per beta"),
                            ("eval_samples", "comparisons per evaluation"), ("seed", "seed of everything")):
        parser.add_argument(f"--{name.replace('_', '-')}", dest=name, type=int, default=getattr(d, name),
                            help=f"{help_text} (default %(default)s)")
    parser.add_argument("--lr", type=float, default=d.lr,
                        help="preference training learning rate (default %(default)s)")
    parser.add_argument("--quick", action="store_true", help="a reduced configuration that runs in seconds "
                                                             "(mechanics only; its figures mean little)")
    parser.add_argument("--threads", type=int, default=1,
                        help="torch CPU threads (default %(default)s: the tiny model gains little from more)")
    parser.add_argument("--no-progress", action="store_true", help="no progress bars")
    return parser


def config_from_args(args: argparse.Namespace) -> DemoConfig:
    try:
        betas = tuple(float(b) for b in args.betas.split(",") if b.strip())
    except ValueError:
        raise ValueError(f"--betas must be comma-separated numbers, e.g. 0.1,0.3, got {args.betas!r}") from None
    values = {k: getattr(args, k) for k in ("loss", "beta", "bias", "sft_steps", "sft_examples", "n_pairs", "steps",
                                            "eval_samples", "seed", "lr")}
    cfg = DemoConfig(betas=betas, **values)
    if args.quick:
        defaults = DemoConfig()
        quick = {k: v for k, v in QUICK.items() if getattr(cfg, k) == getattr(defaults, k)}  # flags win
        cfg = dataclasses.replace(cfg, **quick)
    return cfg


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        cfg = config_from_args(args)
        check_config(cfg)
    except (ValueError, TypeError) as err:
        print(f"polopt demo: error: {err}", file=sys.stderr)
        return 2
    if args.threads:
        torch.set_num_threads(args.threads)
    out = Path(args.out or f"runs/demo/{time.strftime('%Y-%m-%d/%H-%M-%S')}-{cfg.loss.replace(':', '_')}")
    try:
        summary = run_demo(cfg, out, progress=not args.no_progress)
    except (ValueError, TypeError, OSError) as err:
        print(f"polopt demo: error: {err}", file=sys.stderr)
        return 2
    lo, hi = summary["win_rate_ci"]
    print(f"win_rate {summary['win_rate']:.3f} [{lo:.3f}, {hi:.3f}] over the reference (ground truth, "
          f"{summary['wins']} wins, {summary['defeats']} defeats, {summary['ties']} ties); "
          f"judge_win_rate_policy_first {summary['judge_win_rate_policy_first']:.3f}, "
          f"judge_win_rate_both_orders {summary['judge_win_rate_both_orders']:.3f}; "
          f"kl_to_reference {summary['kl_to_reference']:.3f}; {summary['seconds']:.0f} s")
    print(f"output folder: {out} (summary.json, training_curves.png, frontier.png)")
    return 0
