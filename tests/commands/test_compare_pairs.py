"""``polopt compare task=pairs``: runs on a pair file (a tiny local causal LM, and the built-in transformer)
tabulated by the statistics their summaries hold (polopt/commands/compare.py, ``PAIR_SHOWN``).

A pair file has no exact optimum, so the table's figures are checked against a computation outside the
trainer: each run's saved policy (``RUN/policy``, reloaded by transformers) and its reference (the starting
model) score every pair by the token convention written out with transformers' own calls
(tests/helpers_local_lm.py ``direct_logprob``); ``margin_mean`` is the mean of
``log pi/pi_ref(winner) - log pi/pi_ref(loser)`` and ``pair_accuracy`` the share of positive margins
(the DPO margin: Rafailov et al., Direct preference optimization, 2023).
"""

from __future__ import annotations

import json
import os

import pytest
import torch

os.environ["HF_HUB_OFFLINE"] = "1"
transformers = pytest.importorskip("transformers")

from helpers_local_lm import CHAT_ROWS, PLAIN_ROWS, direct_logprob, save_llama, write_pairs  # noqa: E402

from polopt.commands.compare import PAIR_COLUMNS, PAIR_SHOWN, compare  # noqa: E402
from polopt.commands.main import main  # noqa: E402

ROWS = PLAIN_ROWS + CHAT_ROWS


def test_a_local_lm_comparison_tabulates_what_the_saved_policies_give(tmp_path):
    model = save_llama(tmp_path / "model", seed=0)
    pairs = write_pairs(tmp_path / "pairs.jsonl", ROWS)
    result = compare(["task=pairs", f"task.path={pairs}", "model=local_lm", f"model.path={model}",
                      "loss=logistic,squared", "train.steps=3"], tmp_path / "cmp", progress=False)
    assert [r["run"] for r in result["rows"]] == ["offline logistic", "offline squared"]
    assert result["table"].splitlines()[1].split() == ["run", *(key for key, _ in PAIR_SHOWN)]
    reference = transformers.AutoModelForCausalLM.from_pretrained(model).eval()
    tokenizer = transformers.AutoTokenizer.from_pretrained(model)
    for number, r in enumerate(result["rows"]):
        assert set(r) == set(PAIR_COLUMNS)
        policy = transformers.AutoModelForCausalLM.from_pretrained(tmp_path / "cmp" / f"{number:02d}" / "policy")
        with torch.no_grad():
            ratio = {side: torch.tensor([direct_logprob(policy.eval(), tokenizer, row, side)
                                         - direct_logprob(reference, tokenizer, row, side) for row in ROWS])
                     for side in ("winner", "loser")}
        margin = ratio["winner"] - ratio["loser"]  # (N,)
        assert r["margin_mean"] == pytest.approx(float(margin.mean()), abs=1e-4)
        assert r["logratio_winner"] == pytest.approx(float(ratio["winner"].mean()), abs=1e-4)
        assert r["pair_accuracy"] == pytest.approx(float((margin > 0).double().mean()))
        assert r["steps"] == 3 and r["seconds"] > 0
        summary = json.loads((tmp_path / "cmp" / f"{number:02d}" / "summary.json").read_text())
        assert r["loss"] == summary["loss"] and r["loss_name"] == summary["loss_name"]
    written = (tmp_path / "cmp" / "comparison.csv").read_text().splitlines()[0].split(",")
    assert written == list(PAIR_COLUMNS)
    assert (tmp_path / "cmp" / "comparison.png").stat().st_size > 0


def test_the_command_compares_on_a_pair_file_with_the_built_in_transformer(tmp_path, capsys):
    rows = [{"prompt": f"the lantern {i}", "winner": "glows near the river", "loser": "hums"} for i in range(8)]
    pairs = write_pairs(tmp_path / "pairs.jsonl", rows)
    assert main(["compare", "task=pairs", f"task.path={pairs}", "loss=logistic,hinge", "train.steps=3",
                 f"hydra.run.dir={tmp_path / 'cmp'}", "--quiet"]) == 0
    printed = capsys.readouterr().out.splitlines()
    assert printed[1].split() == ["run", *(key for key, _ in PAIR_SHOWN)]
    assert [line.split()[1] for line in printed[2:4]] == ["logistic", "hinge"]
