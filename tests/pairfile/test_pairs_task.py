"""``task=pairs`` end to end: a pair file with good and bad rows of every kind trains through
``polopt train``'s own ``run``; the rejects file, the exact accounting and the summary fields are
checked against the file's own record of where the bad rows are (built here, line by line)."""

from __future__ import annotations

import json

import pytest
import torch
from hydra import compose, initialize_config_dir

from polopt.commands.train import CONFIG_DIR, run
from polopt.data.encoding import SequenceIds
from polopt.data.tokenizer import ByteTokenizer
from polopt.training.sft import build_model, encode_examples, save_reference, train_sft

TINY = ["task=pairs", "model=transformer", "model.width=16", "model.layers=1", "model.heads=2", "model.context=48",
        "train.steps=3", "train.batch_size=4", "train.log_every=1", "train.progress=false", "optim.lr=0.001"]
GOOD = [{"prompt": f"q{i}?", "winner": f"yes {i}", "loser": f"no {i}!"} for i in range(12)]


def _bad_lines() -> list[tuple[bytes, str | None, str]]:
    """(raw line, field, reason): one bad row of every kind the data layer knows for JSONL."""
    def row(**kw):
        return json.dumps({**GOOD[0], "weight": 1.0, **kw}).encode()

    return [
        (json.dumps({"prompt": "q", "loser": "n", "weight": 1}).encode(), "winner", "missing"),
        (row(loser=None), "loser", "missing"),
        (row(prompt=7), "prompt", "not_a_string"),
        (row(winner=""), "winner", "empty"),
        (row(loser="yes 0", winner="yes 0"), "loser", "identical"),
        (b'{"prompt": "q", "winner": "caf\xe9", "loser": "n", "weight": 1}', "winner", "invalid_utf8"),
        (b'{"prompt": "q", "winner": ', None, "invalid_json"),
        (b'["q", "a", "b"]', None, "not_an_object"),
        (row(winner="y" * 60), None, "too_long"),
        (row(weight=-1), "weight", "bad_weight"),
        (json.dumps(GOOD[3]).encode(), None, "duplicate"),
    ]


@pytest.fixture(scope="module")
def pair_file(tmp_path_factory):
    """Good rows, each followed by one bad row until the bad kinds run out."""
    bad = _bad_lines()
    lines, expected = [], []
    for i, good in enumerate(GOOD):
        lines.append(json.dumps({**good, "weight": 1.0 + i / 10}).encode())
        if i < len(bad):
            raw, field, reason = bad[i]
            if reason == "duplicate":
                raw = json.dumps({**GOOD[3], "weight": 1.3}).encode()  # the fourth good row (line 7) again
            lines.append(raw)
            expected.append({"line": len(lines), "field": field, "reason": reason})
    path = tmp_path_factory.mktemp("pairs") / "pairs.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    return path, expected


def _cfg(*overrides):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose("config", overrides=[*TINY, *overrides])


def test_every_bad_row_reported_nothing_valid_dropped(pair_file, tmp_path):
    path, expected = pair_file
    summary = run(_cfg(f"task.path={path}", "task.max_length=40"), tmp_path)
    rejects = [json.loads(x) for x in (tmp_path / "rejects.jsonl").read_text(encoding="utf-8").splitlines()]
    assert [{k: r[k] for k in ("line", "field", "reason")} for r in rejects] == expected
    assert summary["rows_in"] == len(GOOD) + len(expected) == summary["rows_accepted"] + summary["rows_rejected"]
    assert summary["rows_accepted"] == summary["n_pairs"] == len(GOOD)
    assert summary["data"]["balance"] == f"rows_in {summary['rows_in']} = rows_accepted {len(GOOD)} + " \
                                         f"rows_rejected {len(expected)}"
    for key in ("loss", "margin_mean", "pair_accuracy", "logratio_winner", "logratio_loser", "steps", "rejects_file"):
        assert key in summary
    metrics = [json.loads(x) for x in (tmp_path / "metrics.jsonl").read_text().splitlines()]
    assert [m["step"] for m in metrics] == [1, 2, 3] and all("tokens_per_s" in m for m in metrics)
    assert (tmp_path / "reference_logprobs.pt").is_file() and (tmp_path / "summary.json").is_file()
    assert any("seeded random initialisation" in n for n in summary["notes"])


def test_csv_with_a_column_mapping(tmp_path):
    path = tmp_path / "answers.csv"
    path.write_text("question,good,bad\n" + "".join(f"q{i},yes {i},no {i}\n" for i in range(6)), encoding="utf-8")
    summary = run(_cfg(f"task.path={path}", "+task.columns={prompt: question, winner: good, loser: bad}"),
                  tmp_path / "run")
    assert summary["rows_in"] == summary["rows_accepted"] == 6 and summary["rows_rejected"] == 0
    assert (tmp_path / "run" / "rejects.jsonl").read_text() == ""


@pytest.fixture(scope="module")
def reference_checkpoint(tmp_path_factory):
    tok, ids = ByteTokenizer(), SequenceIds.for_tokenizer(ByteTokenizer())
    examples = [(g["prompt"], g["winner"]) for g in GOOD] + [(g["prompt"], g["loser"]) for g in GOOD]
    prompt, response = encode_examples(tok, examples, ids)
    model = build_model(ids, context=48, width=16, layers=1, heads=2, seed=3)
    train_sft(model, prompt, response, pad_id=ids.pad, steps=5, progress=False)
    path = tmp_path_factory.mktemp("ref") / "ref.pt"
    arch = {"vocab_size": ids.vocab_size, "context": 48, "width": 16, "layers": 1, "heads": 2}
    return save_reference(path, model, ids=ids, tokenizer="byte", architecture=arch)


def test_policy_starts_at_the_sft_reference(pair_file, reference_checkpoint, tmp_path):
    # at step 1 the policy is the reference, so every margin is 0 up to float rounding
    # (rho = 0 when pi = pi_ref: Rafailov et al. 2023, eq. 7)
    path, _ = pair_file
    summary = run(_cfg(f"task.path={path}", "task.max_length=40", f"task.reference_checkpoint={reference_checkpoint}",
                       "model.width=32"), tmp_path)
    first = json.loads((tmp_path / "metrics.jsonl").read_text().splitlines()[0])
    assert abs(first["margin_mean"]) < 1e-4 and abs(first["logratio_winner"]) < 1e-4
    assert first["loss"] == pytest.approx(torch.nn.functional.softplus(torch.tensor(0.0)).item(), abs=1e-4)
    assert summary["reference_checkpoint"] == str(reference_checkpoint)
    assert any("reference's architecture" in n for n in summary["notes"])  # model.width=32 was not used


@pytest.mark.parametrize(("overrides", "message"), [
    (["task.mode=exact"], r"task.mode must be sampled for task=pairs"),
    (["model.context=8"], r"model.context must be at least \d+ for this file"),
    (["task.reference_checkpoint=/nonexistent/ref.pt"],
     r"task.reference_checkpoint must be a reference checkpoint written by polopt sft"),
    (["model.kind=bigram"], r"task=pairs trains model=transformer, got model.kind='bigram'"),
])
def test_errors_name_the_field(pair_file, tmp_path, overrides, message):
    path, _ = pair_file
    with pytest.raises(ValueError, match=message):
        run(_cfg(f"task.path={path}", "task.max_length=40", *overrides), tmp_path)


def test_a_reference_too_short_for_the_file(reference_checkpoint, tmp_path):
    path = tmp_path / "long.jsonl"
    path.write_text(json.dumps({"prompt": "q", "winner": "y" * 80, "loser": "n"}) + "\n", encoding="utf-8")
    with pytest.raises(ValueError, match=r"task.reference_checkpoint has context 48 but the longest pair needs 82"):
        run(_cfg(f"task.path={path}", f"task.reference_checkpoint={reference_checkpoint}"), tmp_path / "run")


def test_the_pairs_experiment_composes():
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["+experiment=pairs", "task.path=x.jsonl"])
    assert cfg.task._target_ == "polopt.pairfile.task.pair_task" and cfg.model.kind == "transformer"
    assert cfg.task.mode == "sampled" and cfg.optim.lr == 0.0002
