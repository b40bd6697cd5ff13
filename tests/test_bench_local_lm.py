"""bench/local_lm.py's pieces on a tiny model: the lean separate scoring agrees with the plain one and with
the shared one, the invented pairs have the stated lengths, and the token count is the trainer's. No timing
is asserted (benches print figures, they never pass or fail)."""

from __future__ import annotations

import pytest
import torch

transformers = pytest.importorskip("transformers")

from bench import local_lm  # noqa: E402


def test_the_three_scorings_agree_on_a_tiny_model(monkeypatch):
    monkeypatch.setitem(local_lm.SHAPE, "vocab_size", 40)
    torch.manual_seed(0)
    config = transformers.LlamaConfig(vocab_size=40, hidden_size=32, intermediate_size=48, num_hidden_layers=2,
                                      num_attention_heads=4, max_position_embeddings=64, initializer_range=0.3)
    model = transformers.LlamaForCausalLM(config).eval()
    batch = local_lm.invented_pairs(5, prompt=16, response=6, seed=1)
    with torch.no_grad():
        got = {name: torch.cat(score(model, **batch, pad_id=local_lm.PAD)) for name, score in local_lm.SCORERS.items()}
    torch.testing.assert_close(got["separate-lean"], got["separate"], atol=1e-5, rtol=0)
    torch.testing.assert_close(got["shared"], got["separate"], atol=1e-5, rtol=0)


def test_invented_pairs_and_their_token_count():
    batch = local_lm.invented_pairs(50, prompt=20, response=8, seed=2)
    n = {k: (v != local_lm.PAD).sum(dim=1) for k, v in batch.items()}
    assert int(n["prompt"].min()) >= 15 and int(n["prompt"].max()) <= 20  # 3/4 of 20 rounded down, to 20
    for side in ("winner", "loser"):
        assert int(n[side].min()) >= 4 and int(n[side].max()) <= 8
    for v in batch.values():  # right padding: no real token after a pad
        real = v != local_lm.PAD
        assert bool((real.cummin(dim=1).values == real).all())
    # prompt with winner plus prompt with loser, padding excluded
    assert local_lm.real_tokens(batch) == int(2 * n["prompt"].sum() + n["winner"].sum() + n["loser"].sum())
