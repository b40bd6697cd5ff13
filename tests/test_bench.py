"""The throughput bench runs end to end on a tiny configuration: table, JSON, the hand-written loop.

No timing is asserted (RULES: benches print figures, they never pass or fail); what is checked is
that every configuration is measured, the table and the JSON carry the figures, and the counts the
figures rest on are right: the model FLOPs of the formula in bench/throughput.py on a case worked
by hand, and the synthetic data's real-token count.
"""

from __future__ import annotations

import json
import math

import torch

from bench import baseline_loop, throughput
from bench.skewed_data import PAD_ID, real_token_count, skewed_pairs

TINY = ["--widths", "16", "--pairs", "48", "--batch", "8", "--steps", "3", "--max-length", "16", "--threads", "1",
        "--rounds", "2", "--no-isolate", "--layers", "2"]


def test_throughput_prints_the_table_and_valid_json(tmp_path, capsys):
    out = tmp_path / "bench.json"
    throughput.main([*TINY, "--json", str(out)])
    text = capsys.readouterr().out
    assert "configuration" in text and "tokens/s" in text and "hand-written loop" in text
    assert "reference cache: steps/s on / off" in text
    report = json.loads(text.split("JSON:\n", 1)[1])
    assert report == json.loads(out.read_text())
    names = {r["name"] for r in report["rows"]}
    assert names == {"fp32, bucketing, cache", "fp32, padding to the longest", "fp32, bucketing, no cache",
                     "bf16, bucketing, cache", "hand-written loop"}
    for row in report["rows"]:
        assert row["tokens_per_s"] > 0 and math.isfinite(row["step_s"]) and row["peak_rss_mib"] is None
    assert len(report["targets"]) == 6 and all(math.isfinite(t["value"]) for t in report["targets"])
    assert len(report["rounds"]) == 2 and all(len(rows) == 5 for rows in report["rounds"])
    versus = report["versus_loop"]["16"]
    ratios = [r["ratio"] for r in versus["rounds"]]
    assert len(ratios) == 2 and versus["median"] == (ratios[0] + ratios[1]) / 2  # the median of two
    for rows, each in zip(report["rounds"], versus["rounds"], strict=True):  # each ratio within one round
        by = {r["name"]: r["tokens_per_s"] for r in rows}
        assert each["ratio"] == by["fp32, bucketing, cache"] / by["hand-written loop"]
    assert "round 1:" in text and "round 2:" in text and "median" in text
    main = next(r for r in report["rows"] if r["name"] == "fp32, bucketing, cache")
    padded = next(r for r in report["rows"] if r["name"] == "fp32, padding to the longest")
    assert 0 <= main["padding_share"] < padded["padding_share"] < 1


def test_versus_loop_alternates_the_trainer_and_the_hand_written_loop(capsys):
    throughput.main([*TINY, "--versus-loop", "--rounds", "3"])
    text = capsys.readouterr().out
    order = [line.split("16  ", 1)[1].split("  ")[0].strip() for line in text.splitlines()
             if line.startswith("  round ")]
    assert order == ["fp32, bucketing, cache", "hand-written loop"] * 3
    report = json.loads(text.split("JSON:\n", 1)[1])
    assert len(report["versus_loop"]["16"]["rounds"]) == 3
    assert [t["figure"] for t in report["targets"]] == ["polopt / hand-written loop (median of rounds)"]


def test_peak_memory_of_one_configuration():
    cfg = {"pairs": 16, "batch": 4, "steps": 2, "max_length": 16, "threads": 1, "kind": "polopt", "width": 16,
           "layers": 1, "precision": "fp32", "bucketing": True, "cache": True, "name": "fp32, bucketing, cache"}
    assert throughput.peak_memory(cfg) > 10  # MiB: at least torch itself


def test_the_cache_off_policy_gives_the_cached_margin():
    data, policy, reference = throughput.build({"pairs": 8, "max_length": 16, "width": 16})
    prompt, winner = data["prompt"], data["winner"]
    cached = policy.logprobs(prompt, winner) - reference.logprobs(prompt, winner)
    recomputed = throughput.RecomputedReference(policy, reference).logprobs(prompt, winner)
    torch.testing.assert_close(recomputed, cached)


def test_model_flops_formula_by_hand():
    # two sequences of 3 and 5 positions, 100 weights, 2 layers, width 4:
    # 6*100*(3+5) + 6*2*4*(9+25) = 4800 + 1632 = 6432 (derived by hand)
    assert throughput.model_flops(torch.tensor([3, 5]), weights=100, layers=2, width=4) == 6432


def test_skewed_data_counts_real_tokens():
    data = skewed_pairs(200, max_length=32, long_share=0.1, seed=1)
    lengths = {k: (v != PAD_ID).sum(1) for k, v in data.items()}
    assert (lengths["winner"] == 32).any() and float((lengths["winner"] <= 24).float().mean()) > 0.8
    assert torch.equal(real_token_count(data), 2 * lengths["prompt"] + lengths["winner"] + lengths["loser"])
    for v in data.values():  # right padding: no real token after a pad
        assert not ((v[:, 1:] != PAD_ID) & (v[:, :-1] == PAD_ID)).any()


def test_baseline_loop_runs():
    torch.set_num_threads(1)
    r = baseline_loop.run(width=16, layers=1, heads=2, n_pairs=24, batch=8, steps=2, warmup=1, max_length=16)
    assert r["tokens_per_s"] > 0 and math.isfinite(r["loss"])


def test_the_streaming_bench_maps_the_pairs_it_holds_in_ram(tmp_path):
    # the two processes of bench/stream_pairs.py must train on the same pairs: the Arrow file read
    # through MappedPairs gives, row for row, the padded tensors of the in-RAM PairSet
    from bench import stream_pairs
    from polopt.pairfile.mapped import MappedPairs

    path = tmp_path / "pairs.arrow"
    stream_pairs.write_skewed(path, 60, 16)
    mapped, held = MappedPairs(path, pad_id=PAD_ID), stream_pairs.skewed_in_ram(60, 16)
    rows = torch.tensor([0, 7, 59, 31])
    got, want = mapped.select(rows), held.select(rows)
    for name in ("prompt", "winner", "loser"):
        a, b = getattr(got, name), getattr(want, name)
        assert torch.equal(a, b[:, : a.shape[1]]) and bool((b[:, a.shape[1]:] == PAD_ID).all()), name
    assert torch.equal(got.tokens, want.tokens)


def test_the_streaming_bench_runs_and_writes_json(tmp_path, capsys):
    from bench import stream_pairs

    out = tmp_path / "stream.json"
    stream_pairs.main(["--pairs", "300", "--steps", "2", "--batch-size", "16", "--max-length", "16",
                       "--json", str(out)])
    report = json.loads(out.read_text())
    assert "peak RSS mapped / in RAM" in capsys.readouterr().out
    assert {report["runs"][m]["rows"] for m in ("mapped", "ram")} == {300}
    assert report["peak_rss_mapped_over_ram"] > 0 and all(math.isfinite(report["runs"][m]["loss"])
                                                           for m in ("mapped", "ram"))


def test_the_cached_prefix_of_the_bench_scores_pairs_as_separate_scoring_does():
    """bench/prefix_cache.py's other way of computing a prompt once (keys and values cached per layer)
    must give the log-probabilities of scoring prompt + response on its own, or its timing means
    nothing; the reference here is polopt.models.logprobs.sequence_logprobs over each (prompt, response)."""
    from bench.prefix_cache import WAYS, prefix_pair_logprobs, separate_pair_logprobs
    from polopt.models.transformer import TinyTransformer

    pad = 0
    g = torch.Generator().manual_seed(3)
    model = TinyTransformer(12, context=24, width=16, layers=2, heads=2, seed=1)

    def rows(n_rows, longest):  # right-padded random tokens 1..11, lengths 1..longest
        n = torch.randint(1, longest + 1, (n_rows,), generator=g)
        tokens = torch.randint(1, 12, (n_rows, longest), generator=g)
        return torch.where(torch.arange(longest)[None, :] < n[:, None], tokens, pad)

    prompt, winner, loser = rows(5, 9), rows(5, 4), rows(5, 6)
    with torch.no_grad():
        expected = torch.stack(separate_pair_logprobs(model, prompt, winner, loser, pad_id=pad))
        cached = torch.stack(prefix_pair_logprobs(model, prompt, winner, loser, pad_id=pad))
    assert torch.allclose(cached, expected, atol=1e-5, rtol=0)
    assert set(WAYS) == {"separate (prompt twice)", "packed row (share_prompt=true)", "cached prefix"}


def test_full_batch_lbfgs_reaches_the_closed_form_optimum_on_a_small_sequence_task():
    # bench/full_batch_lbfgs.py on 13 responses: float64 L-BFGS on the whole population loss ends at the
    # forward-KL link's closed form f'(pi / pi_ref) = r / beta + c (Wang et al. 2023), which the session's
    # exact optimum is; the transformer started at the reference is 0.40 TV away from it
    from bench.full_batch_lbfgs import minimise
    from polopt import losses
    from toy_tasks.sequence.task import sequence_task

    objective = losses.resolve("divergence_forward_kl")
    session = sequence_task(max_length=2, n_prompts=1).prepare(objective, beta=0.5)
    assert session.finite.optimum.method.startswith("closed form")
    start = session.evaluate(session.build_policy(init="reference"))["tv_to_optimum"]
    reports = list(minimise(session, objective, 0.5, torch.float64, rounds=4, report_every=2))
    assert [r[0] for r in reports] == [2, 4]
    assert start > 0.1 and reports[-1][2] < 1e-6
    assert reports[-1][1] <= reports[0][1] + 1e-12
