"""The ``local-lm`` extra (``model=local_lm``): a local transformers causal LM as policy and reference
(polopt/models/hf.py).

Every model here is a tiny randomly initialised GPT-2 (1 layer, 2 heads, width 32) that
the test builds and saves into a temporary folder, with a word-level tokenizer built by
the ``tokenizers`` library over invented words; nothing is downloaded (HF_HUB_OFFLINE=1,
local_files_only). Skipped when transformers is not installed.
"""

from __future__ import annotations

import json
import math
import os

import pytest
import torch

os.environ["HF_HUB_OFFLINE"] = "1"
transformers = pytest.importorskip("transformers")
tokenizers = pytest.importorskip("tokenizers")

from hydra import compose, initialize_config_dir  # noqa: E402

from polopt import losses  # noqa: E402
from polopt.commands.train import CONFIG_DIR, run  # noqa: E402
from polopt.data import load_pairs  # noqa: E402
from polopt.models import hf  # noqa: E402
from polopt.training.loop import TrainSettings, train  # noqa: E402
from polopt.training.optim import OptimConfig  # noqa: E402

WORDS = ["blue", "green", "kettle", "lantern", "river", "stone", "quiet", "bright", "the", "a", "is", "near",
         "why", "where", "?", "."]
SPECIALS = ["<unk>", "<pad>", "<bos>", "<eos>"]


def save_tiny_model(directory, *, vocab_size: int, n_positions: int = 32, seed: int = 0, tokenizer=True):
    """A random 1-layer GPT-2 (and, with ``tokenizer``, a word-level tokenizer) saved in ``directory``."""
    config = transformers.GPT2Config(n_layer=1, n_head=2, n_embd=32, vocab_size=vocab_size, n_positions=n_positions,
                                     bos_token_id=2, eos_token_id=3, pad_token_id=1)
    torch.manual_seed(seed)
    transformers.GPT2LMHeadModel(config).save_pretrained(directory)
    if tokenizer:
        vocab = {w: i for i, w in enumerate(SPECIALS + WORDS)}
        tok = tokenizers.Tokenizer(tokenizers.models.WordLevel(vocab, unk_token="<unk>"))
        tok.pre_tokenizer = tokenizers.pre_tokenizers.WhitespaceSplit()
        # the prompt starts with <bos>, as GPT-2-style models are trained
        tok.post_processor = tokenizers.processors.TemplateProcessing(single="<bos> $A", special_tokens=[("<bos>", 2)])
        fast = transformers.PreTrainedTokenizerFast(tokenizer_object=tok, unk_token="<unk>", pad_token="<pad>",
                                                    bos_token="<bos>", eos_token="<eos>")
        fast.save_pretrained(directory)
    return directory


@pytest.fixture(scope="module")
def model_dir(tmp_path_factory):
    return save_tiny_model(tmp_path_factory.mktemp("tiny-gpt2"), vocab_size=len(SPECIALS) + len(WORDS))


PROMPTS = ["where is the kettle ?", "why is the river quiet ?", "the stone", "a lantern is"]
RESPONSES = ["near the river .", "blue", "bright and quiet .", "green stone near a kettle"]  # "and" is <unk>


def loop_logprob(model, tokenizer, prompt: str, response: str) -> float:
    """log pi(response | prompt) of one example without padding: the chain rule, token by token."""
    p = tokenizer(prompt)["input_ids"]
    r = tokenizer(response, add_special_tokens=False)["input_ids"] + [tokenizer.eos_token_id]
    ids = torch.tensor([p + r])
    with torch.no_grad():
        logp = torch.log_softmax(model(input_ids=ids).logits[0].double(), dim=-1)  # (T, V)
    return sum(float(logp[len(p) - 1 + t, token]) for t, token in enumerate(r))


def test_batched_logprobs_match_a_plain_loop(model_dir):
    policy = hf.causal_lm_policy(model_dir)
    tokenizer = hf.load_tokenizer(model_dir)
    plain = hf.load_model(model_dir)
    prompt = hf.encode(tokenizer, PROMPTS, response=False)
    response = hf.encode(tokenizer, RESPONSES, response=True)
    assert prompt[0, 0] == tokenizer.bos_token_id and (response == tokenizer.eos_token_id).sum() == len(RESPONSES)
    with torch.no_grad():
        got = policy.logprobs(prompt, response)
    want = torch.tensor([loop_logprob(plain, tokenizer, p, r) for p, r in zip(PROMPTS, RESPONSES, strict=True)],
                        dtype=torch.float64)
    torch.testing.assert_close(got.double(), want, rtol=1e-5, atol=1e-5)  # float32 model, float64 sums
    # batch order changes nothing: the same rows reversed (each row's padding changes with the batch)
    with torch.no_grad():
        again = policy.logprobs(torch.flip(prompt, [0]), torch.flip(response, [0]))
    torch.testing.assert_close(torch.flip(again, [0]), got, rtol=1e-5, atol=1e-5)


def test_a_pairs_file_trains_a_few_steps(model_dir, tmp_path):
    rows = [{"prompt": p, "winner": r, "loser": RESPONSES[(k + 1) % 4]} for k, (p, r) in
            enumerate(zip(PROMPTS, RESPONSES, strict=True))]
    path = tmp_path / "pairs.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    data = load_pairs(path)
    tokenizer = hf.load_tokenizer(model_dir)
    reference = hf.causal_lm_policy(model_dir, frozen=True)
    pairs = hf.text_pairs(reference, tokenizer, data.prompt, data.winner, data.loser)
    policy = hf.causal_lm_policy(model_dir)
    assert not any(p.requires_grad for p in reference.parameters())
    result = train(policy, pairs, losses.resolve_margin("logistic"),
                   TrainSettings(beta=0.5, steps=8, optim=OptimConfig("adam", 0.01), log_every=1, progress=False))
    first, last = result.history[0], result.history[-1]
    # the policy starts at the reference: every margin 0 and the logistic loss log 2 (Rafailov et al. 2023)
    assert math.isclose(first["loss"], math.log(2), rel_tol=1e-5) and abs(first["margin_mean"]) < 1e-5
    assert last["loss"] < first["loss"] - 0.1 and last["pair_accuracy"] == 1.0
    assert last["tokens_per_s"] > 0


def test_the_sequence_task_takes_a_causal_lm(tmp_path):
    """``task=sequence model=local_lm``: the sequence-level policy is a distribution over the enumerated
    responses (sums to 1 per prompt: the output restriction to the task's tokens) and training runs."""
    model_dir = save_tiny_model(tmp_path / "seq-lm", vocab_size=8, tokenizer=False)  # task vocab: 2 + 1 + 2 + 1
    overrides = ["+experiment=sequence", "model=local_lm", f"model.path={model_dir}", "task.n_symbols=2",
                 "task.max_length=3", "task.reference_width=16", "task.reference_layers=1", "train.steps=5",
                 "train.log_every=5", "train.progress=false", "optim.warmup_steps=0"]
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=overrides)
    summary = run(cfg, tmp_path / "run")
    assert summary["steps"] == 5 and summary["n_responses"] == 15
    for row in summary["policy"]:
        assert math.isclose(sum(row), 1.0, rel_tol=1e-6)
    logged = [json.loads(line) for line in (tmp_path / "run" / "metrics.jsonl").read_text().splitlines()]
    assert [r["step"] for r in logged] == [1, 5] and logged[1]["loss"] < logged[0]["loss"]


def test_errors_name_the_field(tmp_path):
    with pytest.raises(ValueError, match=r"model.path must be a local directory holding a transformers causal LM "
                                         r".*got '.*nowhere'; nothing is downloaded"):
        hf.load_model(tmp_path / "nowhere")
    small = save_tiny_model(tmp_path / "small", vocab_size=5, tokenizer=False)
    with pytest.raises(ValueError, match=r"the model's vocab_size is 5 but this task uses 6 token ids"):
        hf.causal_lm_policy(small, vocab_needed=6)
    with pytest.raises(ValueError, match=r"the model holds 32 positions but this task needs 40"):
        hf.causal_lm_policy(small, context_needed=40)
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["+experiment=sequence", "model=local_lm"])
    with pytest.raises(ValueError, match=r"model=local_lm needs model.path=DIR"):
        run(cfg, tmp_path / "run")
