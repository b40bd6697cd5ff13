"""The composition root of ``polopt train``: a Hydra config in, a run folder out.

This is the one place where configuration meets code: the task is built by
Hydra's ``_target_`` instantiation (so ``polopt`` never imports ``toy_tasks``
itself), the loss comes from the registry, and the plain functions of
:mod:`polopt.train` do the work. A task object only has to offer
``prepare(loss, beta=, smoothing=, mode=, n_pairs=, seed=, run_dir=)`` returning a session
with ``pairs``, ``build_policy(...)``, ``evaluate(policy)``,
``summarise(policy, result)`` and ``table(summary)``.
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path

import hydra
import torch
from hydra.core.hydra_config import HydraConfig
from hydra.utils import instantiate
from omegaconf import DictConfig, OmegaConf

from polopt import losses
from polopt.objective import validate_hyperparameters
from polopt.train import OptimConfig, train

CONFIG_DIR = Path(__file__).resolve().parent / "conf"
if not CONFIG_DIR.is_dir():  # a source checkout or editable install: conf/ beside the package
    CONFIG_DIR = Path(__file__).resolve().parent.parent / "conf"

_TASK_RUN_KEYS = ("mode", "n_pairs")  # task keys for the run, not for the task's builder


def build_loss(cfg: DictConfig) -> losses.Loss:
    """The loss named by ``loss.name`` with its parameters (every key but name and smoothing)."""
    params = {k: v for k, v in OmegaConf.to_container(cfg, resolve=True).items() if k not in ("name", "smoothing")}
    return losses.get(cfg.name, **params)


def build_task(cfg: DictConfig):
    """The task object from the ``task`` group, by its ``_target_``."""
    builder = {k: v for k, v in OmegaConf.to_container(cfg, resolve=True).items() if k not in _TASK_RUN_KEYS}
    try:
        return instantiate(builder, _convert_="all")
    except Exception as err:  # Hydra wraps the builder's own error; show the builder's words
        cause = err.__cause__ or err
        if isinstance(cause, (ValueError, TypeError)):
            raise ValueError(str(cause)) from err
        raise


def json_ready(value):
    """Numbers that JSON cannot hold (NaN, inf) become null; numpy scalars become floats."""
    if isinstance(value, dict):
        return {k: json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_ready(v) for v in value]
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        value = value.item()
    if isinstance(value, float) and value != value or value in (float("inf"), float("-inf")):
        return None
    return value


def write_json(path: Path, data: dict) -> None:
    """Write JSON atomically: a temporary file, fsync, then rename over the target."""
    tmp = path.with_suffix(path.suffix + ".tmp")
    with tmp.open("w", encoding="utf-8") as f:
        json.dump(json_ready(data), f, indent=1)
        f.write("\n")
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def run(cfg: DictConfig, run_dir: Path) -> dict:
    """Train as ``cfg`` says, write the run folder, return summary.json's content."""
    run_dir.mkdir(parents=True, exist_ok=True)
    if cfg.train.get("threads"):  # small models on shared cores run faster on one thread than on contended two
        torch.set_num_threads(int(cfg.train.threads))
    (run_dir / "config.yaml").write_text(OmegaConf.to_yaml(cfg, resolve=True), encoding="utf-8")
    loss = build_loss(cfg.loss)
    validate_hyperparameters(cfg.beta, cfg.loss.smoothing)
    task = build_task(cfg.task)
    session = task.prepare(loss, beta=float(cfg.beta), smoothing=float(cfg.loss.smoothing),
                           mode=cfg.task.mode, n_pairs=cfg.task.n_pairs, seed=cfg.train.seed, run_dir=run_dir)
    model = OmegaConf.to_container(cfg.model, resolve=True)
    policy = session.build_policy(**model)
    metrics_path = run_dir / "metrics.jsonl"
    metrics_path.unlink(missing_ok=True)
    result = train(policy, session.pairs, loss, beta=float(cfg.beta), steps=cfg.train.steps,
                   optim=OptimConfig(**OmegaConf.to_container(cfg.optim, resolve=True)),
                   smoothing=float(cfg.loss.smoothing), batch_size=cfg.train.batch_size,
                   seed=cfg.train.seed, log_every=cfg.train.log_every, evaluate=session.evaluate,
                   metrics_path=metrics_path, progress=cfg.train.progress, precision=cfg.precision)
    summary = session.summarise(policy, result)
    torch.save({"policy": policy.state_dict(), "step": result.steps,
                "config": OmegaConf.to_container(cfg, resolve=True)}, run_dir / "checkpoint.pt")
    write_json(run_dir / "summary.json", summary)
    print(session.table(summary))
    print(f"run folder: {run_dir}")
    return summary


@hydra.main(version_base="1.3", config_path=str(CONFIG_DIR), config_name="config")
def train_main(cfg: DictConfig) -> None:
    """Hydra's entry point for ``polopt train``: user errors become one line and exit code 2."""
    run_dir = Path(HydraConfig.get().runtime.output_dir)
    try:
        run(cfg, run_dir)
    except (ValueError, TypeError, FloatingPointError) as err:
        if os.environ.get("POLOPT_DEBUG"):
            raise
        print(f"polopt train: error: {err}", file=sys.stderr)
        sys.exit(2)
