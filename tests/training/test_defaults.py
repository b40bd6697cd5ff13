"""Defaults that fit the choice (conf/config.yaml's defaults list, conf/tuning/), and the defaults' convergence.

Composition follows Hydra 1.3's documented rules for the defaults list: the last appearance of a group
decides its option, a group option's own defaults list may override another group, the command line
overrides everything, and ``optional`` entries whose interpolated name (``${optim}_${model}``) has no file
are skipped ("Specializing configs" in Hydra's docs). The convergence tests run the defaults themselves
against the exact optimum of toy_tasks.exact.margin / the equilibrium of toy_tasks.methods.equilibrium, both computed
independently of the trainer.
"""

import contextlib
import io

import numpy as np
import pytest
from hydra import compose, initialize_config_dir

from polopt.commands.config import CONFIG_DIR
from polopt.commands.train import run
from toy_tasks.families import nontransitive
from toy_tasks.methods.equilibrium import nash_equilibrium, tau_of_beta


def composed(*overrides):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose("config", overrides=list(overrides))


def quiet_run(cfg, run_dir):
    with contextlib.redirect_stdout(io.StringIO()) as out:
        summary = run(cfg, run_dir)
    return summary, out.getvalue()


# ------------------------------------------------------------ composition


def test_a_sequence_task_picks_the_transformer_and_its_optimiser_defaults():
    chosen, explicit = composed("task=sequence"), composed("task=sequence", "model=transformer")
    assert chosen.model == explicit.model and chosen.model.kind == "transformer"
    assert chosen.optim == explicit.optim
    tables = composed()
    assert tables.model.kind == "tabular"
    assert chosen.optim.lr < tables.optim.lr and chosen.optim.warmup_steps > 0 == tables.optim.warmup_steps
    assert chosen.train.steps < tables.train.steps  # within TV 0.05 after 40 steps: 2000 would only cost time
    # exact mode's deterministic gradient shrinks near the optimum: Adam's second moment follows it
    assert list(chosen.optim.betas) == [0.9, 0.9] and tables.optim.betas is None
    assert composed("task=pairs", "task.path=x.jsonl").optim.betas is None  # minibatches keep torch's decay


def test_the_tables_keep_their_optimiser_defaults_on_every_finite_task():
    for task in ("bradley_terry", "nontransitive", "contextual"):
        assert composed(f"task={task}").optim == composed("optim=adam").optim


def test_the_command_line_wins_over_the_choices_a_task_or_a_model_makes():
    assert composed("task=sequence", "model=bigram").model.kind == "bigram"
    assert composed("model=bigram", "task=sequence").model.kind == "bigram"  # order on the line does not matter
    assert composed("task=sequence", "model=bigram").optim == composed("optim=adam").optim  # a table's rate
    assert composed("task=sequence", "optim.lr=0.01").optim.lr == 0.01
    assert composed("task=sequence", "train.steps=50").train.steps == 50
    assert composed("task=sequence", "optim=sgd").optim == composed("optim=sgd").optim  # sgd keeps its own


def test_an_objective_with_a_flat_link_gets_its_own_budget_on_the_transformer():
    # conf/tuning/objective/adam_transformer_divergence_jensen_shannon.yaml (figures in its comments)
    assert composed("task=sequence", "loss=divergence_jensen_shannon").train.steps == 1000
    assert composed("task=sequence").train.steps == 400
    assert composed("loss=divergence_jensen_shannon").train.steps == composed().train.steps  # the tables' own
    assert composed("task=sequence", "loss=divergence_jensen_shannon", "train.steps=50").train.steps == 50
    users = composed("task=sequence", "loss=custom", "loss.name=tests.user_objectives:winner_anchored")
    assert users.train.steps == 400


def test_a_pair_file_picks_the_transformer_at_the_rate_for_text():
    cfg = composed("task=pairs", "task.path=x.jsonl")
    assert cfg.model.kind == "transformer"
    assert cfg.optim.lr < composed("task=sequence").optim.lr  # a reference taught by sft moves at a smaller rate


@pytest.mark.parametrize("experiment, task", [("sequence", "sequence"), ("pairs", "pairs")])
def test_experiments_agree_with_the_defaults_of_their_task(experiment, task):
    from_experiment = composed(f"+experiment={experiment}", "task.path=x.jsonl" if task == "pairs" else "beta=0.5")
    from_task = composed(f"task={task}", "task.path=x.jsonl" if task == "pairs" else "beta=0.5")
    assert from_experiment.model.kind == from_task.model.kind
    assert from_experiment.optim == from_task.optim
    if experiment == "sequence":  # the same run (the pairs experiment also sets a batch size and its steps)
        assert from_experiment.train.steps == from_task.train.steps


# ------------------------------------------------------------ convergence of the defaults


def test_the_sequence_defaults_reach_the_exact_optimum(tmp_path):
    """The default model and optimiser of task=sequence (nothing else set but a smaller task and fewer
    steps: 2 prompts x 40 responses, 150 steps) reach TV <= 0.05 of the exact optimum; the full default
    task (364 responses, 400 steps) is measured by bench/defaults.py and bench/pair_sequence.py."""
    cfg = composed("task=sequence", "task.max_length=3", "train.steps=150", "train.progress=false")
    summary, screen = quiet_run(cfg, tmp_path)
    assert summary["tv_to_optimum"] <= 0.05
    assert summary["reached_optimum"] is True and summary["reached_optimum_tolerance"] == 0.05
    assert screen.rstrip().splitlines()[-1].startswith("reached_optimum: true")


@pytest.mark.slow
@pytest.mark.parametrize("loss, beta", [("divergence_jensen_shannon", 0.5), ("divergence_forward_kl", 2.0)])
def test_the_sequence_defaults_reach_the_optimum_of_a_levelling_link(tmp_path, loss, beta):
    """A pair objective whose link levels off above the reference, with every default of task=sequence
    (Adam's second-moment decay 0.9, the objective's own step budget) on the 40-response task, against
    the exact optimum of toy_tasks/exact/pairs.py (the closed form f'(pi / pi_ref) = r / beta + c of
    Wang et al. 2023, "Beyond Reverse KL", certified by its residual)."""
    cfg = composed("task=sequence", "task.max_length=3", f"loss={loss}", f"beta={beta}", "train.progress=false")
    summary, _ = quiet_run(cfg, tmp_path)
    assert summary["optimum_method"].startswith("closed form")
    assert summary["reached_optimum"] is True and summary["tv_to_optimum"] <= 0.05


@pytest.mark.parametrize("beta", [0.01, 0.1, 1.0])
def test_selfplay_defaults_reach_the_equilibrium(tmp_path, beta):
    """method=selfplay with every default (update, optimiser, 2000 steps) on the non-transitive task,
    where gradient self-play circles or collapses at small beta; against the equilibrium solved by
    mirror-prox + Newton (toy_tasks.methods.equilibrium)."""
    summary, _ = quiet_run(composed("task=nontransitive", f"beta={beta}", "method=selfplay", "train.progress=false"),
                           tmp_path)
    target = nash_equilibrium(nontransitive().reference, nontransitive().preference, tau=tau_of_beta(beta)).policy
    assert 0.5 * np.abs(np.asarray(summary["policy"]) - target).sum() <= 1e-3
    assert summary["reached_optimum"] is True
