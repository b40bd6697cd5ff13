"""``polopt compare`` (polopt.commands.compare).

Checks against: Hydra's own basic sweeper for the expansion of sweep overrides
(hydra._internal.core_plugins.basic_sweeper.BasicSweeper.split_arguments);
the Nash equilibrium computed by toy_tasks.methods.equilibrium and the offline squared
optimum of Azar et al. 2023 for what the report says; the PNG signature
(ISO/IEC 15948) for the plot file.
"""

import csv
import json

import numpy as np
import pytest
from hydra._internal.core_plugins.basic_sweeper import BasicSweeper
from hydra.core.override_parser.overrides_parser import OverridesParser

from polopt.commands.compare import expand, plan
from polopt.commands.main import main
from toy_tasks.families import nontransitive
from toy_tasks.methods.equilibrium import nash_equilibrium


@pytest.mark.parametrize("overrides", [["loss=logistic,squared,hinge", "method=offline,selfplay", "beta=0.5"],
                                       ["beta=range(1,4)", "task.seed=1,2"], ["task=nontransitive"]])
def test_expansion_matches_hydras_basic_sweeper(overrides):
    parsed = OverridesParser.create().parse_overrides(overrides)
    hydra_runs = [run for batch in BasicSweeper.split_arguments(parsed, None) for run in batch]
    assert sorted(map(sorted, expand(overrides))) == sorted(map(sorted, hydra_runs))


def test_methods_that_ignore_the_loss_run_once():
    runs = plan(["loss=logistic,squared", "method=offline,rl,selfplay"])
    assert runs == [["loss=logistic", "method=offline"], ["method=rl"], ["method=selfplay"],
                    ["loss=squared", "method=offline"]]


def test_nontransitive_comparison_names_the_equilibrium(tmp_path, capsys):
    code = main(["compare", "task=nontransitive", "loss=logistic,squared", "method=offline,selfplay", "beta=0.5",
                 "train.steps=600", f"hydra.run.dir={tmp_path}", "--quiet"])
    assert code == 0
    result = json.loads((tmp_path / "comparison.json").read_text())
    rows = {r["run"]: r for r in result["rows"]}
    assert set(rows) == {"offline logistic", "offline squared", "selfplay squared"}
    assert rows["selfplay squared"]["tv_to_equilibrium"] < 1e-3
    assert rows["offline squared"]["tv_to_equilibrium"] > 1e-2 and rows["offline squared"]["tv_to_optimum"] < 1e-3
    eq = nash_equilibrium(nontransitive().reference, nontransitive().preference, tau=0.25).policy[0]
    shown = "[" + ", ".join(f"{v:.4f}" for v in eq) + "]"
    notes = " ".join(result["notes"])
    assert f"is {shown}; at it (TV <= 0.001): selfplay squared" in notes
    assert "offline squared ends elsewhere" in notes
    with (tmp_path / "comparison.csv").open() as f:
        table = list(csv.DictReader(f))
    assert [r["run"] for r in table] == [r["run"] for r in result["rows"]]
    assert np.isclose(float(table[0]["kl_to_reference"]), result["rows"][0]["kl_to_reference"])
    assert (tmp_path / "comparison.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "selfplay squared" in capsys.readouterr().out


def test_unknown_method_is_one_line_and_exit_code_2(tmp_path, capsys):
    assert main(["compare", "method=offline,annealing", f"hydra.run.dir={tmp_path}"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert err.startswith("polopt compare: error: unknown method 'annealing'; choose one of: best_of_n, group, "
                          "offline, rl, selfplay")


def test_method_without_rewards_is_one_line(tmp_path, capsys):
    assert main(["compare", "task=nontransitive", "method=rl", f"hydra.run.dir={tmp_path}", "--quiet"]) == 2
    assert capsys.readouterr().err == ("polopt compare: error: method=rl needs rewards and task 'nontransitive' "
                                       "has none; use a task with rewards (bradley_terry, contextual) or "
                                       "method.reward=win_rate\n")
