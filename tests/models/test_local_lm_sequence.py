"""``task=sequence model=local_lm``: a local transformers causal LM on the enumerable sequence task
(polopt/models/local_lm.py's ``causal_lm_policy``; pair files on local LMs: tests/pairfile/test_local_lm_pairs.py).

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

from polopt.commands.train import CONFIG_DIR, run  # noqa: E402
from polopt.models import local_lm as hf  # noqa: E402
from polopt.training.verdict import SEQUENCE_MODEL_TOLERANCE  # noqa: E402

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
    # judged as a sequence model: the tolerance of polopt.training.verdict for sequence models, not the tables'
    assert summary["reached_optimum_tolerance"] == SEQUENCE_MODEL_TOLERANCE == 0.05


def test_errors_name_the_field(tmp_path):
    with pytest.raises(ValueError, match=r"model.path must be a local folder holding a transformers causal LM "
                                         r".*got '.*nowhere' \(no config.json\); nothing is downloaded"):
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
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["+experiment=sequence", "model=local_lm", f"model.path={small}",
                                           "model.adapter=lora", "train.progress=false"])
    with pytest.raises(ValueError, match=r"model.adapter and model.context are read with task=pairs"):
        run(cfg, tmp_path / "run2")
