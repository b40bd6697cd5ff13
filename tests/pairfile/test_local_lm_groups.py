"""Ranking, scored and unpaired rows on a local causal LM (``model=local_lm``), plain and chat rows alike.

The tiny Llama-shaped model of tests/helpers_local_lm.py is built and saved in the test. Each member's
log-probability is held to an independent computation with transformers' own calls (the token convention
written out by ``convention_ids``: ``apply_chat_template`` and the tokenizer; one unpadded row through
``model(ids).logits``, log-softmax gathered), and the objectives are written out with scipy: the
Plackett–Luce negative log-likelihood ``sum_k [log sum_{j >= k} e^{s_(j)} - s_(k)]``, members in rank order,
``s = beta (log pi - log pi_ref)`` (Plackett 1975; Luce 1959; listwise DPO, Rafailov et al. 2023, appendix
A.3), and InfoNCA's ``-sum_i softmax(scores)_i log softmax(beta h)_i`` (Chen et al. 2024).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch

transformers = pytest.importorskip("transformers")

from helpers_local_lm import convention_ids, save_llama, write_pairs  # noqa: E402
from hydra import compose, initialize_config_dir  # noqa: E402
from scipy.special import log_softmax, logsumexp, softmax  # noqa: E402

from polopt.commands.main import main  # noqa: E402
from polopt.commands.train import CONFIG_DIR, run  # noqa: E402

BETA = 0.5
USER = [{"role": "user", "content": "where is the moss ?"}]
RANKING_ROWS = [
    {"prompt": "where is the kettle ?", "responses": ["near the river .", "blue", "the stone is quiet ."],
     "ranking": [0, 2, 1]},
    {"prompt": USER, "responses": [[{"role": "assistant", "content": "near the tide ."}], "the kettle glows"],
     "ranking": [1, 0]},
    {"prompt": "a lantern is", "responses": ["bright .", "quiet near a kettle .", "green", "why"],
     "ranking": [3, 1, 0, 2]},
]
SCORED_ROWS = [
    {"prompt": "where is the kettle ?", "responses": ["near the river .", "blue"], "scores": [2.0, -1.0]},
    {"prompt": USER, "responses": ["near the tide .", "moss hums", "the stone"], "scores": [0.5, 0.1, 1.2]},
]


@pytest.fixture(scope="module")
def llama(tmp_path_factory):
    return save_llama(tmp_path_factory.mktemp("models") / "llama")


def config(args):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose("config", overrides=args)


def overrides(model_dir, path, *extra):
    return ["task=pairs", f"task.path={path}", "model=local_lm", f"model.path={model_dir}", f"beta={BETA}",
            "train.progress=false", "train.steps=3", "optim.lr=0.02", "optim.warmup_steps=0", *extra]


@torch.no_grad()
def direct(model, tokenizer, row: dict, response) -> float:
    """log pi(response | prompt) of one member; a chat row is one whose prompt or any response is messages."""
    members = row["responses"]
    chat = any(isinstance(v, list) for v in (row["prompt"], *members))
    p, r = convention_ids(tokenizer, row["prompt"], response, chat=chat)
    logp = torch.log_softmax(model(torch.tensor([p + r])).logits[0].double(), dim=-1)  # (T, V)
    return float(logp[torch.arange(len(p) - 1, len(p) + len(r) - 1), torch.tensor(r)].sum())


def trained_and_base(run_dir, model_dir):
    policy = transformers.AutoModelForCausalLM.from_pretrained(run_dir / "policy").eval()
    base = transformers.AutoModelForCausalLM.from_pretrained(model_dir).eval()
    return policy, base, transformers.AutoTokenizer.from_pretrained(model_dir)


def logratios(row, policy, base, tokenizer) -> np.ndarray:
    return np.array([direct(policy, tokenizer, row, m) - direct(base, tokenizer, row, m) for m in row["responses"]])


def test_ranking_rows_train_and_the_summary_is_the_plackett_luce_likelihood(llama, tmp_path):
    path = write_pairs(tmp_path / "ranking.jsonl", RANKING_ROWS)
    summary = run(config(overrides(llama, path, "loss=ranking_likelihood")), tmp_path / "run")
    assert summary["row_kind"] == "ranking" and summary["n_groups"] == 3 and summary["group_size"] == 4
    policy, base, tokenizer = trained_and_base(tmp_path / "run", llama)
    want = []
    for row in RANKING_ROWS:
        s = BETA * logratios(row, policy, base, tokenizer)[np.argsort(row["ranking"])]  # best first
        want.append(sum(logsumexp(s[k:]) - s[k] for k in range(len(s))))
    assert summary["loss"] == pytest.approx(float(np.mean(want)), abs=2e-4)
    log_factorials = np.mean([np.log(np.prod(np.arange(1, len(r["responses"]) + 1))) for r in RANKING_ROWS])
    assert summary["loss"] < log_factorials  # it trained: below the value at the reference, log G! per row


def test_scored_rows_with_lora_give_infonca(llama, tmp_path):
    path = write_pairs(tmp_path / "scored.jsonl", SCORED_ROWS)
    summary = run(config(overrides(llama, path, "loss=score_cross_entropy", "model.adapter=lora")), tmp_path / "run")
    base = transformers.AutoModelForCausalLM.from_pretrained(llama).eval()
    import peft

    policy = peft.PeftModel.from_pretrained(transformers.AutoModelForCausalLM.from_pretrained(llama),
                                            tmp_path / "run" / "policy").eval()
    tokenizer = transformers.AutoTokenizer.from_pretrained(llama)
    want = [-(softmax(r["scores"]) * log_softmax(BETA * logratios(r, policy, base, tokenizer))).sum()
            for r in SCORED_ROWS]
    assert summary["loss"] == pytest.approx(float(np.mean(want)), abs=2e-4)


def test_polopt_data_measures_rows_in_the_models_tokens(llama, tmp_path, capsys):
    """Lengths in the model's tokens against model.context (the word tokenizer: one token per word, <s> before
    a plain prompt, </s> after a plain response): a ranking row over it is too_long; cut, one whose responses
    become the same tokens is repeated_response; rows_in = accepted + rejected."""
    long_prompt = "where is the kettle ? where is the kettle ?"  # <s> + 10 words: 11 tokens
    rows = [*RANKING_ROWS,
            {"prompt": long_prompt, "responses": ["the river is quiet near the stone .", "blue"], "ranking": [0, 1]},
            {"prompt": long_prompt, "responses": ["the river .", "the stone ."], "ranking": [1, 0]}]
    path = write_pairs(tmp_path / "rows.jsonl", rows)
    code = main(["data", str(path), "model=local_lm", f"model.path={llama}", "model.context=16", "--json",
                 f"hydra.run.dir={tmp_path / 'check'}"])
    report = json.loads(capsys.readouterr().out)
    assert code == 0 and report["row_kind"] == "ranking"
    # 11 + 9 tokens > 16; 11 + 4 <= 16
    assert (report["rows_in"], report["rows_accepted"], report["rejected_by_reason"]) == (5, 4, {"too_long": 1})
    assert report["group_sizes"] == {"2": 2, "3": 1, "4": 1}  # JSON keys are strings
    code = main(["data", str(path), "model=local_lm", f"model.path={llama}", "model.context=12",
                 "task.truncation=truncate_response", "--json", f"hydra.run.dir={tmp_path / 'cut'}"])
    report = json.loads(capsys.readouterr().out)
    assert report["rows_in"] == report["rows_accepted"] + report["rows_rejected"] == 5
    assert report["rejected_by_reason"] == {"repeated_response": 1}  # "the" and "the" after the cut to 1 token
    # the long row's responses cut to 12 - 11 = 1 token each: 9 - 1 and 2 - 1 tokens removed
    assert (report["rows_truncated"], report["truncated_fields"], report["tokens_removed"]) == (1, {"responses": 1}, 9)
