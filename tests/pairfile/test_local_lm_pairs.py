"""``task=pairs model=local_lm``: a pair file on a local causal LM, chat rows and plain rows, through the one
trainer (polopt/pairfile/local_lm.py, polopt/data/chat.py).

The models are the tiny Llama- and GPT-2-shaped ones of tests/helpers_local_lm.py, built and saved in the
test; nothing is downloaded. Every log-probability is held to an independent computation with
transformers' own calls (``direct_logprob``: the token convention written out with ``apply_chat_template``
and the tokenizer, one unpadded row through ``model(ids).logits``, log-softmax gathered); a saved policy
is reloaded with ``AutoModelForCausalLM.from_pretrained`` or ``peft.PeftModel.from_pretrained``.
"""

from __future__ import annotations

import json

import pytest
import torch

transformers = pytest.importorskip("transformers")
peft = pytest.importorskip("peft")

from helpers_local_lm import (  # noqa: E402
    CHAT_ROWS,
    MISMATCHED_TEMPLATE,
    PLAIN_ROWS,
    TEMPLATE,
    direct_logprob,
    save_gpt2,
    save_llama,
    save_shaped,
    write_pairs,
)
from hydra import compose, initialize_config_dir  # noqa: E402

from polopt.commands.main import main  # noqa: E402
from polopt.commands.train import CONFIG_DIR, prepare_session, run  # noqa: E402
from polopt.parallel import distributed  # noqa: E402

ROWS = PLAIN_ROWS + CHAT_ROWS


@pytest.fixture(scope="module")
def models(tmp_path_factory):
    root = tmp_path_factory.mktemp("models")
    template = root / "template.jinja"
    template.write_text(TEMPLATE)
    return {"llama": save_llama(root / "llama"), "gpt2": save_gpt2(root / "gpt2"), "template": template,
            "qwen2": save_shaped(root / "qwen2", "qwen2"), "mistral": save_shaped(root / "mistral", "mistral")}


def overrides(model_dir, pairs, *extra, template=None):
    chat = [f"task.chat_template={template}"] if template is not None else []
    return ["task=pairs", f"task.path={pairs}", "model=local_lm", f"model.path={model_dir}", "train.progress=false",
            "train.log_every=1", *chat, *extra]


def config(args):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose("config", overrides=args)


def session_and_policy(args, run_dir):
    """The session and policy of ``polopt train ARGS``, built by the same calls as the command."""
    cfg = config(args)
    _, session = prepare_session(cfg, run_dir, distributed.SINGLE)
    from omegaconf import OmegaConf

    policy = session.build_policy(**OmegaConf.to_container(cfg.model, resolve=True))
    return session, policy


def chat_template_of(arch, models):
    return models["template"] if arch == "gpt2" else None  # the GPT-2 tokenizer has no template of its own


@pytest.mark.parametrize("arch", ["llama", "gpt2", "qwen2", "mistral"])
def test_logprobs_equal_a_direct_transformers_computation(arch, models, tmp_path):
    """Plain and chat rows alike: the policy's log-probs (padded batch; scored separately and with each prompt
    computed once, the trainer's default) and the cached reference's equal ``direct_logprob`` of each row alone,
    by the stated token convention (Qwen2- and Mistral-shaped models too)."""
    pairs = write_pairs(tmp_path / "pairs.jsonl", ROWS)
    session, policy = session_and_policy(overrides(models[arch], pairs, template=chat_template_of(arch, models)),
                                         tmp_path / "run")
    tokenizer = transformers.AutoTokenizer.from_pretrained(models[arch])
    if arch == "gpt2":
        tokenizer.chat_template = TEMPLATE
    base = transformers.AutoModelForCausalLM.from_pretrained(models[arch]).eval()
    want_w, want_l = (torch.tensor([direct_logprob(base, tokenizer, r, side) for r in ROWS], dtype=torch.float64)
                      for side in ("winner", "loser"))
    p = session.pairs
    assert len(p) == len(ROWS) and session.data.accounting["rows_accepted"] == len(ROWS)
    with torch.no_grad():
        got = policy.logprobs(torch.cat([p.prompt, p.prompt]), torch.cat([p.winner, p.loser])).double()
        # the trainer's default (train.share_prompt=true): each prompt once, through the key/value cache
        shared = policy.logprobs(p.prompt, p.winner, p.loser).double()
    torch.testing.assert_close(got, torch.cat([want_w, want_l]), rtol=1e-5, atol=1e-4)
    assert policy.shares_prompt
    torch.testing.assert_close(shared, torch.cat([want_w, want_l]), rtol=1e-5, atol=1e-4)
    torch.testing.assert_close(p.reference_winner.double(), want_w, rtol=1e-5, atol=1e-4)
    torch.testing.assert_close(p.reference_loser.double(), want_l, rtol=1e-5, atol=1e-4)


def reloaded(run_dir, base_dir, adapter):
    """RUN/policy as other tools load it: transformers alone, or the base model with peft's adapter."""
    if adapter == "lora":
        base = transformers.AutoModelForCausalLM.from_pretrained(base_dir)
        return peft.PeftModel.from_pretrained(base, run_dir / "policy").eval()
    return transformers.AutoModelForCausalLM.from_pretrained(run_dir / "policy").eval()


@pytest.mark.parametrize("arch,adapter", [("llama", "null"), ("llama", "lora"), ("gpt2", "null"), ("gpt2", "lora")])
def test_the_saved_policy_reloads_and_gives_the_summary(arch, adapter, models, tmp_path):
    """A run trains, writes RUN/policy with save_pretrained, and the summary's log-ratios, margin and pair
    accuracy are those of the reloaded policy against the base model over every pair (weights 1: plain means)."""
    pairs = write_pairs(tmp_path / "pairs.jsonl", ROWS)
    args = overrides(models[arch], pairs, f"model.adapter={adapter}", "train.steps=4", "optim.lr=0.02",
                     "optim.warmup_steps=0", template=chat_template_of(arch, models))
    summary = run(config(args), tmp_path / "run")
    assert (tmp_path / "run" / "policy" / "tokenizer_config.json").is_file()
    policy = reloaded(tmp_path / "run", models[arch], adapter)
    base = transformers.AutoModelForCausalLM.from_pretrained(models[arch]).eval()
    tokenizer = transformers.AutoTokenizer.from_pretrained(tmp_path / "run" / "policy")
    assert tokenizer.chat_template == TEMPLATE  # saved with the policy, task.chat_template included
    ratio = {side: torch.tensor([direct_logprob(policy, tokenizer, r, side) - direct_logprob(base, tokenizer, r, side)
                                 for r in ROWS])
             for side in ("winner", "loser")}
    margin = ratio["winner"] - ratio["loser"]
    assert summary["logratio_winner"] == pytest.approx(float(ratio["winner"].mean()), abs=2e-4)
    assert summary["logratio_loser"] == pytest.approx(float(ratio["loser"].mean()), abs=2e-4)
    assert summary["margin_mean"] == pytest.approx(float(margin.mean()), abs=2e-4)
    assert summary["pair_accuracy"] == pytest.approx(float((margin > 0).double().mean()))
    assert summary["margin_mean"] > 0.01  # it trained: the winners gained on the losers
    assert summary["model"]["adapter"] == (None if adapter == "null" else "lora")
    if adapter == "lora":
        assert summary["model"]["trainable_parameters"] < summary["model"]["parameters"] / 4


def test_rows_the_model_cannot_take_are_rejects_each_accounted(models, tmp_path):
    """A chat template whose assistant turn does not extend its generation prompt, a malformed message list,
    and rows over the context: each a reject with its reason, rows_in = accepted + rejected."""
    template = tmp_path / "mismatch.jinja"
    template.write_text(MISMATCHED_TEMPLATE)
    long_answer = " ".join(["moss"] * 30)
    rows = [*PLAIN_ROWS,  # fits in 24 tokens of the context
            CHAT_ROWS[0],  # rendered by the mismatching template: rejected
            {"prompt": [{"role": "user"}], "winner": "blue", "loser": "green"},  # no content: bad_messages
            {"prompt": "where is the kettle ?", "winner": long_answer, "loser": "blue"}]  # 37 tokens > 24
    pairs = write_pairs(tmp_path / "pairs.jsonl", rows)
    session, _ = session_and_policy(overrides(models["gpt2"], pairs, "model.context=24", template=template),
                                    tmp_path / "run")
    a = session.data.accounting
    assert (a["rows_in"], a["rows_accepted"], a["rows_rejected"]) == (7, 4, 3)
    assert a["rejected_by_reason"] == {"bad_messages": 1, "too_long": 1, "template_mismatch": 1}
    lines = [json.loads(line) for line in (tmp_path / "run" / "rejects.jsonl").read_text().splitlines()]
    assert sorted(r["line"] for r in lines) == [5, 6, 7]


def test_truncation_cuts_tokens_and_counts_them(models, tmp_path):
    """task.truncation=truncate_response keeps the prompt and the first tokens of each response: the row's
    ids are the convention's ids cut to the context (prompt 6 + response 8 = 14 tokens here)."""
    long_answer = " ".join(["moss"] * 30)
    rows = [{"prompt": "where is the kettle ?", "winner": long_answer, "loser": "blue near the tide ."}]
    pairs = write_pairs(tmp_path / "pairs.jsonl", rows)
    session, _ = session_and_policy(overrides(models["llama"], pairs, "model.context=14",
                                              "task.truncation=truncate_response"), tmp_path / "run")
    tokenizer = transformers.AutoTokenizer.from_pretrained(models["llama"])
    prompt_ids = tokenizer(rows[0]["prompt"])["input_ids"]
    winner_ids = tokenizer(long_answer, add_special_tokens=False)["input_ids"] + [tokenizer.eos_token_id]
    assert len(prompt_ids) == 6
    p = session.pairs
    assert p.prompt[0].tolist() == prompt_ids and p.winner[0].tolist() == winner_ids[:8]
    a = session.data.accounting
    assert a["rows_truncated"] == 1 and a["truncated_fields"] == {"winner": 1} and a["tokens_removed"] == 31 - 8


def test_a_reference_folder_scores_the_reference(models, tmp_path):
    """task.reference_checkpoint=DIR: the reference log-probs are that model's (another seed), by the same
    convention; the policy starts at model.path."""
    other = save_llama(tmp_path / "other", seed=5)
    pairs = write_pairs(tmp_path / "pairs.jsonl", ROWS)
    session, policy = session_and_policy(overrides(models["llama"], pairs, f"task.reference_checkpoint={other}"),
                                         tmp_path / "run")
    tokenizer = transformers.AutoTokenizer.from_pretrained(models["llama"])
    reference = transformers.AutoModelForCausalLM.from_pretrained(other).eval()
    want = torch.tensor([direct_logprob(reference, tokenizer, r, "winner") for r in ROWS], dtype=torch.float64)
    torch.testing.assert_close(session.pairs.reference_winner.double(), want, rtol=1e-5, atol=1e-4)


def one_line_error(capsys, args, run_dir) -> str:
    code = main(["train", *args, f"hydra.run.dir={run_dir}"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and "Traceback" not in err
    return err


def test_bad_inputs_are_one_line(models, tmp_path, capsys):
    """Exit code 2 and one line: a folder without config.json, message rows without a chat template, a LoRA
    target the model lacks, a reference folder of another vocabulary."""
    pairs = write_pairs(tmp_path / "pairs.jsonl", ROWS)
    plain = write_pairs(tmp_path / "plain.jsonl", PLAIN_ROWS)
    err = one_line_error(capsys, overrides(tmp_path, plain), tmp_path / "r1")
    assert "polopt train: error: model.path must be a local folder holding a transformers causal LM" in err
    err = one_line_error(capsys, overrides(models["gpt2"], pairs), tmp_path / "r2")
    assert ("polopt train: error: the pair file has message rows (lists of {role, content}) but the model's "
            "tokenizer has no chat template; give one with task.chat_template=PATH") in err
    err = one_line_error(capsys, overrides(models["llama"], plain, "model.adapter=lora", "model.lora.targets=[c_attn]"),
                         tmp_path / "r3")
    assert "polopt train: error: model.lora.targets: the model has no linear layer named 'c_attn'" in err
    err = one_line_error(capsys, overrides(models["llama"], plain, f"task.reference_checkpoint={models['gpt2']}"),
                         tmp_path / "r4")
    assert "polopt train: error: task.reference_checkpoint" in err and "has another vocabulary than model.path" in err


@pytest.mark.parametrize("args,message", [
    (["task.tokenizer=/somewhere"], "task.tokenizer is not read with model=local_lm"),
    (["task.stream=true", "train.batch_size=2"], "task.stream=true streams pairs for model=transformer"),
    (["model.context=1000"], "model.context must be at most the model's own maximum of 64 positions, got 1000"),
    (["model.adapter=dora"], "model.adapter must be null .* or one of lora, got 'dora'"),
    (["model.lora.r=4"], r"model.lora.\* is read with model.adapter=lora only"),
])
def test_keys_that_do_not_apply_are_refused(models, tmp_path, args, message):
    plain = write_pairs(tmp_path / "plain.jsonl", PLAIN_ROWS)
    with pytest.raises(ValueError, match=message):
        session_and_policy(overrides(models["llama"], plain, *args), tmp_path / "run")


def test_the_built_in_transformer_refuses_a_chat_template(tmp_path):
    plain = write_pairs(tmp_path / "plain.jsonl", PLAIN_ROWS)
    with pytest.raises(ValueError, match="task.chat_template is read with model=local_lm only"):
        session_and_policy(["task=pairs", f"task.path={plain}", "task.chat_template=x.jinja"], tmp_path / "run")


def test_polopt_data_reads_a_file_as_training_does_for_the_model(models, tmp_path, capsys):
    """polopt data FILE model=local_lm model.path=DIR: message rows accepted, lengths in the model's tokens by the
    token convention (the longest pair here: the first chat row, 10 prompt + 5 response tokens), the same
    accounting a run gets; without the model, message rows are not_a_string as before."""
    pairs = write_pairs(tmp_path / "pairs.jsonl", ROWS)
    code = main(["data", str(pairs), "model=local_lm", f"model.path={models['llama']}", "model.context=14", "--json",
                 f"hydra.run.dir={tmp_path / 'check'}"])
    printed = capsys.readouterr()
    assert code == 0, printed.err
    a = json.loads(printed.out)
    assert (a["rows_in"], a["rows_accepted"], a["rows_rejected"]) == (7, 6, 1)
    assert a["rejected_by_reason"] == {"too_long": 1} and a["max_length"] == 14
    session, _ = session_and_policy(overrides(models["llama"], pairs, "model.context=14"), tmp_path / "run")
    assert session.data.accounting == {k: v for k, v in a.items() if k not in ("rejects_file", "plot")}
    assert main(["data", str(pairs), "--json", f"hydra.run.dir={tmp_path / 'check2'}"]) == 0
    plain = json.loads(capsys.readouterr().out)
    assert plain["rejected_by_reason"] == {"not_a_string": 3}
    assert main(["data", str(pairs), "model=local_lm", f"model.path={models['llama']}", "model.adapter=lora"]) == 2
    assert ("polopt data: error: polopt data model=local_lm reads task.columns, task.format, task.max_length, "
            "task.truncation, task.duplicates, task.tokenizer, task.hub, model.path, model.context, "
            "task.chat_template only; 'model.adapter=lora' would change nothing here") in capsys.readouterr().err


def test_shared_prompt_training_ends_where_separate_scoring_does(models, tmp_path):
    """train.share_prompt=true (the prompt once through the key/value cache) and false (each response with its
    prompt) give the same gradients up to float rounding, so the same run ends in the same place."""
    pairs = write_pairs(tmp_path / "pairs.jsonl", ROWS)
    ends = {}
    for share in ("true", "false"):
        args = overrides(models["llama"], pairs, "model.adapter=lora", "train.steps=4", "optim.lr=0.05",
                         "optim.warmup_steps=0", f"train.share_prompt={share}")
        ends[share] = run(config(args), tmp_path / f"run-{share}")
    assert ends["true"]["margin_mean"] > 0.01
    for key in ("loss", "margin_mean", "logratio_winner", "logratio_loser"):
        assert ends["true"][key] == pytest.approx(ends["false"][key], rel=1e-4, abs=1e-6), key
