"""A tiny randomly initialised causal LM, its tokenizer and invented pairs, to try ``model=local_lm`` in seconds.

The model knows nothing (random weights); it is there so that every command of docs/your-own-model.md runs
as written on any machine, with nothing downloaded. The scenario is invented: a fictional ferry desk on the
island of Wickmoor (it does not exist) answers travellers' questions, and for each question one reply is
more helpful (the winner) than the other (the loser).

    python examples/tiny_local_lm.py OUT_DIR [--seed 0]

writes ``OUT_DIR/model/`` (a 2-layer Llama-shaped model and a word-level tokenizer with a chat template,
by ``save_pretrained``), ``OUT_DIR/pairs.jsonl`` (plain rows and chat rows: lists of role/content
messages) and ``OUT_DIR/sft.jsonl`` (prompt/response examples for ``polopt sft``). Needs the ``local-lm``
extra (transformers, tokenizers).
"""

from __future__ import annotations

import argparse
import json
import random
from pathlib import Path

QUESTIONS = [("when does the {boat} leave", "the {boat} leaves at {hour} from pier {pier} .", "soon ."),
             ("how much is a ticket to {place}", "a ticket to {place} costs {price} tokens at the kiosk .",
              "it depends ."),
             ("can i bring a bicycle to {place}", "yes , bicycles ride free on the {boat} to {place} .", "maybe ."),
             ("is the {boat} running today", "the {boat} runs today , first sailing at {hour} .", "ask later .")]
FILL = {"boat": ["heron", "puffin", "otter"], "place": ["wickmoor", "saltby", "greyhaven"],
        "hour": ["seven", "nine", "noon"], "pier": ["one", "two", "three"], "price": ["four", "six", "ten"]}
SPECIALS = ["<unk>", "<pad>", "<s>", "</s>", "<|user|>", "<|assistant|>", "<|system|>"]
# every message as "<|role|> content", an assistant turn closed by </s>; the generation prompt opens one
TEMPLATE = ("{% for m in messages %}<|{{ m['role'] }}|> {{ m['content'] }} "
            "{% if m['role'] == 'assistant' %}</s> {% endif %}{% endfor %}"
            "{% if add_generation_prompt %}<|assistant|> {% endif %}")
SYSTEM = "you answer for the wickmoor ferry desk ."


def rows(seed: int, n: int = 24) -> list[dict]:
    """``n`` invented pairs; every third a chat row (a system message, then the question)."""
    rng = random.Random(seed)
    out, seen = [], set()
    while len(out) < n:
        question, good, bad = rng.choice(QUESTIONS)
        fill = {key: rng.choice(values) for key, values in FILL.items()}
        prompt, winner = question.format(**fill) + " ?", good.format(**fill)
        if (prompt, winner) in seen:
            continue  # every pair once
        seen.add((prompt, winner))
        k = len(out)
        if k % 3 == 2:
            prompt = [{"role": "system", "content": SYSTEM}, {"role": "user", "content": prompt}]
            winner, bad = [{"role": "assistant", "content": winner}], [{"role": "assistant", "content": bad}]
        out.append({"prompt": prompt, "winner": winner, "loser": bad})
    return out


def vocabulary() -> list[str]:
    words = {w for q in QUESTIONS for text in q for w in text.split() if "{" not in w}
    words |= {w for values in FILL.values() for w in values} | set(SYSTEM.split()) | {"?"}
    return SPECIALS + sorted(words)


def save_model(directory: Path, seed: int) -> None:
    import tokenizers
    import torch
    import transformers

    vocab = {w: i for i, w in enumerate(vocabulary())}
    tok = tokenizers.Tokenizer(tokenizers.models.WordLevel(vocab, unk_token="<unk>"))
    tok.pre_tokenizer = tokenizers.pre_tokenizers.WhitespaceSplit()
    tok.post_processor = tokenizers.processors.TemplateProcessing(single="<s> $A", special_tokens=[("<s>", 2)])
    fast = transformers.PreTrainedTokenizerFast(tokenizer_object=tok, unk_token="<unk>", pad_token="<pad>",
                                                bos_token="<s>", eos_token="</s>")
    fast.chat_template = TEMPLATE
    config = transformers.LlamaConfig(vocab_size=len(vocab), hidden_size=64, intermediate_size=128,
                                      num_hidden_layers=2, num_attention_heads=4, num_key_value_heads=2,
                                      max_position_embeddings=128, bos_token_id=2, eos_token_id=3, pad_token_id=1)
    torch.manual_seed(seed)
    transformers.LlamaForCausalLM(config).save_pretrained(directory)
    fast.save_pretrained(directory)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("out", type=Path)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    args.out.mkdir(parents=True, exist_ok=True)
    save_model(args.out / "model", args.seed)
    pairs = rows(args.seed)
    (args.out / "pairs.jsonl").write_text("".join(json.dumps(r) + "\n" for r in pairs), encoding="utf-8")
    plain = [r for r in pairs if isinstance(r["prompt"], str)]
    (args.out / "sft.jsonl").write_text("".join(json.dumps({"prompt": r["prompt"], "response": r["winner"]}) + "\n"
                                                for r in plain), encoding="utf-8")
    print(f"wrote {args.out / 'model'}, {args.out / 'pairs.jsonl'} ({len(pairs)} pairs), {args.out / 'sft.jsonl'}")


if __name__ == "__main__":
    main()
