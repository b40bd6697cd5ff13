"""``polopt demo``: the end-to-end walk-through on the invented Tern Island weather bot.

One command, five steps, all on the CPU (the default takes a few minutes on 2 cores):

1. supervised reference: the tiny transformer learns the bot's replies
   (:mod:`polopt.training.sft`) from a corpus that mixes good and poor ones
   (:mod:`polopt.demo.scenario`);
2. sample pairs: two replies per prompt drawn from the reference
   (:mod:`polopt.models.sampling`);
3. label them with the simulated judge, which picks the first-shown reply with
   probability ``bias`` and otherwise votes by Bradley–Terry on the hidden
   reward; the pairs go to ``pairs.jsonl`` and are read back through the data
   layer exactly as a user's file is (:mod:`polopt.pairfile.task`; identical pairs
   are rejected and reported);
4. optimise with any loss of the registry (``loss=``), once per beta of the
   frontier, with the same trainer as ``polopt train`` (:func:`polopt.training.loop.train`);
5. evaluate (:mod:`polopt.demo.winrates`): the win-rate of the trained policy over the
   reference under the ground truth with its Wilson interval, the same measured
   by the biased judge without and with order swapping, the Monte-Carlo KL to the
   reference, and two PNGs: training curves and the KL vs win-rate frontier.

The output folder gets reference.pt, pairs.jsonl, rejects.jsonl, one folder per
beta (metrics.jsonl, summary.json), training_curves.png, frontier.png and
summary.json (the run at ``beta=``, with the frontier beside it).
"""

from __future__ import annotations

import copy
import dataclasses
import json
import random
import time
from pathlib import Path

import torch

from polopt import losses
from polopt.data.encoding import SequenceIds, encode_prompts
from polopt.data.tokenizer import ByteTokenizer
from polopt.demo.scenario import PositionBiasedJudge, Scenario
from polopt.demo.settings import DemoConfig
from polopt.demo.winrates import ground_truth_win_rate, judged_win_rates
from polopt.losses.reduce import validate_hyperparameters
from polopt.models.sampling import kl_estimate, sample_responses
from polopt.pairfile.task import pair_task
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig
from polopt.training.run_folder import RunFolder
from polopt.training.sft import build_model, encode_examples, save_reference, train_sft


def check_config(cfg: DemoConfig) -> None:
    losses.resolve_margin(cfg.loss)  # an unknown name raises a ValueError listing the registered ones
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


def train_reference(cfg: DemoConfig, scenario: Scenario, tokenizer, ids: SequenceIds, out: Path, *,
                    progress: bool) -> tuple:
    """Step 1: the reference by SFT on the scenario's corpus, saved as ``out/reference.pt``; returns the model,
    its path, the context it was built for and the SFT result."""
    examples = scenario.sft_corpus(cfg.sft_examples, cfg.seed)
    prompt, response = encode_examples(tokenizer, examples, ids)
    context = max(len(tokenizer.encode(p.text)) for p in scenario.prompts) + 1 + cfg.max_new_tokens
    arch = {"vocab_size": ids.vocab_size, "context": context, "width": cfg.width, "layers": cfg.layers,
            "heads": cfg.heads}
    reference = build_model(ids, context=context, width=cfg.width, layers=cfg.layers, heads=cfg.heads, seed=cfg.seed)
    sft = train_sft(reference, prompt, response, pad_id=ids.pad, steps=cfg.sft_steps, lr=cfg.sft_lr,
                    batch_size=cfg.sft_batch_size, seed=cfg.seed, progress=progress)
    path = save_reference(out / "reference.pt", reference, ids=ids, tokenizer="byte", architecture=arch,
                          history=sft.history, source="polopt.demo.scenario")
    return reference, path, context, sft


def train_at_beta(cfg: DemoConfig, beta: float, base, loss, context: int, out: Path, *, progress: bool) -> dict:
    """Step 4 at one beta: the policy trained from the reference on ``base``'s pairs (the same pairs and
    reference log-probs, another beta); its statistics, history and trained model (``model``)."""
    session = copy.copy(base)
    session.beta, session.notes = beta, []
    policy = session.build_policy("transformer", width=cfg.width, layers=cfg.layers, heads=cfg.heads,
                                  context=context, seed=cfg.seed, init="reference")
    optim = OptimConfig(name="adam", lr=cfg.lr, warmup_steps=cfg.warmup_steps)
    result = train(policy, session.pairs, loss,
                   TrainSettings(beta=beta, steps=cfg.steps, optim=optim, batch_size=cfg.batch_size,
                                 seed=cfg.seed, log_every=5, progress=progress),
                   metrics_path=RunFolder(out / f"beta-{beta:g}").start_metrics())
    policy.eval()
    return {"beta": beta, **session.full_statistics(policy), "train_seconds": result.seconds,
            "history": result.history, "model": policy.model}


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
    reference, reference_path, context, sft = train_reference(cfg, scenario, tokenizer, ids, out, progress=progress)
    log(f"1. reference: {cfg.sft_steps} SFT steps, next-token loss {sft.history[0]['loss']:.3f} -> "
        f"{sft.final_loss:.3f} nats ({sft.seconds:.0f} s)")

    # 2. sample pairs from the reference; 3. label them with the biased judge
    generator = torch.Generator().manual_seed(cfg.seed + 1)
    rng = random.Random(cfg.seed + 1)
    pair_prompts = [rng.choice(scenario.prompts).text for _ in range(cfg.n_pairs)]
    a, _, _ = sample_texts(reference, pair_prompts, tokenizer, ids, cfg, generator, "pair samples")
    b, _, _ = sample_texts(reference, pair_prompts, tokenizer, ids, cfg, generator, "pair samples")
    pairs_path = write_pairs(out / "pairs.jsonl", pair_prompts, a, b, judge, rng)
    loss = losses.resolve_margin(cfg.loss)
    # a sample cut mid-character decodes to U+FFFD (3 bytes): cut such rare long replies back to the context
    task = pair_task(path=str(pairs_path), reference_checkpoint=str(reference_path), max_length=context - 1,
                     truncation="truncate_response", duplicates="keep")  # repeated samples are data
    base = task.prepare(loss, beta=cfg.beta, run_dir=out)
    acc = base.data.accounting
    log(f"2-3. {cfg.n_pairs} pairs sampled from the reference and labelled by the judge (position bias "
        f"{cfg.bias}): {acc['balance']} ({', '.join(f'{k} {v}' for k, v in acc['rejected_by_reason'].items())})")

    # 4. optimise, once per beta; 5. evaluate each
    frontier = []
    for beta in betas:
        entry = train_at_beta(cfg, beta, base, loss, context, out, progress=progress)
        scores = evaluate_policy(entry.pop("model"), reference, scenario, judge, tokenizer, ids, cfg,
                                 seed=cfg.seed + 2)
        entry.update(scores)
        RunFolder(out / f"beta-{beta:g}").write_summary({k: v for k, v in entry.items() if k != "history"})
        frontier.append(entry)
        lo, hi = scores["win_rate_ci"]
        log(f"4-5. {cfg.loss} beta {beta:g}: win_rate {scores['win_rate']:.3f} [{lo:.3f}, {hi:.3f}]  "
            f"judge_win_rate_policy_first {scores['judge_win_rate_policy_first']:.3f}  "
            f"judge_win_rate_both_orders {scores['judge_win_rate_both_orders']:.3f}  "
            f"kl_to_reference {scores['kl_to_reference']:.3f}  ({entry['train_seconds']:.0f} s)")

    main_entry = next(e for e in frontier if e["beta"] == cfg.beta)
    plots = plot_results(frontier, out, loss_name=cfg.loss)
    summary = {
        "scenario": "Tern Island weather-station bot (invented; polopt.demo.scenario)",
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
