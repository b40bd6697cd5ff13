"""Shared-prompt scoring of transformers causal LMs through the key/value cache
(polopt/models/prefix_scoring.py) against transformers itself.

The reference point is each (prompt, response) scored on its own, unpadded, by the transformers
model's own forward, summing ``log_softmax(logits)[next token]`` over the response (the chain rule);
values and the gradients of every parameter must agree to 1e-5 in float32. The models are tiny,
random, built here (a Llama-shaped and a GPT-2-shaped one), with weights drawn wide
(``initializer_range``) so that logits are far from uniform and a token that sees the wrong
context or position changes the values well beyond the tolerance.
"""

from __future__ import annotations

import os

import pytest
import torch

os.environ["HF_HUB_OFFLINE"] = "1"
transformers = pytest.importorskip("transformers")

from polopt.models import prefix_scoring  # noqa: E402
from polopt.models.prefix_scoring import (  # noqa: E402
    prompt_cached_pair_logprobs,
    prompt_share,
    separate_pair_logprobs,
)

PAD = -1  # the text path's pad id: outside every vocabulary
V = 23


def tiny_model(kind: str, seed: int = 0):
    torch.manual_seed(seed)
    if kind == "llama":
        config = transformers.LlamaConfig(vocab_size=V, hidden_size=32, intermediate_size=48, num_hidden_layers=2,
                                          num_attention_heads=4, num_key_value_heads=2, max_position_embeddings=64,
                                          initializer_range=0.3)
        model = transformers.LlamaForCausalLM(config)
    else:
        config = transformers.GPT2Config(vocab_size=V, n_embd=32, n_layer=2, n_head=4, n_positions=64,
                                         initializer_range=0.3)
        model = transformers.GPT2LMHeadModel(config)
    return model.float().eval()  # eval: no dropout, so both ways see the same function


def plain(model, prompt: list[int], response: list[int]) -> torch.Tensor:
    """log pi(response | prompt) of one unpadded row, by the model's own forward (with gradients)."""
    if not response:
        return torch.zeros(())
    logits = model(input_ids=torch.tensor([prompt + response])).logits[0]  # (T, V)
    logp = torch.log_softmax(logits, dim=-1)  # (T, V)
    return sum(logp[len(prompt) - 1 + t, token] for t, token in enumerate(response))


def rows(g: torch.Generator, n: int, low: int, high: int) -> list[list[int]]:
    sizes = torch.randint(low, high + 1, (n,), generator=g)
    return [torch.randint(0, V, (int(k),), generator=g).tolist() for k in sizes]


def right_pad(batch: list[list[int]], width: int) -> torch.Tensor:
    return torch.tensor([r + [PAD] * (width - len(r)) for r in batch])


def assert_same_gradients(got: dict, want: dict) -> None:
    """Equal to 1e-5 relative to each tensor's largest gradient (float32 sums over some 30 positions, in
    another order: rounding of about 1e-6 of the scale; the wide weights give gradients of up to ~30)."""
    assert set(got) == set(want)
    for name, w in want.items():
        scale = max(1.0, float(w.abs().max()))
        assert float((got[name] - w).abs().max()) <= 1e-5 * scale, name


def grads(model) -> dict[str, torch.Tensor]:
    out = {n: p.grad.clone() for n, p in model.named_parameters() if p.grad is not None}
    model.zero_grad()
    return out


@pytest.mark.parametrize("kind", ["llama", "gpt2"])
@pytest.mark.parametrize("seed", [0, 1])
def test_values_and_gradients_equal_separate_scoring(kind, seed):
    # prompts of 1..11 tokens, responses of 0..6 (empty ones too), each padded wider than it needs
    g = torch.Generator().manual_seed(10 + seed)
    prompts, winners, losers = rows(g, 7, 1, 11), rows(g, 7, 0, 6), rows(g, 7, 0, 6)
    weight_w, weight_l = torch.randn(7, generator=g), torch.randn(7, generator=g)  # any loss of both
    model = tiny_model(kind, seed)

    want_w = torch.stack([plain(model, p, y) for p, y in zip(prompts, winners, strict=True)])
    want_l = torch.stack([plain(model, p, y) for p, y in zip(prompts, losers, strict=True)])
    ((weight_w * want_w).sum() + (weight_l * want_l).sum()).backward()
    want_grads = grads(model)

    got_w, got_l = prompt_cached_pair_logprobs(model, right_pad(prompts, 13), right_pad(winners, 8),
                                               right_pad(losers, 7), pad_id=PAD)
    ((weight_w * got_w).sum() + (weight_l * got_l).sum()).backward()
    got_grads = grads(model)

    assert got_w.shape == got_l.shape == (7,)
    torch.testing.assert_close(got_w, want_w.detach(), atol=1e-5, rtol=0)
    torch.testing.assert_close(got_l, want_l.detach(), atol=1e-5, rtol=0)
    assert_same_gradients(got_grads, want_grads)


@pytest.mark.parametrize("kind", ["llama", "gpt2"])
def test_equals_the_separate_baseline_and_without_logits_to_keep(kind, monkeypatch):
    # the bench's baseline (one padded pass of [x, y_w] and [x, y_l] rows) agrees too, and so does the
    # path for models whose forward takes no logits_to_keep (all prompt logits, the last one picked)
    g = torch.Generator().manual_seed(3)
    prompts, winners, losers = rows(g, 5, 2, 9), rows(g, 5, 1, 5), rows(g, 5, 1, 5)
    p, w, lo = right_pad(prompts, 9), right_pad(winners, 5), right_pad(losers, 6)
    model = tiny_model(kind)
    with torch.no_grad():
        base_w, base_l = separate_pair_logprobs(model, p, w, lo, pad_id=PAD)
        got = prompt_cached_pair_logprobs(model, p, w, lo, pad_id=PAD)
        keywords = prefix_scoring._forward_keywords(model)
        monkeypatch.setattr(prefix_scoring, "_forward_keywords", lambda m: keywords - {"logits_to_keep"})
        full = prompt_cached_pair_logprobs(model, p, w, lo, pad_id=PAD)
    for a, b in ((got[0], base_w), (got[1], base_l), (full[0], base_w), (full[1], base_l)):
        torch.testing.assert_close(a, b, atol=1e-5, rtol=0)


def test_one_token_responses_need_no_continuation():
    # every response a single token (or none): the prompt pass alone scores them
    g = torch.Generator().manual_seed(4)
    prompts = rows(g, 4, 1, 6)
    winners, losers = [[3], [], [5], [7]], [[1], [2], [], [9]]
    model = tiny_model("llama")
    with torch.no_grad():
        got_w, got_l = prompt_cached_pair_logprobs(model, right_pad(prompts, 6), right_pad(winners, 1),
                                                   right_pad(losers, 2), pad_id=PAD)
        want_w = torch.stack([plain(model, p, y) for p, y in zip(prompts, winners, strict=True)])
        want_l = torch.stack([plain(model, p, y) for p, y in zip(prompts, losers, strict=True)])
    torch.testing.assert_close(got_w, want_w, atol=1e-5, rtol=0)
    torch.testing.assert_close(got_l, want_l, atol=1e-5, rtol=0)


def test_a_lora_model_is_scored_the_same_way():
    peft = pytest.importorskip("peft")
    g = torch.Generator().manual_seed(5)
    prompts, winners, losers = rows(g, 4, 1, 8), rows(g, 4, 1, 5), rows(g, 4, 0, 5)
    lora = peft.LoraConfig(r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"], init_lora_weights=False)
    model = peft.get_peft_model(tiny_model("llama"), lora).eval()
    got_w, got_l = prompt_cached_pair_logprobs(model, right_pad(prompts, 8), right_pad(winners, 5),
                                               right_pad(losers, 5), pad_id=PAD)
    (got_w.sum() - got_l.sum()).backward()
    got_grads = grads(model)
    want_w = torch.stack([plain(model, p, y) for p, y in zip(prompts, winners, strict=True)])
    want_l = torch.stack([plain(model, p, y) for p, y in zip(prompts, losers, strict=True)])
    (want_w.sum() - want_l.sum()).backward()
    want_grads = grads(model)
    torch.testing.assert_close(got_w, want_w.detach(), atol=1e-5, rtol=0)
    torch.testing.assert_close(got_l, want_l.detach(), atol=1e-5, rtol=0)
    assert all("lora_" in n for n in got_grads)  # only the adapter trains
    assert_same_gradients(got_grads, want_grads)


def test_bad_input_is_one_line():
    model = tiny_model("llama")
    with pytest.raises(ValueError, match=r"^every prompt needs at least one token"):
        prompt_cached_pair_logprobs(model, right_pad([[1], []], 1), right_pad([[2], [3]], 1),
                                    right_pad([[2], [3]], 1), pad_id=PAD)
    with pytest.raises(ValueError, match=r"^prompt, winner and loser batches differ: 2, 1 and 2 rows"):
        prompt_cached_pair_logprobs(model, right_pad([[1], [2]], 1), right_pad([[2]], 1),
                                    right_pad([[2], [3]], 1), pad_id=PAD)


def test_prompt_share_counts_real_tokens():
    # prompts of 4 and 2 tokens, responses 1 + 3 and 2 + 0: 6 of 2 * 6 + 6 = 18 positions are a second prompt copy
    p, w, lo = right_pad([[1, 2, 3, 4], [5, 6]], 4), right_pad([[1], [2, 3]], 2), right_pad([[1, 2, 3], []], 3)
    assert prompt_share(p, w, lo, pad_id=PAD) == pytest.approx(6 / 18)
