"""Sequence models (polopt.models.transformer): shapes, causality, seeds, bf16, initialising from a reference."""

import pytest
import torch

from polopt.models.logprobs import sequence_logprobs
from polopt.models.transformer import BigramTable, TinyTransformer, build_model, copy_weights

V, V_OUT = 7, 4



def tokens(b=3, t=6, seed=0):
    return torch.randint(0, V, (b, t), generator=torch.Generator().manual_seed(seed))


class TestTinyTransformer:
    def test_shape(self):
        model = TinyTransformer(V, output_size=V_OUT, context=8, width=16, layers=2, heads=4)
        assert model(tokens()).shape == (3, 6, V_OUT)

    def test_causal(self):
        # the definition of a causal model: logits at t depend on tokens 0..t only
        # (Vaswani et al. 2017, the decoder's masked self-attention)
        model = TinyTransformer(V, output_size=V_OUT, context=8, width=16, layers=2, heads=2)
        x = tokens()
        y = x.clone()
        y[:, 4] = (y[:, 4] + 1) % V
        with torch.no_grad():
            a, b = model(x), model(y)
        torch.testing.assert_close(a[:, :4], b[:, :4])
        assert not torch.allclose(a[:, 4:], b[:, 4:])

    def test_seeded(self):
        a = TinyTransformer(V, context=8, width=16, seed=3).state_dict()
        b = TinyTransformer(V, context=8, width=16, seed=3).state_dict()
        c = TinyTransformer(V, context=8, width=16, seed=4).state_dict()
        assert all(torch.equal(a[k], b[k]) for k in a)
        assert not torch.equal(a["token_embedding.weight"], c["token_embedding.weight"])

    def test_seed_leaves_global_generator_alone(self):
        torch.manual_seed(0)
        expected = torch.rand(3)
        torch.manual_seed(0)
        TinyTransformer(V, context=8, width=16, seed=5)
        torch.testing.assert_close(torch.rand(3), expected)

    def test_bf16_autocast_close_to_fp32(self):
        # bfloat16 keeps 8 bits of mantissa: relative error ~ 2^-8 per product (IEEE-style
        # rounding); summed log-probs of 6 tokens should agree within a few hundredths
        model = TinyTransformer(V, output_size=V_OUT, context=8, width=32, layers=2, heads=2, seed=1)
        with torch.no_grad():
            model.head.weight.mul_(10)  # non-trivial logits
        prompt = torch.tensor([[4], [5], [4]])
        response = torch.tensor([[0, 1, 2, 3], [1, 1, 0, 6], [3, 6, 6, 6]])
        fp32 = sequence_logprobs(model, prompt, response, pad_id=6)
        with torch.autocast("cpu", dtype=torch.bfloat16):
            bf16 = sequence_logprobs(model, prompt, response, pad_id=6)
        assert bf16.dtype == torch.float32  # the log-softmax runs in float32 under autocast
        torch.testing.assert_close(bf16, fp32, atol=5e-2, rtol=0)
        with torch.autocast("cpu", dtype=torch.bfloat16):
            sequence_logprobs(model, prompt, response, pad_id=6).sum().backward()
        assert all(torch.isfinite(p.grad).all() for p in model.parameters() if p.grad is not None)

    def test_errors(self):
        with pytest.raises(ValueError, match="model.width must be a multiple of model.heads, got width=10, heads=4"):
            TinyTransformer(V, width=10, heads=4)
        with pytest.raises(ValueError, match="model.layers must be a positive integer, got 0"):
            TinyTransformer(V, layers=0)
        with pytest.raises(ValueError, match="model.context is 4 but a sequence has 6 input tokens"):
            TinyTransformer(V, context=4, width=16)(tokens())


class TestBigramTable:
    def test_matches_its_definition(self):
        model = BigramTable(V, output_size=V_OUT, context=8)
        with torch.no_grad():
            model.table.normal_(generator=torch.Generator().manual_seed(0))
        x = tokens()
        out = model(x)
        for b in range(x.shape[0]):  # logits[b, t] = table[t, x[b, t]], by the class's definition
            for t in range(x.shape[1]):
                torch.testing.assert_close(out[b, t], model.table[t, x[b, t]])


def test_build_model_errors():
    with pytest.raises(ValueError, match="model.kind 'lstm' is not a sequence model; choose one of transformer, bigr"):
        build_model("lstm", vocab_size=V)


class TestCopyWeights:
    def test_longer_context_keeps_logprobs(self):
        source = TinyTransformer(V, output_size=V_OUT, context=6, width=16, seed=1)
        target = TinyTransformer(V, output_size=V_OUT, context=10, width=16, seed=2)
        copy_weights(target, source)
        x = tokens(t=6)
        with torch.no_grad():
            torch.testing.assert_close(target(x), source(x))

    def test_mismatch(self):
        source = TinyTransformer(V, context=6, width=16)
        with pytest.raises(ValueError, match=r"model.init=reference: the model's .* has shape"):
            copy_weights(TinyTransformer(V, context=6, width=32), source)
        with pytest.raises(ValueError, match="model.init=reference needs the model to have the reference's"):
            copy_weights(BigramTable(V, context=6), source)
