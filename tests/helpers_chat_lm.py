"""A tiny Llama-shaped causal LM with a word-level tokenizer and a chat template, built and saved in a test.

Nothing is downloaded: the tokenizer is the ``tokenizers`` library's WordLevel model over invented words,
wrapped in ``transformers.PreTrainedTokenizerFast`` with a Jinja chat template written here; the model
is a random ``LlamaForCausalLM`` (2 layers, width 32). Both are written with ``save_pretrained``.
"""

from __future__ import annotations

from pathlib import Path

import torch
import transformers
from tokenizers import Tokenizer, models, pre_tokenizers, processors

SPECIALS = ["<unk>", "<pad>", "<bos>", "<eos>"]
WORDS = ["<user>", "<assistant>", "<system>", "amber", "brook", "cedar", "dune", "ember", "fern", "grove", "harbor",
         "isle", "juniper", "kestrel", "loom", "meadow", "north", "the", "a", "is", "by", "?", "."]
# each message as "<role> content <eos>", then "<assistant>" when a reply is wanted
CHAT_TEMPLATE = ("{% for m in messages %}<{{ m['role'] }}> {{ m['content'] }} <eos> {% endfor %}"
                 "{% if add_generation_prompt %}<assistant> {% endif %}")


def tokenizer() -> transformers.PreTrainedTokenizerFast:
    vocab = {w: i for i, w in enumerate(SPECIALS + WORDS)}
    tok = Tokenizer(models.WordLevel(vocab, unk_token="<unk>"))
    tok.pre_tokenizer = pre_tokenizers.WhitespaceSplit()
    tok.post_processor = processors.TemplateProcessing(single="<bos> $A", special_tokens=[("<bos>", 2)])
    fast = transformers.PreTrainedTokenizerFast(tokenizer_object=tok, unk_token="<unk>", pad_token="<pad>",
                                                bos_token="<bos>", eos_token="<eos>")
    fast.chat_template = CHAT_TEMPLATE
    return fast


def llama(seed: int = 0) -> transformers.LlamaForCausalLM:
    torch.manual_seed(seed)
    config = transformers.LlamaConfig(vocab_size=len(SPECIALS) + len(WORDS), hidden_size=32, intermediate_size=64,
                                      num_hidden_layers=2, num_attention_heads=4, num_key_value_heads=2,
                                      max_position_embeddings=128, bos_token_id=2, eos_token_id=3, pad_token_id=1)
    return transformers.LlamaForCausalLM(config).eval()


def save(model, directory: Path, *, with_tokenizer: bool = True) -> Path:
    model.save_pretrained(directory)
    if with_tokenizer:
        tokenizer().save_pretrained(directory)
    return directory


def constant_state(model) -> torch.Tensor:
    """Make every position's last hidden state the same vector and return it: all embedding rows equal,
    the attention and MLP outputs zero, so the residual stream is one embedding, normalised."""
    with torch.no_grad():
        model.model.embed_tokens.weight.copy_(model.model.embed_tokens.weight[5].expand_as(
            model.model.embed_tokens.weight))
        for layer in model.model.layers:
            layer.self_attn.o_proj.weight.zero_()
            layer.mlp.down_proj.weight.zero_()
        return model.model.norm(model.model.embed_tokens.weight[:1])[0]  # (width,)


def set_logits(model, state: torch.Tensor, ids: list[int], logit: float) -> None:
    """Rows ``ids`` of the output layer so that their logit is ``logit`` at every position."""
    with torch.no_grad():
        for i in ids:
            model.lm_head.weight[i] = logit * state / state.dot(state)
