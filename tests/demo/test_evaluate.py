"""Win-rates and their intervals, the position-biased judge and order swapping, sampling and the
Monte-Carlo KL: each against a closed form or a reference function."""

from __future__ import annotations

import math
import random

import pytest
import torch
from scipy.stats import chisquare, norm

from polopt.data.encoding import SequenceIds
from polopt.demo.scenario import STATIONS, PositionBiasedJudge, Scenario, sigmoid
from polopt.demo.winrates import ground_truth_win_rate, judged_win_rates, win_rate_interval
from polopt.models.sampling import kl_estimate, sample_responses
from polopt.training.sft import build_model


def wilson(wins: int, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson's score interval written out (Wilson, 1927, JASA 22: 209-212)."""
    z = norm.ppf(0.5 + confidence / 2)
    p = wins / n
    centre = p + z * z / (2 * n)
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return (centre - half) / (1 + z * z / n), (centre + half) / (1 + z * z / n)


@pytest.mark.parametrize(("wins", "n"), [(0, 10), (7, 10), (50, 100), (311, 500), (20, 20)])
def test_interval_is_wilsons(wins, n):
    assert win_rate_interval(wins, n) == pytest.approx(wilson(wins, n), abs=1e-12)
    assert win_rate_interval(wins, n, 0.9) == pytest.approx(wilson(wins, n, 0.9), abs=1e-12)


def test_ground_truth_counts_ties_apart():
    reward = {"good": 2.0, "ok": 1.0, "bad": 0.0}
    out = ground_truth_win_rate(lambda x, y: reward[y], ["p"] * 5, ["good", "good", "ok", "bad", "ok"],
                                ["bad", "ok", "ok", "good", "bad"])
    assert (out["wins"], out["defeats"], out["ties"]) == (3, 1, 1)
    assert out["win_rate"] == 0.75 and out["win_rate_ci"] == pytest.approx(wilson(3, 4))
    assert out["win_rate_ties_half"] == pytest.approx(3.5 / 5)


SCENARIO = Scenario(0)
PROMPT = SCENARIO.prompts[0]


def _replies(n: int, seed: int) -> list[str]:
    rng = random.Random(seed)
    styles = ["exact", "no_station", "vague", "wrong_station", "refusal"]
    return [SCENARIO.reply(PROMPT, rng.choice(styles), rng) for _ in range(n)]


def test_judge_position_bias_by_hand():
    judge = PositionBiasedJudge(SCENARIO, bias=0.3)
    a = SCENARIO.reply(PROMPT, "exact", random.Random(0))
    # equal replies: the judge picks the first shown with 0.3 + 0.7 / 2 = 0.65 (derived by hand)
    assert judge.prefers_first(PROMPT.text, a, a) == pytest.approx(0.65)
    b = "Ask me later."
    d = SCENARIO.reward(PROMPT.text, a) - SCENARIO.reward(PROMPT.text, b)
    assert judge.prefers_first(PROMPT.text, a, b) == pytest.approx(0.3 + 0.7 * sigmoid(d))
    assert judge.prefers_first(PROMPT.text, a, b) + judge.prefers_first(PROMPT.text, b, a) == pytest.approx(1.3)


def test_swapping_removes_the_bias_for_identical_policies():
    # the same replies in both roles (reversed order): every comparison's mirror is in the set, so a fair
    # judge scores 1/2 exactly; the raw protocol (policy always first) scores 1/2 + bias / 2 (by hand)
    judge = PositionBiasedJudge(SCENARIO, bias=0.4)
    replies = _replies(60, seed=1)
    rates = judged_win_rates(judge.prefers_first, [PROMPT.text] * 60, replies, replies[::-1])
    assert rates["judge_win_rate_both_orders"] == pytest.approx(0.5, abs=1e-12)
    assert rates["judge_win_rate_policy_first"] == pytest.approx(0.5 + 0.4 / 2, abs=1e-12)


def test_swapped_rate_does_not_depend_on_the_bias():
    # swapped score = 1/2 + (1 - b)(s(d) - 1/2) per comparison: the b-free part of the vote
    policy, reference = _replies(40, seed=2), _replies(40, seed=3)
    prompts = [PROMPT.text] * 40
    for bias in (0.0, 0.2, 0.6):
        judge = PositionBiasedJudge(SCENARIO, bias=bias)
        rates = judged_win_rates(judge.prefers_first, prompts, policy, reference)
        r = SCENARIO.reward
        d = [r(PROMPT.text, a) - r(PROMPT.text, b) for a, b in zip(policy, reference, strict=True)]
        assert rates["judge_win_rate_both_orders"] == pytest.approx(
            sum(0.5 + (1 - bias) * (sigmoid(x) - 0.5) for x in d) / 40, abs=1e-12)


def test_drawn_votes_agree_with_the_probabilities():
    judge = PositionBiasedJudge(SCENARIO, bias=0.3)
    replies = _replies(4000, seed=4)
    rates = judged_win_rates(judge.prefers_first, [PROMPT.text] * 4000, replies, replies[::-1],
                             rng=random.Random(0))
    # 4000 Bernoulli votes around 0.65: 4 standard errors is about 0.03 (seeded, so deterministic)
    assert rates["judge_win_rate_policy_first"] == pytest.approx(0.65, abs=4 * math.sqrt(0.65 * 0.35 / 4000))
    assert rates["judge_win_rate_both_orders"] == pytest.approx(0.5, abs=0.03)


def test_reward_of_the_scenario():
    p = PROMPT  # "wind at Gull Rock?"
    assert p.station == STATIONS[0]
    exact = SCENARIO.reply(p, "exact", random.Random(0))
    assert SCENARIO.reward(p.text, exact) == pytest.approx(3.5)  # station +2, reading +1.5, under 30 chars
    assert SCENARIO.reward(p.text, "Ask me later.") == -1.0
    assert SCENARIO.reward(p.text, "Kelp Bay and Gull Rock") == 0.0  # +2 and -2
    assert SCENARIO.reward(p.text, "x" * 40) == pytest.approx(-0.5)


IDS = SequenceIds(pad=5, bos=6, eos=4, vocab_size=7)


class FixedNext(torch.nn.Module):
    """Next-token logits that ignore the input: a known distribution to sample from."""

    def __init__(self, logits):
        super().__init__()
        self.logits = torch.as_tensor(logits, dtype=torch.float32)

    def forward(self, tokens):
        return self.logits.expand(*tokens.shape, -1)  # (B, T, V)


def test_samples_follow_the_next_token_distribution():
    # ids 0..3 and eos 4 with probabilities from the logits; pad and bos carry mass but are never drawn
    logits = [0.0, 1.0, 2.0, -1.0, 0.5, 3.0, 3.0]
    model = FixedNext(logits)
    prompt = torch.full((6000, 1), IDS.bos)
    rows, ended = sample_responses(model, prompt, ids=IDS, max_new_tokens=1, generator=torch.Generator().manual_seed(0))
    first = torch.tensor([r[0] for r in rows])
    counts = torch.bincount(first, minlength=7)
    assert int(counts[IDS.pad]) == 0 and int(counts[IDS.bos]) == 0
    p = torch.softmax(torch.tensor(logits[:5], dtype=torch.float64), 0)  # renormalised over the other ids
    assert chisquare(counts[:5].numpy(), (p * 6000).numpy()).pvalue > 1e-3  # scipy's chi-square test
    assert bool(ended.eq(first == IDS.eos).all())


def test_sampling_stops_at_the_end_id_and_kl_of_a_model_to_itself_is_zero():
    ids = SequenceIds.for_tokenizer(type("T", (), {"vocab_size": 8, "pad_id": None, "bos_id": None,
                                                   "eos_id": 3})())
    model = build_model(ids, context=12, width=16, layers=1, heads=2, seed=0)
    prompt = torch.tensor([[ids.bos, 1, 2], [ids.bos, 1, ids.pad]])
    rows, ended = sample_responses(model, prompt, ids=ids, max_new_tokens=10,
                                   generator=torch.Generator().manual_seed(1))
    for r, e in zip(rows, ended, strict=True):
        assert (ids.eos in r) == bool(e)
        assert ids.eos not in r[:-1] and len(r) <= 10
    assert kl_estimate(model, model, prompt, rows, ids=ids)[0] == 0.0
