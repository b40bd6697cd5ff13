"""Length bucketing and trimmed batches (polopt/training/batching.py) and the length-split forward pass.

What is checked against what:
- a trimmed or bucketed batch gives the loss and gradient of the same pairs padded to the
  dataset's maximum (the chain rule of docs/maths.md: log pi(y|x) is a sum over real tokens only, so
  padding that no real token sees cannot change it), in float64 to 1e-10;
- the epoch order is a permutation of the pairs (each visited once per epoch), reproducible from
  the seed, and groups lengths (sorted spans, common practice "sortish" sampling);
- a bucketed run resumes bit-identical (the checkpoint contract of polopt/checkpoints/store.py);
- the cut of :func:`polopt.models.logprobs.length_split` on a worked example derived by hand.
"""

from __future__ import annotations

import pytest
import torch
from helpers_losses import loss_of_margins

from polopt import losses
from polopt.losses.reduce import margins
from polopt.models.logprobs import SequencePolicy, length_split, sequence_logprobs
from polopt.models.transformer import TinyTransformer
from polopt.pairs import PairSet
from polopt.training.batching import SPAN_BATCHES, Batcher, bucketed_order
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig

PAD, VOCAB = 9, 10


def skewed(n: int, *, max_length: int = 12, seed: int = 0) -> PairSet:
    """Pairs of token rows over ids 0..8 (9 pads): most responses 1..3 tokens, some at max_length."""
    g = torch.Generator().manual_seed(seed)

    def rows(width: int, low: int, high: int, long_share: float) -> torch.Tensor:
        n_tok = torch.randint(low, high + 1, (n,), generator=g)
        n_tok = torch.where(torch.rand(n, generator=g) < long_share, width, n_tok)
        real = torch.arange(width)[None, :] < n_tok[:, None]
        return torch.where(real, torch.randint(0, PAD, (n, width), generator=g), PAD)

    prompt, winner, loser = rows(3, 1, 3, 0.0), rows(max_length, 1, 3, 0.15), rows(max_length, 1, 3, 0.15)
    ref_w, ref_l = torch.randn(n, generator=g, dtype=torch.float64), torch.randn(n, generator=g, dtype=torch.float64)
    tokens = 2 * (prompt != PAD).sum(1) + (winner != PAD).sum(1) + (loser != PAD).sum(1)
    return PairSet(prompt, winner, loser, ref_w, ref_l, tokens=tokens)


def policy(seed: int = 0, dtype=torch.float64) -> SequencePolicy:
    model = TinyTransformer(VOCAB, output_size=PAD, context=15, width=16, layers=1, heads=2, seed=seed).to(dtype)
    return SequencePolicy(model, pad_id=PAD)


def loss_and_grad(pol: SequencePolicy, batch: PairSet):
    pol.zero_grad()
    logp = pol.logprobs(torch.cat([batch.prompt] * 2), torch.cat([batch.winner, batch.loser]))
    lw, ll = logp.chunk(2)
    rho = margins(lw, ll, batch.reference_winner, batch.reference_loser)
    value = loss_of_margins(losses.resolve_margin("logistic"), rho,
                            beta=0.5)
    value.backward()
    return value.detach(), [p.grad.clone() for p in pol.parameters()]


class TestTrimmedBatches:
    def test_trimmed_batch_has_the_padded_loss_and_gradient(self):
        pairs = skewed(40)
        batcher = Batcher(pairs, batch_size=8, pad_id=PAD)
        pol = policy()
        for index in (torch.tensor([0, 5, 7, 11, 12, 20, 30, 39]), torch.arange(8, 16)):
            trimmed = batcher.take(index)
            assert trimmed.winner.shape[1] <= pairs.winner.shape[1]
            assert int(((trimmed.winner != PAD) | (trimmed.loser != PAD)).any(0).sum()) == trimmed.winner.shape[1]
            value_t, grad_t = loss_and_grad(pol, trimmed)
            value_p, grad_p = loss_and_grad(pol, pairs.select(index))  # padded to the dataset's maximum
            torch.testing.assert_close(value_t, value_p, rtol=1e-10, atol=1e-10)
            for a, b in zip(grad_t, grad_p, strict=True):
                torch.testing.assert_close(a, b, rtol=1e-10, atol=1e-10)

    def test_take_keeps_the_real_token_counts(self):
        pairs = skewed(40)
        index = torch.tensor([3, 1, 4, 15, 9])
        trimmed = Batcher(pairs, batch_size=5, pad_id=PAD).take(index)
        real = 2 * (trimmed.prompt != PAD).sum(1) + (trimmed.winner != PAD).sum(1) + (trimmed.loser != PAD).sum(1)
        assert torch.equal(real, pairs.tokens[index]) and torch.equal(trimmed.tokens, pairs.tokens[index])

    def test_index_pairs_pass_through(self):
        pairs = PairSet(torch.zeros(6, dtype=torch.long), torch.arange(6), torch.arange(6).flip(0),
                        torch.zeros(6), torch.zeros(6))
        batcher = Batcher(pairs, batch_size=2, pad_id=None)
        assert not batcher.bucketing
        g1, g2 = torch.Generator().manual_seed(3), torch.Generator().manual_seed(3)
        assert torch.equal(batcher.epoch_order(g1), torch.randperm(6, generator=g2))  # the trainer's old draw

    def test_bucketing_must_be_a_bool(self):
        with pytest.raises(ValueError, match=r"train.bucketing must be true or false, got 'yes'"):
            Batcher(skewed(4), batch_size=2, pad_id=PAD, bucketing="yes")


class TestEpochOrder:
    @pytest.mark.parametrize("n, batch", [(48, 8), (50, 8), (SPAN_BATCHES * 4 * 2 + 12, 4)])
    def test_a_permutation_whose_left_out_tail_is_random(self, n, batch):
        pairs = skewed(n)
        batcher = Batcher(pairs, batch_size=batch, pad_id=PAD)
        g = torch.Generator().manual_seed(1)
        order = batcher.epoch_order(g)
        assert sorted(order.tolist()) == list(range(n))  # every pair once per epoch (all of them when B | N)
        g_plain = torch.Generator().manual_seed(1)
        plain = torch.randperm(n, generator=g_plain)
        tail = n % batch
        assert torch.equal(order[n - tail:], plain[n - tail:])  # the pairs the epoch leaves out: drawn, not longest
        assert set(order[: n - tail].tolist()) == set(plain[: n - tail].tolist())

    def test_reproducible_from_the_seed(self):
        batcher = Batcher(skewed(64), batch_size=8, pad_id=PAD)
        first = [batcher.epoch_order(torch.Generator().manual_seed(5)) for _ in range(2)]
        other = batcher.epoch_order(torch.Generator().manual_seed(6))
        assert torch.equal(*first) and not torch.equal(first[0], other)

    def test_batches_hold_similar_lengths(self):
        n, batch = 64, 8  # 8 batches: one sorted span
        size = torch.randint(1, 100, (n,), generator=torch.Generator().manual_seed(0))
        order = bucketed_order(torch.randperm(n), size, batch, torch.Generator().manual_seed(0))
        groups = sorted(size[order].reshape(-1, batch).tolist(), key=min)
        for a, b in zip(groups, groups[1:], strict=False):
            assert max(a) <= min(b)  # the batches tile the sorted lengths

    def test_buckets_group_pairs_by_prompt_winner_and_loser_tokens(self):
        # one sorted span (64 pairs, batches of 8): the batches tile the pairs sorted by the width of their
        # shared-prompt row, prompt + winner + loser real tokens, counted here directly from the padded rows
        pairs = skewed(64, seed=2)
        width = sum((getattr(pairs, k) != PAD).sum(1) for k in ("prompt", "winner", "loser"))  # (N,)
        order = Batcher(pairs, batch_size=8, pad_id=PAD).epoch_order(torch.Generator().manual_seed(4))
        groups = sorted(width[order].reshape(-1, 8).tolist(), key=lambda g: (min(g), max(g)))
        for a, b in zip(groups, groups[1:], strict=False):
            assert max(a) <= min(b)
        assert len(set(width.tolist())) > 8  # lengths vary enough for the check to mean something

    def test_bucketing_computes_fewer_positions(self):
        pairs = skewed(256)

        def positions(bucketing: bool) -> int:
            batcher = Batcher(pairs, batch_size=16, pad_id=PAD, bucketing=bucketing)
            order = batcher.epoch_order(torch.Generator().manual_seed(0))
            return sum(b.winner.shape[1] + b.prompt.shape[1] for b in
                       (batcher.take(order[i:i + 16]) for i in range(0, 256, 16)))

        assert positions(True) < 0.7 * positions(False)


def _run(pairs: PairSet, steps: int, checkpoint_every: int = 0, **kwargs):
    pol = policy(dtype=torch.float32)
    result = train(pol, pairs, losses.resolve_margin("logistic"),
                   TrainSettings(beta=0.5, steps=steps, optim=OptimConfig("adam", 1e-3), batch_size=8, seed=3,
                                 log_every=2, progress=False, checkpoint_every=checkpoint_every),
                   **kwargs)
    return pol, result


def test_a_bucketed_run_resumes_bit_identical():
    pairs = skewed(36)  # 4 full batches an epoch, 4 pairs left out: 10 steps cross two epochs
    saved = {}
    full_policy, full = _run(pairs, 10, checkpoint_every=1,
                             save_checkpoint=lambda s: saved.setdefault(s["step"], _copy(s)))
    resumed_policy, resumed = _run(pairs, 10, resume=saved[5])
    for name, value in full_policy.state_dict().items():
        assert torch.equal(value, resumed_policy.state_dict()[name]), name
    strip = [{k: v for k, v in r.items() if k not in ("seconds", "tokens_per_s")} for r in full.history]
    assert strip == [{k: v for k, v in r.items() if k not in ("seconds", "tokens_per_s")} for r in resumed.history]


def _copy(state):
    import copy

    return copy.deepcopy(state)


class TestLengthSplit:
    def test_worked_example(self):
        # lengths 2, 2, 2, 10: one pass computes 4 * 10 = 40 positions, a cut after the three short rows
        # 3 * 2 + 1 * 10 = 16 (derived by hand)
        order, k = length_split(torch.tensor([10, 2, 2, 2]))
        assert k == 3 and order.tolist() == [1, 2, 3, 0]

    def test_no_cut_when_lengths_are_close(self):
        assert length_split(torch.tensor([9, 10, 10, 8]))[1] == 0

    def test_split_pass_equals_one_pass(self):
        pairs = skewed(24, seed=4)
        prompt, response = torch.cat([pairs.prompt] * 2), torch.cat([pairs.winner, pairs.loser])
        n = (prompt != PAD).sum(1) + (response != PAD).sum(1)
        assert 0 < length_split(n)[1] < len(n)  # this batch is split
        pol = policy()
        split = pol.logprobs(prompt, response)
        whole = sequence_logprobs(pol.model, prompt, response, pad_id=PAD)
        torch.testing.assert_close(split, whole, rtol=1e-12, atol=1e-12)
        (g_split,) = torch.autograd.grad(split.sum(), pol.model.head.weight)
        (g_whole,) = torch.autograd.grad(sequence_logprobs(pol.model, prompt, response, pad_id=PAD).sum(),
                                         pol.model.head.weight)
        torch.testing.assert_close(g_split, g_whole, rtol=1e-10, atol=1e-12)
