"""Tiny local causal LMs built in the test, for the ``model=local_lm`` tests: nothing is downloaded.

Two architectures (and Qwen2- and Mistral-shaped ones with the word tokenizer, :func:`save_shaped`), each
randomly initialised from a seed and saved with ``save_pretrained`` into a
temporary folder with its tokenizer:

- Llama-shaped (``LlamaForCausalLM``: rotary positions, grouped key/value heads, q/k/v/o projections), with
  a word-level tokenizer (the ``tokenizers`` library) that starts every plain text with ``<s>`` and a Jinja
  chat template written here;
- GPT-2-shaped (``GPT2LMHeadModel``: learned positions, one fused ``c_attn`` Conv1D), with a byte-level BPE
  tokenizer trained here on invented sentences, no special token added to a text and no chat template
  (message rows need ``task.chat_template=PATH``: :data:`TEMPLATE` written to a file).

:func:`direct_logprob` is the independent computation the trainer is held to: the convention of
:mod:`polopt.data.chat` written out with transformers' own calls, one unpadded row through
``model(ids).logits``, ``log_softmax`` gathered at the response tokens.
"""

from __future__ import annotations

import json
import os

import torch

os.environ["HF_HUB_OFFLINE"] = "1"

import tokenizers  # noqa: E402
import transformers  # noqa: E402

WORDS = ["blue", "green", "kettle", "lantern", "river", "stone", "quiet", "bright", "the", "a", "is", "near",
         "why", "where", "?", ".", "moss", "tide", "hums", "glows"]
SPECIALS = ["<unk>", "<pad>", "<s>", "</s>", "<|user|>", "<|assistant|>", "<|system|>", "<|bot|>"]
# every message as "<|role|> content", an assistant turn closed by </s>; the generation prompt opens one
TEMPLATE = ("{% for m in messages %}<|{{ m['role'] }}|> {{ m['content'] }} "
            "{% if m['role'] == 'assistant' %}</s> {% endif %}{% endfor %}"
            "{% if add_generation_prompt %}<|assistant|> {% endif %}")
# renders an assistant turn with another opening than its generation prompt: full text != prompt text + more
MISMATCHED_TEMPLATE = ("{% for m in messages %}{% if m['role'] == 'assistant' %}<|bot|> {{ m['content'] }} </s> "
                       "{% else %}<|{{ m['role'] }}|> {{ m['content'] }} {% endif %}{% endfor %}"
                       "{% if add_generation_prompt %}<|assistant|> {% endif %}")
CORPUS = ["where is the blue kettle ?", "the river is quiet near the stone .", "a lantern glows bright .",
          "moss hums near the tide .", "why is the green stone quiet ?"] * 4


def word_tokenizer() -> transformers.PreTrainedTokenizerFast:
    vocab = {w: i for i, w in enumerate(SPECIALS + WORDS)}
    tok = tokenizers.Tokenizer(tokenizers.models.WordLevel(vocab, unk_token="<unk>"))
    tok.pre_tokenizer = tokenizers.pre_tokenizers.WhitespaceSplit()
    tok.post_processor = tokenizers.processors.TemplateProcessing(single="<s> $A", special_tokens=[("<s>", 2)])
    fast = transformers.PreTrainedTokenizerFast(tokenizer_object=tok, unk_token="<unk>", pad_token="<pad>",
                                                bos_token="<s>", eos_token="</s>")
    fast.chat_template = TEMPLATE
    return fast


def bpe_tokenizer() -> transformers.PreTrainedTokenizerFast:
    tok = tokenizers.Tokenizer(tokenizers.models.BPE())
    tok.pre_tokenizer = tokenizers.pre_tokenizers.ByteLevel(add_prefix_space=False)
    tok.decoder = tokenizers.decoders.ByteLevel()
    trainer = tokenizers.trainers.BpeTrainer(vocab_size=300, special_tokens=["<|endoftext|>", *SPECIALS[4:]],
                                             initial_alphabet=tokenizers.pre_tokenizers.ByteLevel.alphabet(),
                                             show_progress=False)
    tok.train_from_iterator(CORPUS, trainer=trainer)
    return transformers.PreTrainedTokenizerFast(tokenizer_object=tok, eos_token="<|endoftext|>",
                                                bos_token="<|endoftext|>")


def save_llama(directory, *, seed: int = 0, positions: int = 64, tokenizer=True, vocab_size: int | None = None):
    """A 2-layer Llama-shaped model (width 32, 4 query and 2 key/value heads) and its word tokenizer."""
    tok = word_tokenizer()
    config = transformers.LlamaConfig(vocab_size=vocab_size or len(tok), hidden_size=32, intermediate_size=64,
                                      num_hidden_layers=2, num_attention_heads=4, num_key_value_heads=2,
                                      max_position_embeddings=positions, bos_token_id=2, eos_token_id=3,
                                      pad_token_id=1)
    torch.manual_seed(seed)
    transformers.LlamaForCausalLM(config).save_pretrained(directory)
    if tokenizer:
        tok.save_pretrained(directory)
    return directory


def save_shaped(directory, kind: str, *, seed: int = 0):
    """A 2-layer Qwen2- or Mistral-shaped model (``kind``: qwen2 | mistral) with the word tokenizer."""
    tok = word_tokenizer()
    shape = dict(vocab_size=len(tok), hidden_size=32, intermediate_size=64, num_hidden_layers=2,
                 num_attention_heads=4, num_key_value_heads=2, max_position_embeddings=64, bos_token_id=2,
                 eos_token_id=3, pad_token_id=1)
    config, model = {"qwen2": (transformers.Qwen2Config, transformers.Qwen2ForCausalLM),
                     "mistral": (transformers.MistralConfig, transformers.MistralForCausalLM)}[kind]
    torch.manual_seed(seed)
    model(config(**shape)).save_pretrained(directory)
    tok.save_pretrained(directory)
    return directory


def save_gpt2(directory, *, seed: int = 0, positions: int = 64):
    """A 2-layer GPT-2-shaped model (width 32, 2 heads) and its byte-level BPE tokenizer (no chat template)."""
    tok = bpe_tokenizer()
    config = transformers.GPT2Config(n_layer=2, n_head=2, n_embd=32, vocab_size=len(tok), n_positions=positions,
                                     bos_token_id=tok.eos_token_id, eos_token_id=tok.eos_token_id)
    torch.manual_seed(seed)
    transformers.GPT2LMHeadModel(config).save_pretrained(directory)
    tok.save_pretrained(directory)
    return directory


def write_pairs(path, rows: list[dict]):
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    return path


PLAIN_ROWS = [
    {"prompt": "where is the kettle ?", "winner": "near the river .", "loser": "blue"},
    {"prompt": "why is the river quiet ?", "winner": "the stone is quiet .", "loser": "a lantern glows"},
    {"prompt": "the stone", "winner": "hums near the tide .", "loser": "is green"},
    {"prompt": "a lantern is", "winner": "bright .", "loser": "quiet near a kettle ."},
]
CHAT_ROWS = [
    {"prompt": [{"role": "system", "content": "be quiet"}, {"role": "user", "content": "where is the moss ?"}],
     "winner": [{"role": "assistant", "content": "near the tide ."}],
     "loser": [{"role": "assistant", "content": "the kettle glows"}]},
    {"prompt": [{"role": "user", "content": "why is the lantern bright ?"}],
     "winner": "the lantern glows .", "loser": [{"role": "assistant", "content": "blue"}]},
    {"prompt": "is the river quiet ?", "winner": [{"role": "assistant", "content": "the river hums ."}],
     "loser": "a stone is green ."},
]


def as_messages(value, role: str) -> list[dict]:
    return value if isinstance(value, list) else [{"role": role, "content": value}]


def is_chat(row: dict) -> bool:
    """A chat row: any of its fields a message list (then its strings count as single messages)."""
    return any(isinstance(row[k], list) for k in ("prompt", "winner", "loser"))


def convention_ids(tokenizer, prompt, response, *, chat: bool) -> tuple[list[int], list[int]]:
    """The token convention of the issue, written out independently of polopt.data.chat."""
    if chat:
        messages = as_messages(prompt, "user")
        prompt_text = tokenizer.apply_chat_template(messages, add_generation_prompt=True, tokenize=False)
        full_text = tokenizer.apply_chat_template(messages + as_messages(response, "assistant"), tokenize=False)
        assert full_text.startswith(prompt_text)
        return (tokenizer(prompt_text, add_special_tokens=False)["input_ids"],
                tokenizer(full_text[len(prompt_text):], add_special_tokens=False)["input_ids"])
    return (tokenizer(prompt)["input_ids"],
            tokenizer(response, add_special_tokens=False)["input_ids"] + [tokenizer.eos_token_id])


@torch.no_grad()
def direct_logprob(model, tokenizer, row: dict, side: str) -> float:
    """log pi(row[side] | row["prompt"]): one unpadded row, ``model(ids).logits`` log-softmaxed and gathered."""
    p, r = convention_ids(tokenizer, row["prompt"], row[side], chat=is_chat(row))
    ids = torch.tensor([p + r])  # (1, T)
    logp = torch.log_softmax(model(ids).logits[0].double(), dim=-1)  # (T, V)
    scoring = torch.arange(len(p) - 1, len(p) + len(r) - 1)  # position t scores token t + 1
    return float(logp[scoring, torch.tensor(r)].sum())
