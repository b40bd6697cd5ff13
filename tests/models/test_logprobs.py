"""Sequence log-probabilities (polopt.models.logprobs): masking, padding, batch order, one pass.

The reference point is the chain rule computed the plain way: one example at a
time, no padding, a Python loop over the response tokens adding
``log_softmax(logits)[next token]`` (torch's log_softmax).
"""

import pytest
import torch

from polopt.models.logprobs import (
    SequencePolicy,
    batched_logprobs,
    pack,
    real_tokens,
    sequence_logprobs,
    token_logprobs,
)
from polopt.models.transformer import BigramTable, TinyTransformer

PAD = 9
V, V_OUT = 10, 5  # outputs 0..4 (what responses hold); prompt tokens 5..8; padding 9



@pytest.fixture(scope="module")
def model():
    m = TinyTransformer(V, output_size=V_OUT, context=12, width=16, layers=2, heads=2, seed=0)
    with torch.no_grad():
        m.head.weight.mul_(20)  # logits far from uniform, so mistakes show
    return m.eval()


def right_pad(rows, width):
    return torch.tensor([r + [PAD] * (width - len(r)) for r in rows])


PROMPTS = [[5], [6, 7], [8, 5, 6], [7]]
RESPONSES = [[0, 1, 2], [4], [], [3, 3, 1, 0, 2]]


def plain_loop(model, prompts, responses):
    """The chain rule, one unpadded example at a time."""
    out = []
    for prompt, response in zip(prompts, responses, strict=True):
        seq = torch.tensor([prompt + response])
        with torch.no_grad():
            logits = model(seq[:, :-1])[0] if seq.shape[1] > 1 else None
        total = 0.0
        for t, token in enumerate(response):
            position = len(prompt) - 1 + t  # the logits at the previous token score this one
            total += float(torch.log_softmax(logits[position], dim=-1)[token])
        out.append(total)
    return torch.tensor(out)


def test_pack_by_hand():
    tokens, mask = pack(right_pad([[5], [6, 7]], 3), right_pad([[0, 1], [2]], 4), pad_id=PAD)
    assert tokens.tolist() == [[5, 0, 1], [6, 7, 2]]  # trimmed to the longest row, 3 tokens
    assert mask.tolist() == [[False, True, True], [False, False, True]]


def test_matches_plain_loop(model):
    batched = sequence_logprobs(model, right_pad(PROMPTS, 3), right_pad(RESPONSES, 5), pad_id=PAD)
    torch.testing.assert_close(batched, plain_loop(model, PROMPTS, RESPONSES), atol=1e-5, rtol=0)
    assert batched[2] == 0.0  # the empty response: log 1


def test_padding_does_not_change_logprobs(model):
    base = sequence_logprobs(model, right_pad(PROMPTS, 3), right_pad(RESPONSES, 5), pad_id=PAD)
    wider = sequence_logprobs(model, right_pad(PROMPTS, 6), right_pad(RESPONSES, 7), pad_id=PAD)
    torch.testing.assert_close(wider, base, atol=1e-6, rtol=0)
    alone = sequence_logprobs(model, right_pad(PROMPTS[1:2], 2), right_pad(RESPONSES[1:2], 1), pad_id=PAD)
    torch.testing.assert_close(alone, base[1:2], atol=1e-6, rtol=0)


def test_batch_order_does_not_change_logprobs(model):
    base = sequence_logprobs(model, right_pad(PROMPTS, 3), right_pad(RESPONSES, 5), pad_id=PAD)
    order = [2, 0, 3, 1]
    shuffled = sequence_logprobs(model, right_pad([PROMPTS[i] for i in order], 3),
                                 right_pad([RESPONSES[i] for i in order], 5), pad_id=PAD)
    torch.testing.assert_close(shuffled, base[order], atol=1e-6, rtol=0)


def test_per_token_masked_and_summing(model):
    tokens, mask = pack(right_pad(PROMPTS, 3), right_pad(RESPONSES, 5), pad_id=PAD)
    per_token = token_logprobs(model, tokens, mask)
    assert per_token.shape == (4, tokens.shape[1] - 1)
    assert torch.all(per_token[~mask[:, 1:]] == 0)  # prompt and padding positions carry nothing
    assert torch.all(per_token[mask[:, 1:]] < 0)
    torch.testing.assert_close(per_token.sum(1), plain_loop(model, PROMPTS, RESPONSES), atol=1e-5, rtol=0)


def test_winners_and_losers_in_one_pass(model):
    policy = SequencePolicy(model, pad_id=PAD)
    prompt = right_pad(PROMPTS, 3)
    winner, loser = right_pad(RESPONSES, 5), right_pad([[1], [0, 0], [2, 2, 2], []], 5)
    both = policy.logprobs(torch.cat([prompt, prompt]), torch.cat([winner, loser]))
    first, second = both.chunk(2)
    torch.testing.assert_close(first, policy.logprobs(prompt, winner), atol=1e-6, rtol=0)
    torch.testing.assert_close(second, policy.logprobs(prompt, loser), atol=1e-6, rtol=0)


def test_chunked_whole_dataset_pass_matches_plain_loop(model):
    # many short rows and two long ones: the chunk that holds them is split in two passes,
    # and the values come back in the dataset's order
    g = torch.Generator().manual_seed(3)
    prompts = [[5 + int(torch.randint(0, 4, (), generator=g))] for _ in range(20)]
    responses = [torch.randint(0, V_OUT, (int(n),), generator=g).tolist()
                 for n in torch.randint(0, 3, (20,), generator=g)]
    responses[4], responses[17] = [1, 2, 3, 4, 0, 1, 2, 3, 4, 0], [4, 3, 2, 1, 0, 4, 3, 2, 1]
    got = batched_logprobs(model, right_pad(prompts, 1), right_pad(responses, 10), pad_id=PAD, batch_size=16)
    torch.testing.assert_close(got, plain_loop(model, prompts, responses), atol=1e-5, rtol=0)


def test_bigram_matches_plain_loop():
    m = BigramTable(V, output_size=V_OUT, context=12)
    with torch.no_grad():
        m.table.normal_(generator=torch.Generator().manual_seed(1))
    batched = sequence_logprobs(m, right_pad(PROMPTS, 3), right_pad(RESPONSES, 5), pad_id=PAD)
    torch.testing.assert_close(batched, plain_loop(m, PROMPTS, RESPONSES), atol=1e-5, rtol=0)


def test_real_tokens():
    assert real_tokens(right_pad(PROMPTS, 3), right_pad(RESPONSES, 5), pad_id=PAD).tolist() == [4, 3, 3, 6]


def test_errors(model):
    with pytest.raises(ValueError, match="every prompt needs at least one token"):
        sequence_logprobs(model, right_pad([[], [5]], 2), right_pad([[0], [1]], 1), pad_id=PAD)
    with pytest.raises(ValueError, match="prompt and response batches differ: 2 and 1 rows"):
        pack(right_pad([[5], [5]], 1), right_pad([[0]], 1), pad_id=PAD)
