"""reached_optimum and the most likely fix (polopt.training.verdict), and how runs report them.

The verdict is a comparison with a stated tolerance; the fix is read from the loss curve by the rule
written in polopt.training.verdict.likely_fix (common practice: an oscillating loss wants a smaller step, a
loss still falling wants more steps). The curves below are built to have each shape by construction.
"""

import contextlib
import io
import math

import pytest
from hydra import compose, initialize_config_dir

from polopt.commands.config import CONFIG_DIR
from polopt.commands.train import run
from polopt.training.verdict import REACHED_TOLERANCE, likely_fix, reached_line, reached_optimum


def test_the_verdict_compares_tv_with_the_tolerance():
    assert reached_optimum(1e-4, optimum_finite=True) is True
    assert reached_optimum(2e-3, optimum_finite=True) is False
    assert reached_optimum(0.04, optimum_finite=True, tolerance=0.05) is True


def test_no_finite_optimum_gives_null():
    assert reached_optimum(None, optimum_finite=False) is None
    assert reached_optimum(0.0, optimum_finite=None) is None


def test_a_non_unique_optimum_is_judged_by_its_relative_loss_gap():
    assert reached_optimum(0.3, optimum_finite=True, unique=False, relative_loss_gap=1e-6) is True
    assert reached_optimum(0.0, optimum_finite=True, unique=False, relative_loss_gap=0.01) is False


def test_an_uncertified_optimum_gives_null_and_says_why():
    assert reached_optimum(0.0, optimum_finite=True, certified=False) is None
    line = reached_line({"reached_optimum": None, "optimum_certified": False, "optimum_residual": 0.467})
    assert line == ("reached_optimum: null (the solver could not certify the optimum of this run: its gradient "
                    "there is 0.467; see the notes)")


def test_an_oscillating_loss_asks_for_a_lower_rate():
    curve = [1.0 + 0.1 * (-1) ** k for k in range(40)]  # up, down, up, ... by construction
    assert likely_fix(curve).startswith("lower optim.lr")


def test_a_loss_still_falling_asks_for_more_steps():
    curve = [math.exp(-k / 50) for k in range(40)]  # strictly decreasing to the end
    assert likely_fix(curve).startswith("raise train.steps")


def test_a_flat_loss_asks_for_a_higher_rate():
    curve = [2.0] * 5 + [1.0] * 35  # falls once, early, then flat
    assert likely_fix(curve).startswith("raise optim.lr")


def test_a_nearly_flat_objective_says_so_with_its_loss_gap():
    # the forward-KL link on task=sequence after 1000 steps (bench/pair_sequence.py): TV 0.18 from its
    # optimum while the loss is within 7e-5 of the optimum's, relatively, and its last logged quarter
    # wiggles by 4e-5 (the run's own figures): steps gain little, and the wiggle says nothing of the rate
    settling = [0.6421 + 1e-3 * math.exp(-k / 5) for k in range(40)]
    wiggling = [0.6421 + 1e-6 * (-1) ** k for k in range(40)]
    for curve in (settling, wiggling):
        fix = likely_fix(curve, relative_loss_gap=7e-5)
        assert fix.startswith("raise train.steps (the objective is nearly flat here") and "7e-05" in fix
        assert fix.endswith("; or optim=lbfgs, a line search in float64 (full batch)")
        # a run that already ran L-BFGS is not sent back to it
        assert "optim=lbfgs" not in likely_fix(curve, relative_loss_gap=7e-5, line_search=True)
    assert likely_fix(wiggling).startswith("lower optim.lr")  # without the gap, the curve alone decides
    # far from the optimum's loss: the curve decides
    assert likely_fix(settling, relative_loss_gap=0.02) == likely_fix(settling)
    # an oscillation larger than the gap is the curve's problem
    oscillating = [1.0 + 0.1 * (-1) ** k for k in range(40)]
    assert likely_fix(oscillating, relative_loss_gap=7e-5).startswith("lower optim.lr")
    falling = [math.exp(-k / 50) for k in range(40)]  # still falling by more than the gap
    assert likely_fix(falling, relative_loss_gap=7e-5) == "raise train.steps (the loss was still falling)"


def test_the_screen_line_names_the_figure_the_tolerance_and_the_fix():
    summary = {"reached_optimum": False, "tv_to_optimum": 0.2, "reached_optimum_tolerance": 1e-3,
               "likely_fix": "raise train.steps (the loss was still falling)"}
    assert reached_line(summary) == ("reached_optimum: false (tv_to_optimum 0.2 > 0.001); most likely fix: "
                                     "raise train.steps (the loss was still falling)")
    assert reached_line({"reached_optimum": None}) == "reached_optimum: null (no exact optimum is known for this run)"


def train(tmp_path, *overrides):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["train.progress=false", *overrides])
    with contextlib.redirect_stdout(io.StringIO()) as out:
        summary = run(cfg, tmp_path)
    return summary, out.getvalue().rstrip().splitlines()[-1]


def test_a_run_stopped_early_says_it_missed_and_to_raise_the_steps(tmp_path):
    summary, last = train(tmp_path, "train.steps=20", "optim.schedule=constant", "optim.lr=0.01")
    assert summary["reached_optimum"] is False and summary["reached_optimum_tolerance"] == REACHED_TOLERANCE
    assert summary["likely_fix"].startswith("raise train.steps")
    assert last.startswith("reached_optimum: false (tv_to_optimum") and "most likely fix: raise train.steps" in last


def test_a_converged_run_says_so_last(tmp_path):
    summary, last = train(tmp_path)
    assert summary["reached_optimum"] is True and summary["likely_fix"] is None
    assert last == f"reached_optimum: true (tv_to_optimum {summary['tv_to_optimum']:.3g} <= 0.001)"


def test_no_finite_optimum_reports_null(tmp_path):
    summary, last = train(tmp_path, "task=deterministic", "train.steps=50")  # logistic, p = 1: none (docs/maths.md)
    assert summary["reached_optimum"] is None and last.startswith("reached_optimum: null")


@pytest.mark.parametrize("method", ["rl", "selfplay", "best_of_n"])
def test_method_runs_carry_the_verdict(tmp_path, method):
    summary, last = train(tmp_path, f"method={method}", "train.steps=5")
    assert summary["reached_optimum"] is False and last.startswith("reached_optimum: false")
