"""The composed Hydra config (compose API, as Hydra's docs recommend for tests)."""

from pathlib import Path

import pytest
from hydra import compose, initialize_config_dir

from polopt import losses
from polopt.commands.config import CONFIG_DIR, build_task
from polopt.commands.train import build_loss

ROOT = Path(__file__).resolve().parents[2]


def composed(*overrides):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose("config", overrides=list(overrides))


def test_config_dir_is_the_projects_conf():
    assert CONFIG_DIR == ROOT / "conf"


def test_defaults():
    cfg = composed()
    assert cfg.loss.name == "logistic" and cfg.task.mode == "exact" and cfg.model.kind == "tabular"
    assert cfg.beta == 0.5 and cfg.precision == "fp32" and cfg.train.steps == 2000


@pytest.mark.parametrize("option", sorted(p.stem for p in (CONFIG_DIR / "loss").glob("*.yaml") if p.stem != "custom"))
def test_every_loss_option_names_a_registered_loss(option):
    cfg = composed(f"loss={option}")
    assert cfg.loss.name in losses.names()  # a margin loss, a pair objective or a group objective
    assert build_loss(cfg.loss).name == option


@pytest.mark.parametrize("option", sorted(p.stem for p in (CONFIG_DIR / "task").glob("*.yaml")
                                          if p.stem not in ("file", "pairs")))  # both need a file
def test_every_task_option_builds(option):
    task = build_task(composed(f"task={option}").task)
    finite = getattr(task, "finite", task)  # an enumerable sequence task offers its finite form
    assert finite.win_weights().sum() == pytest.approx(1.0)


def test_loss_parameters_come_from_the_group():
    loss = build_loss(composed("loss=huber", "loss.delta=0.25").loss)
    assert loss.params == {"delta": 0.25}
