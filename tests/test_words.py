"""Clear words: metrics, summary keys and option names say what they are (issue 14).

Expected values are derived beside each check.
"""

import json

import pytest
import torch

from polopt.objective import batch_statistics


def test_pair_accuracy_counts_an_exact_tie_as_half():
    # margins +1 (right), -1 (wrong), 0 and 0 (ties: a coin flip would be right half the time)
    rho = torch.tensor([1.0, -1.0, 0.0, 0.0], dtype=torch.float64)
    zero = torch.zeros(4, dtype=torch.float64)
    assert batch_statistics(rho, zero, zero, None)["pair_accuracy"] == (1 + 0 + 0.5 + 0.5) / 4
    weights = torch.tensor([3.0, 1.0, 0.0, 0.0], dtype=torch.float64)  # weighted: 3 / 4
    assert batch_statistics(rho, zero, zero, weights)["pair_accuracy"] == 0.75


def test_a_policy_at_its_reference_has_pair_accuracy_one_half():
    rho = torch.zeros(6, dtype=torch.float64)  # every margin is 0 before the first step
    assert batch_statistics(rho, rho, rho, None)["pair_accuracy"] == pytest.approx(0.5, abs=1e-15)


def test_compare_says_which_methods_ignore_the_loss_and_merge_their_runs():
    from polopt.commands.compare import merge_notes, plan

    overrides = ["loss=logistic,squared", "method=offline,rl"]
    assert len(plan(overrides)) == 3  # two offline runs, one rl run
    assert merge_notes(overrides) == ["method=rl ignores the loss group (it trains with no preference loss): its "
                                      "runs for loss=logistic,squared were merged into one"]
    assert merge_notes(["loss=logistic", "method=offline,rl"]) == []  # one loss: nothing merged


def test_compare_columns_are_the_summary_keys(tmp_path):
    from polopt.commands.compare import COLUMNS, compare

    result = compare(["task=nontransitive", "loss=squared", "method=offline,selfplay", "train.steps=20"],
                     tmp_path, progress=False)
    summary = json.loads((tmp_path / "00" / "summary.json").read_text())
    assert set(COLUMNS) - {"run", "method"} <= set(summary)  # every column is a key of summary.json
    header = result["table"].splitlines()[1].split()
    assert header[1:] and set(header[1:]) <= set(summary)
    for r in result["rows"]:
        assert set(r) == set(COLUMNS)
