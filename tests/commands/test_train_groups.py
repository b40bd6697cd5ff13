"""``polopt train`` with task.feedback beyond pairs: the run folder's summary, a user's group objective
by dotted path reaching its optimum, and the one-line refusals (exit 2).

Held against: the exact solver's target (itself held against independent solves and closed forms in
tests/toy_tasks/test_group_solve.py) and the closed form of Plackett–Luce listwise DPO,
pi* ∝ pi_ref e^{r / beta} (Rafailov et al. 2023, appendix).
"""

import json

import numpy as np
import pytest
from hydra import compose, initialize_config_dir

from polopt.commands.main import main
from polopt.commands.train import CONFIG_DIR, run
from toy_tasks.finite.task import make_task


def _one_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    return err[0]


def task_file(tmp_path, **extra):
    rng = np.random.default_rng(5)
    task = make_task(rng.dirichlet(np.full(5, 3.0)), rewards=rng.standard_normal(5),
                     sampling=rng.dirichlet(np.full(5, 3.0)), **extra)
    return task, task.save(tmp_path / "task.json")


def composed(*overrides):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose("config", overrides=list(overrides))


def test_a_ranking_run_writes_the_target_and_its_kind(tmp_path):
    task, path = task_file(tmp_path)
    cfg = composed("task=file", f"task.path={path}", "task.feedback=ranking", "task.group_size=3",
                   "loss=ranking_likelihood", "beta=0.6", "optim=lbfgs", "precision=fp64", "train.steps=100",
                   "train.progress=false")
    summary = run(cfg, tmp_path / "run")
    on_disk = json.loads((tmp_path / "run" / "summary.json").read_text())
    assert on_disk["feedback"] == "ranking" and on_disk["group_size"] == 3 and on_disk["n_groups"] == 5**3 * 6
    assert on_disk["optimum_kind"] == "minimiser" and on_disk["reached_optimum"] is True
    closed = task.reference[0] * np.exp(task.rewards[0] / 0.6)
    np.testing.assert_allclose(summary["optimum"][0], closed / closed.sum(), rtol=0, atol=1e-8)


def test_a_users_group_objective_by_dotted_path_reaches_its_optimum(tmp_path):
    _, path = task_file(tmp_path, desirability=[0.6, 0.7, 0.8, 0.65, 0.9])
    cfg = composed("task=file", f"task.path={path}", "task.feedback=ranking", "task.group_size=3",
                   "loss=custom", "loss.name=user_group_objectives:best_of_group_logistic", "+loss.margin=0.2",
                   "optim=lbfgs", "precision=fp64", "train.steps=100", "train.progress=false")
    summary = run(cfg, tmp_path / "run")
    assert summary["optimum_certified"] and summary["tv_to_optimum"] <= 1e-3 and summary["reached_optimum"] is True
    cfg = composed("task=file", f"task.path={path}", "task.feedback=unpaired", "task.group_size=2",
                   "loss=custom", "loss.name=user_group_objectives:labelled_squared", "optim=lbfgs",
                   "precision=fp64", "train.steps=100", "train.progress=false")
    summary = run(cfg, tmp_path / "run2")
    assert summary["optimum_certified"] and summary["tv_to_optimum"] <= 1e-3 and summary["reached_optimum"] is True


@pytest.mark.parametrize(("overrides", "message"), [
    (["loss=score_cross_entropy"],  # the default task.feedback is pairs
     "loss 'score_cross_entropy' cannot read task.feedback=pairs (group.ranks); it reads the feedback of: scored"),
    (["task=nontransitive", "task.feedback=ranking", "task.group_size=3", "loss=ranking_likelihood"],
     "task.feedback=ranking needs a task with rewards"),
    (["task.feedback=pairs", "task.group_size=3", "loss=ranking_likelihood"],
     "task.feedback=pairs has groups of 2 (a winner and a loser), got task.group_size=3"),
    (["task.feedback=lists"], "task.feedback must be one of pairs, unpaired, ranking, scored, got 'lists'"),
    (["task.feedback=unpaired", "loss=unpaired_prospect", "optim=lbfgs"],
     "'unpaired_prospect' holds a statistic without gradient"),
    (["task.feedback=scored", "loss=score_reverse_kl", "loss.smoothing=0.1"], "loss.smoothing flips a pair's label"),
    (["task=sequence", "task.feedback=ranking"], "task.feedback"),
])
def test_bad_input_is_one_line_and_exit_2(tmp_path, monkeypatch, capsys, overrides, message):
    monkeypatch.chdir(tmp_path)
    assert main(["train", *overrides, "train.steps=2", "train.progress=false"]) == 2
    line = _one_line(capsys)
    assert line.startswith("polopt train: error: ") and message in line


def test_the_guides_thumbs_example_runs_as_written(tmp_path, monkeypatch):
    """docs/guides/feedback-beyond-pairs.md: its task file and command give the table it prints."""
    import re
    from pathlib import Path

    guide = (Path(__file__).resolve().parents[2] / "docs" / "guides" / "feedback-beyond-pairs.md").read_text()
    script = guide.split("```python\n# thumbs_task.py\n", 1)[1].split("```", 1)[0]
    monkeypatch.chdir(tmp_path)
    exec(compile(script, "thumbs_task.py", "exec"), {})  # writes library-thumbs.json, as `python thumbs_task.py`
    command = guide.split("python thumbs_task.py\n", 1)[1].splitlines()[0].split()
    assert command[:2] == ["polopt", "train"]
    overrides = [a.replace("library-thumbs.json", str(tmp_path / "library-thumbs.json")) for a in command[2:]
                 if not a.startswith("hydra.")]
    summary = run(composed(*overrides, "train.progress=false"), tmp_path / "run")
    row = r"^  (?:step-by-step|one-line|answer citing|reply in).*?(\d\.\d{4}) +(\d\.\d{4}) +(\d\.\d{4})$"
    printed = re.findall(row, guide.split("prints (measured; the run folder's line left out):", 1)[1], flags=re.M)[:4]
    assert len(printed) == 4
    for i, (_, trained, optimum) in enumerate(printed):
        assert f"{summary['policy'][0][i]:.4f}" == trained and f"{summary['optimum'][0][i]:.4f}" == optimum


def test_compare_refuses_a_group_objective_that_cannot_read_the_feedback_in_one_line(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["compare", "loss=score_cross_entropy", "train.steps=2", "--quiet"]) == 2
    assert _one_line(capsys).startswith("polopt compare: error: no combination of the comparison can run: "
                                        "loss=score_cross_entropy task.feedback=pairs: the objective cannot read "
                                        "that feedback; polopt losses lists the feedback each objective reads")
