"""Clear words: metrics, summary keys and option names say what they are (issue 14).

Expected values are derived beside each check.
"""

import json

import pytest
import torch

from polopt.training.step import batch_statistics


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
    learned = {"learned_reward", "true_reward", "reward_model"}  # keys of runs with method.reward=PATH only
    grouped = {"optimum_kind", "tv_optimum_to_kl_regularised_optimum"}  # keys of group objectives' and methods' runs
    assert set(COLUMNS) - {"run", "method"} - learned - grouped <= set(summary)  # every column is a summary key
    header = result["table"].splitlines()[1].split()
    assert header[1:] and set(header[1:]) <= set(summary)
    for r in result["rows"]:
        assert set(r) == set(COLUMNS)


def test_the_flat_pair_objective_is_named_with_its_interval():
    """A hinge written by hand (no closed form): at p = 1/2 the pair objective
    (max(0, 1 - x) + max(0, 1 + x)) / 2 equals 1 for every x in [-1, 1] (by hand), so the check must say
    the objective is flat there, with that interval, not print one number twice."""
    from polopt import losses
    from polopt.checks.margin import check_pair_optimum

    def hand_hinge(x):
        return torch.clamp(1 - x, min=0)

    result = check_pair_optimum(losses.resolve(hand_hinge))
    assert result.status == "warn"
    assert result.reason.startswith("the pair objective is flat at p = 0.5: every scaled margin from -1 to 1 "
                                    "gives the same pair loss 1,")
    assert result.facts["flat_at"] == {"p": 0.5, "margins": [-1.0, 1.0]}


def test_check_rows_say_what_they_test():
    from polopt.checks.margin import format_report
    from polopt.checks.result import CHECK_TESTS, CheckResult, Report

    report = Report("x", 0.5, [CheckResult(name, "pass", "ok") for name in CHECK_TESTS]
                    + [CheckResult("population:nontransitive", "pass", "ok")])
    rows = format_report(report, width=400).splitlines()[3:-2]
    assert [row.split("PASS", 1)[1].strip() for row in rows] == [
        *(f"{what}: ok" for what in CHECK_TESTS.values()),
        "training reaches the exact optimum of task nontransitive: ok"]
    assert report.to_dict()["checks"][2]["tests"] == "a larger margin lowers the loss (f'(0) < 0)"
