"""One pass over the prompt shared by winner and loser (polopt.models.logprobs.pack_pairs, train.share_prompt).

The reference point is the chain rule computed the plain way: each (prompt, response)
on its own, unpadded, a Python loop adding ``log_softmax(logits)[next token]`` (torch's
log_softmax), as in tests/models/test_logprobs.py. The shared-prompt row must give the same
log-probabilities to 1e-5 in float32: every response token sees the same tokens at the
same positions as in its own pass, so only floating-point rounding may differ.
"""

import pytest
import torch

from polopt import losses
from polopt.models.logprobs import (
    SequencePolicy,
    batched_logprobs,
    batched_pair_logprobs,
    pack_pairs,
    shared_pair_logprobs,
)
from polopt.models.reference_cache import reference_pair_logprobs
from polopt.models.transformer import BigramTable, TinyTransformer
from polopt.pairs import PairSet
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig

PAD = 0
V = 17  # token ids 1..16, padding 0


def plain(model, prompt: list[int], response: list[int]) -> float:
    """log pi(response | prompt), one unpadded sequence, token by token."""
    seq = torch.tensor([prompt + response])
    with torch.no_grad():
        logits = model(seq[:, :-1])[0]  # (T-1, V)
    return sum(float(torch.log_softmax(logits[len(prompt) - 1 + t], dim=-1)[token]) for t, token in enumerate(response))


def right_pad(rows, width=None):
    width = max(max((len(r) for r in rows), default=0), 1) if width is None else width
    return torch.tensor([r + [PAD] * (width - len(r)) for r in rows])


def random_rows(g, n, low, high):
    sizes = torch.randint(low, high + 1, (n,), generator=g)
    return [torch.randint(1, V, (int(k),), generator=g).tolist() for k in sizes]


def random_model(seed, kind="transformer"):
    if kind == "bigram":
        m = BigramTable(V, context=48)
        with torch.no_grad():
            m.table.normal_(generator=torch.Generator().manual_seed(seed))
        return m
    m = TinyTransformer(V, context=48, width=24, layers=2, heads=3, seed=seed)
    with torch.no_grad():
        m.head.weight.mul_(30)  # logits far from uniform, so a token that sees the wrong context shows
        for block in m.blocks:
            block.attn.proj.weight.mul_(30)  # attention matters: the other response would change the values
    return m.eval()


def test_layout_by_hand():
    # prompt [5, 6], winner [1, 2, 3], loser [4, 7]: the row holds the prompt, the winner but its last
    # token and the loser but its last token; the loser's positions restart after the prompt
    layout = pack_pairs(right_pad([[5, 6]]), right_pad([[1, 2, 3]]), right_pad([[4, 7]], 3), pad_id=PAD)
    assert layout.tokens.tolist() == [[5, 6, 1, 2, 4]]
    assert layout.positions.tolist() == [[0, 1, 2, 3, 2]]
    assert layout.score_winner.tolist() == [[1, 2, 3]]  # w_0 by the prompt's last token, then w_0, w_1
    assert layout.score_loser.tolist()[0][:2] == [1, 4]  # l_0 by the prompt's last token, l_1 by l_0
    allowed = layout.mask[0, 0]
    assert allowed[4].tolist() == [True, True, False, False, True]  # the loser sees the prompt and itself
    assert allowed[3].tolist() == [True, True, True, True, False]  # the winner never sees the loser


@pytest.mark.parametrize("kind", ["transformer", "bigram"])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_shared_equals_separate_on_random_models(kind, seed):
    # prompts of 1..12 tokens, responses of 0..7 (empty ones too), padded wider than needed
    g = torch.Generator().manual_seed(100 + seed)
    prompts, winners, losers = random_rows(g, 9, 1, 12), random_rows(g, 9, 0, 7), random_rows(g, 9, 0, 7)
    model = random_model(seed, kind)
    got_w, got_l = shared_pair_logprobs(model, right_pad(prompts, 14), right_pad(winners, 9),
                                        right_pad(losers, 8), pad_id=PAD)
    want_w = torch.tensor([plain(model, p, w) for p, w in zip(prompts, winners, strict=True)])
    want_l = torch.tensor([plain(model, p, y) for p, y in zip(prompts, losers, strict=True)])
    torch.testing.assert_close(got_w, want_w, atol=1e-5, rtol=0)
    torch.testing.assert_close(got_l, want_l, atol=1e-5, rtol=0)


def test_policy_and_whole_dataset_pass_equal_separate_scoring():
    # the policy's pair scoring (with its length split) and the chunked dataset pass give, winners then
    # losers, what scoring the two concatenated along the batch gives
    g = torch.Generator().manual_seed(7)
    prompts, winners, losers = random_rows(g, 40, 1, 20), random_rows(g, 40, 1, 3), random_rows(g, 40, 1, 3)
    winners[5], losers[30] = list(range(1, 15)), list(range(2, 16))  # two long responses: the batch splits
    model = random_model(3)
    prompt, winner, loser = right_pad(prompts), right_pad(winners, 14), right_pad(losers, 14)
    separate = batched_logprobs(model, torch.cat([prompt, prompt]), torch.cat([winner, loser]), pad_id=PAD)
    policy = SequencePolicy(model, pad_id=PAD)
    with torch.no_grad():
        torch.testing.assert_close(policy.logprobs(prompt, winner, loser), separate, atol=1e-5, rtol=0)
    torch.testing.assert_close(batched_pair_logprobs(model, prompt, winner, loser, pad_id=PAD, batch_size=16),
                               separate, atol=1e-5, rtol=0)


def test_gradients_equal_separate_scoring():
    g = torch.Generator().manual_seed(11)
    prompt, winner, loser = (right_pad(random_rows(g, 6, lo, hi)) for lo, hi in ((3, 9), (1, 4), (1, 4)))
    width = max(winner.shape[1], loser.shape[1])
    winner, loser = (torch.nn.functional.pad(t, (0, width - t.shape[1]), value=PAD) for t in (winner, loser))
    grads = []
    for shared in (True, False):
        model = random_model(4).train()
        policy = SequencePolicy(model, pad_id=PAD)
        logp = policy.logprobs(prompt, winner, loser) if shared else \
            policy.logprobs(torch.cat([prompt, prompt]), torch.cat([winner, loser]))
        (logp * torch.linspace(-1, 1, len(logp))).sum().backward()
        grads.append(torch.cat([p.grad.flatten() for p in model.parameters()]))
    torch.testing.assert_close(grads[0], grads[1], atol=1e-4, rtol=1e-4)


def test_training_with_and_without_sharing_ends_at_the_same_loss():
    # the same steps from the same start: the runs differ by rounding only
    g = torch.Generator().manual_seed(5)
    prompts, winners, losers = random_rows(g, 64, 4, 12), random_rows(g, 64, 1, 4), random_rows(g, 64, 1, 4)
    prompt, winner, loser = right_pad(prompts), right_pad(winners, 4), right_pad(losers, 4)
    reference = random_model(9)
    ref = batched_logprobs(reference, torch.cat([prompt, prompt]), torch.cat([winner, loser]), pad_id=PAD)
    pairs = PairSet(prompt, winner, loser, *ref.chunk(2))
    finals = []
    for shared in (True, False):
        policy = SequencePolicy(TinyTransformer(V, context=16, width=16, layers=2, heads=2, seed=1), pad_id=PAD)
        result = train(policy, pairs, losses.resolve_margin("logistic"),
                       TrainSettings(beta=0.5, steps=20, batch_size=16, progress=False, optim=OptimConfig(lr=1e-2),
                                     log_every=1, share_prompt=shared))
        finals.append([r["loss"] for r in result.history])
    assert finals[0][-1] < finals[0][0]  # it trained
    torch.testing.assert_close(torch.tensor(finals[0]), torch.tensor(finals[1]), atol=1e-4, rtol=0)


def test_reference_cache_keeps_the_method_apart(tmp_path):
    g = torch.Generator().manual_seed(2)
    prompt, winner, loser = (right_pad(random_rows(g, 5, 1, 6), 6) for _ in range(3))
    model = random_model(5)
    shared, reused = reference_pair_logprobs(model, prompt, winner, loser, pad_id=PAD, path=tmp_path / "ref.pt")
    assert not reused
    separate, reused = reference_pair_logprobs(model, prompt, winner, loser, pad_id=PAD, path=tmp_path / "ref.pt",
                                               share_prompt=False)
    assert not reused  # another method of scoring: recomputed, not read back
    torch.testing.assert_close(shared, separate, atol=1e-5, rtol=0)
    again, reused = reference_pair_logprobs(model, prompt, winner, loser, pad_id=PAD, path=tmp_path / "ref.pt",
                                            share_prompt=False)
    assert reused and torch.equal(again, separate)


def test_a_model_without_the_layout_refuses_a_shared_pass():
    class Plain(torch.nn.Module):  # a forward of tokens only, as a transformers model behind polopt.models.local_lm
        def __init__(self):
            super().__init__()
            self.inner = random_model(0)

        def forward(self, tokens):
            return self.inner(tokens)

    policy = SequencePolicy(Plain(), pad_id=PAD)
    assert not policy.shares_prompt
    with pytest.raises(ValueError, match="train.share_prompt=true needs a model that takes positions"):
        policy.logprobs(right_pad([[1]]), right_pad([[2]]), right_pad([[3]]))
