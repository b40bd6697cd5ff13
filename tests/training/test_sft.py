"""Supervised fine-tuning: the loss is the chain-rule cross-entropy, it falls, a tiny deterministic
text is memorised, and the reference checkpoint round-trips; ``polopt sft`` end to end."""

from __future__ import annotations

import json

import pytest
import torch

from polopt.commands.main import main
from polopt.data.encoding import SequenceIds
from polopt.data.tokenizer import ByteTokenizer
from polopt.models.logprobs import pack, sequence_logprobs, token_logprobs
from polopt.training.sft import (
    build_model,
    encode_examples,
    load_reference,
    next_token_loss,
    read_examples,
    save_reference,
    train_sft,
)

TOK = ByteTokenizer()
IDS = SequenceIds.for_tokenizer(TOK)


def test_byte_ids_are_the_tokenizers_own():
    assert (IDS.pad, IDS.bos, IDS.eos, IDS.vocab_size) == (256, 257, 258, 259)


def test_loss_is_minus_the_mean_log_likelihood_per_token():
    # chain rule: sum_t log pi(y_t | x, y_<t) = log pi(y | x), so mean CE = -sum_i log pi(y_i|x_i) / tokens
    prompt, response = encode_examples(TOK, [("hi", "there"), ("", "ab"), ("q?", "a longer one")], IDS)
    model = build_model(IDS, context=20, width=16, layers=1, heads=2, seed=1)
    tokens = int((response != IDS.pad).sum())
    with torch.no_grad():
        expected = -sequence_logprobs(model, prompt, response, pad_id=IDS.pad).sum() / tokens
        got = next_token_loss(model, prompt, response, pad_id=IDS.pad)
    assert float(got) == pytest.approx(float(expected), rel=1e-5)


def test_a_tiny_deterministic_text_is_memorised():
    # two fixed texts, no prompt: the only uncertainty left is which of the two starts (ln 2 nats once
    # per example; spread over its tokens that is ln2 / 7 = 0.099 nats per token at the optimum)
    examples = [("", "abcabc"), ("", "xyzxyz")]
    prompt, response = encode_examples(TOK, examples * 8, IDS)
    model = build_model(IDS, context=8, width=32, layers=1, heads=2, seed=0)
    result = train_sft(model, prompt, response, pad_id=IDS.pad, steps=150, lr=1e-2, batch_size=16, progress=False)
    losses = [h["loss"] for h in result.history]
    assert losses[-1] < losses[0] / 10
    # given the first symbol the rest is fixed: every later token is predicted with probability close to 1
    p, r = encode_examples(TOK, [("", "abcabc")], IDS)
    packed, mask = pack(p, r, pad_id=IDS.pad)
    with torch.no_grad():
        per_token = token_logprobs(model, packed, mask)[0, 1:7]  # after the first symbol: b c a b c <eos>
    assert float(-per_token.mean()) < 0.05
    assert float(losses[-1]) == pytest.approx(torch.log(torch.tensor(2.0)).item() / 7, abs=0.05)


def test_reference_checkpoint_round_trip(tmp_path):
    model = build_model(IDS, context=12, width=16, layers=1, heads=2, seed=4)
    arch = {"vocab_size": IDS.vocab_size, "context": 12, "width": 16, "layers": 1, "heads": 2}
    path = save_reference(tmp_path / "ref.pt", model, ids=IDS, tokenizer="byte", architecture=arch)
    loaded, meta = load_reference(path)
    x = torch.randint(0, 256, (3, 12))
    assert torch.equal(loaded(x), model(x)) and meta["ids"] == {"pad": 256, "bos": 257, "eos": 258}
    assert not any(p.requires_grad for p in loaded.parameters())
    torch.save({"something": 1}, tmp_path / "other.pt")
    with pytest.raises(ValueError, match=r"is not a reference checkpoint written by polopt sft"):
        load_reference(tmp_path / "other.pt")


def test_read_examples(tmp_path):
    (tmp_path / "a.txt").write_text("first line\n\nsecond\n", encoding="utf-8")
    assert read_examples(tmp_path / "a.txt") == [("", "first line"), ("", "second")]
    (tmp_path / "b.jsonl").write_text(json.dumps({"prompt": "p", "response": "r"}) + "\n"
                                      + json.dumps({"text": "t"}) + "\n", encoding="utf-8")
    assert read_examples(tmp_path / "b.jsonl") == [("p", "r"), ("", "t")]
    (tmp_path / "c.jsonl").write_text('{"prompt": "p", "response": "r"}\n{"prompt": \n', encoding="utf-8")
    with pytest.raises(ValueError, match=r"c.jsonl: line 2: not valid JSON"):
        read_examples(tmp_path / "c.jsonl")


def test_polopt_sft_command(tmp_path, capsys):
    data = tmp_path / "notes.txt"
    data.write_text("wind 12 knots\nrain 3 mm\n", encoding="utf-8")
    folder = tmp_path / "ref"
    code = main(["sft", str(data), f"hydra.run.dir={folder}", "train.steps=3", "model.width=16", "model.layers=1",
                 "model.heads=2", "train.progress=false"])
    out = folder / "reference.pt"
    assert code == 0 and out.is_file()
    assert f"use it as task.reference_checkpoint={out}" in capsys.readouterr().out
    # model.context=null: the longest example (bos + text + eos - 1 = 14) but at least 512, room for pairs
    assert load_reference(out)[1]["architecture"]["context"] == 512


def test_polopt_sft_errors_are_one_line(tmp_path, capsys):
    assert main(["sft", str(tmp_path / "none.txt"), f"hydra.run.dir={tmp_path / 'r'}"]) == 2
    assert capsys.readouterr().err.strip() == f"polopt sft: error: SFT data file not found: '{tmp_path / 'none.txt'}'"
    (tmp_path / "a.txt").write_text("some text\n", encoding="utf-8")
    assert main(["sft", str(tmp_path / "a.txt"), f"hydra.run.dir={tmp_path / 'r'}", "model.context=3"]) == 2
    assert "polopt sft: error: model.context must be at least 10 for this file" in capsys.readouterr().err
    assert main(["sft", str(tmp_path / "a.txt"), f"hydra.run.dir={tmp_path / 'r'}", "optim.lrr=3"]) == 2
    assert capsys.readouterr().err == "polopt sft: error: unknown key 'optim.lrr'; did you mean optim.lr?\n"


def test_a_reference_from_polopt_sft_leaves_room_for_the_pairs(tmp_path, capsys):
    """polopt sft on short notes, then pairs longer than any note with task.reference_checkpoint and every
    other default: the run trains (the reference's default context holds them) instead of stopping on context."""
    notes = tmp_path / "notes.txt"
    notes.write_text("wind 12 knots\nrain 3 mm\n", encoding="utf-8")
    ref = tmp_path / "sft" / "reference.pt"
    assert main(["sft", str(notes), f"hydra.run.dir={tmp_path / 'sft'}", "train.steps=2", "model.width=16",
                 "model.layers=1", "model.heads=2", "train.progress=false"]) == 0
    pairs = tmp_path / "pairs.jsonl"
    rows = [{"prompt": "what is the forecast for the harbour tomorrow?", "winner": "wind 12 knots from the west",
             "loser": "rain"}, {"prompt": "and the day after?", "winner": "rain 3 mm", "loser": "no idea at all"}]
    pairs.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    assert len(rows[0]["prompt"]) + len(rows[0]["winner"]) > len("wind 12 knots") + 1  # longer than the notes
    code = main(["train", "task=pairs", f"task.path={pairs}", f"task.reference_checkpoint={ref}", "train.steps=2",
                 "train.progress=false", f"hydra.run.dir={tmp_path / 'run'}"])
    assert code == 0, capsys.readouterr().err
    assert json.loads((tmp_path / "run" / "summary.json").read_text())["n_pairs"] == 2


def test_the_default_context_fits_the_pair_file(tmp_path, capsys):
    """task=pairs with every default on the built-in transformer: model.context=null takes what the file needs
    (here 80 input positions: bos + 60-byte prompt + 20-byte response + eos, less the last token)."""
    pairs = tmp_path / "pairs.jsonl"
    rows = [{"prompt": "p" * 60, "winner": "w" * 20, "loser": "l"}, {"prompt": "q", "winner": "a", "loser": "b"}]
    pairs.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    code = main(["train", "task=pairs", f"task.path={pairs}", "train.steps=1", "train.progress=false",
                 "model.width=16", "model.layers=1", f"hydra.run.dir={tmp_path / 'run'}"])
    assert code == 0, capsys.readouterr().err
    state = torch.load(next((tmp_path / "run" / "checkpoints").glob("*.pt")), weights_only=True)
    positions = [v for k, v in state["policy"].items() if k.endswith("position_embedding.weight")][0]
    assert positions.shape[0] == 1 + 60 + 20 + 1 - 1


def test_polopt_sft_fine_tunes_a_local_lm_into_the_next_runs_model(tmp_path, capsys):
    """model=local_lm: the model is fine-tuned (its next-token loss falls), saved with save_pretrained, reloads
    with transformers, and is the next run's model.path."""
    transformers = pytest.importorskip("transformers")
    from helpers_local_lm import PLAIN_ROWS, save_gpt2, write_pairs

    base = save_gpt2(tmp_path / "base")
    notes = tmp_path / "notes.jsonl"
    notes.write_text("".join(json.dumps({"prompt": r["prompt"], "response": r["winner"]}) + "\n" for r in PLAIN_ROWS)
                     + json.dumps({"text": "moss hums near the tide ."}) + "\n", encoding="utf-8")
    out = tmp_path / "tuned" / "model"
    code = main(["sft", str(notes), f"hydra.run.dir={tmp_path / 'tuned'}", "model=local_lm", f"model.path={base}",
                 "train.steps=20", "optim.lr=0.01", "train.progress=false"])
    printed = capsys.readouterr()
    assert code == 0, printed.err
    first, last = (float(x) for x in printed.out.split("next-token loss ")[1].split(" nats")[0].split(" -> "))
    assert last < first - 0.5
    tuned = transformers.AutoModelForCausalLM.from_pretrained(out)
    assert not torch.equal(tuned.lm_head.weight, transformers.AutoModelForCausalLM.from_pretrained(base).lm_head.weight)
    pairs = write_pairs(tmp_path / "pairs.jsonl", PLAIN_ROWS)
    code = main(["train", "task=pairs", f"task.path={pairs}", "model=local_lm", f"model.path={out}", "train.steps=1",
                 "train.progress=false", f"hydra.run.dir={tmp_path / 'run'}"])
    assert code == 0, capsys.readouterr().err
    assert (tmp_path / "run" / "policy" / "model.safetensors").is_file()


def test_polopt_sft_with_a_local_lm_refuses_the_transformers_keys(tmp_path, capsys):
    (tmp_path / "a.txt").write_text("some text\n", encoding="utf-8")
    assert main(["sft", str(tmp_path / "a.txt"), f"hydra.run.dir={tmp_path / 'm'}", "model=local_lm", "model.path=x",
                 "model.width=16"]) == 2
    assert "polopt sft: error: model=local_lm has no key 'width'" in capsys.readouterr().err
    assert main(["sft", str(tmp_path / "a.txt"), f"hydra.run.dir={tmp_path / 'm'}", "model=local_lm", "model.path=x",
                 "model.adapter=lora"]) == 2
    assert ("polopt sft: error: polopt sft model=local_lm reads train.steps, train.batch_size, optim.lr, train.seed, "
            "train.progress, model.path only; 'model.adapter=lora' would change nothing here") in \
        capsys.readouterr().err
