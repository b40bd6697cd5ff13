"""The composition root of ``polopt train``: a Hydra config in, a run folder out.

This is the one place where configuration meets code: the task is built by
Hydra's ``_target_`` instantiation (so ``polopt`` never imports ``toy_tasks``
itself), the loss comes from the registry, the one training loop
(:func:`polopt.training.loop.optimise`) does the work and :class:`polopt.training.run_folder.RunFolder`
writes what it leaves. A task satisfies :class:`polopt.training.contracts.Task`: ``prepare(loss,
beta=, smoothing=, mode=, n_pairs=, seed=, run_dir=)`` returns a
:class:`polopt.training.contracts.Session`.

Rerunning the same command with the same ``hydra.run.dir`` resumes from the
newest good checkpoint in its ``checkpoints/`` folder (``train.resume=false``
starts over); ``metrics.jsonl`` is then rewritten from the checkpoint's history,
so it keeps exactly one line per logged step. A task's ``_target_`` must name a
builder in ``toy_tasks`` or ``polopt``: a config file cannot make the kit import
or call anything else (a user loss comes only from ``loss.name=pkg.module:name``).
"""

from __future__ import annotations

import contextlib
import sys
import uuid
from pathlib import Path

import hydra
import torch
from hydra.core.hydra_config import HydraConfig
from omegaconf import DictConfig, OmegaConf

from polopt import losses
from polopt.checkpoints import sharded as sharded_checkpoint
from polopt.checkpoints import store as checkpoint
from polopt.commands import runs
from polopt.commands.config import CONFIG_DIR, build_task
from polopt.commands.errors import Escape
from polopt.losses.reduce import validate_hyperparameters
from polopt.methods.dispatch import method_objective
from polopt.models.compiling import compile_policy
from polopt.parallel import devices, distributed
from polopt.training.contracts import (
    MethodView,
    Session,
    method_view,
    pretrained_saver,
    session_threads,
    session_tol,
    task_for_model,
    trains_on_gpu,
)
from polopt.training.loop import GroupBatches, MethodBatches, PairBatches, TrainSettings, optimise
from polopt.training.optim import OptimConfig
from polopt.training.run_folder import RunFolder, run_summary
from polopt.training.verdict import reached_line

# keys that change how a run is kept, not what it computes: a resume may change them
# (steps: a finished run continues when train.steps is raised; strategy: a sharded checkpoint resumes on ddp)
_RESUME_FREE_KEYS = ("progress", "resume", "keep_checkpoints", "checkpoint_every", "threads", "device", "steps",
                     "strategy")


def build_loss(cfg: DictConfig) -> losses.MarginLoss | losses.PairLoss:
    """The margin loss or pair objective named by ``loss.name`` with its parameters (every key but
    name and smoothing); see :mod:`polopt.losses.registry`."""
    params = {k: v for k, v in OmegaConf.to_container(cfg, resolve=True).items() if k not in ("name", "smoothing")}
    return losses.resolve(cfg.name, **params)


_MISSING_HINTS = {
    "task.path": "task=file needs task.path=PATH to a JSON task file; task=pairs needs task.path=PATH to a pair "
                 "file (JSONL, CSV, Parquet or a saved dataset folder)",
    "loss.name": "loss=custom needs loss.name=pkg.module:function (an elementwise f(x) or a pair objective "
                 "f(pair, beta))",
    "model.path": "model=local_lm needs model.path=DIR, a local folder saved by a transformers causal LM",
}


def check_complete(cfg: DictConfig) -> None:
    """Raise one ValueError naming every ``???`` value the user still has to give."""
    missing = sorted(OmegaConf.missing_keys(cfg))
    if missing:
        raise ValueError("; ".join(_MISSING_HINTS.get(k, f"{k} has no value; give {k}=VALUE") for k in missing))


def resume_config(config: dict) -> dict:
    """The part of the resolved config a resume must match (all but :data:`_RESUME_FREE_KEYS`)."""
    return {**config, "train": {k: v for k, v in config.get("train", {}).items() if k not in _RESUME_FREE_KEYS}}


def _changed_keys(old: dict, new: dict, prefix: str = "") -> list[str]:
    out = []
    for key in sorted(set(old) | set(new), key=str):
        a, b = old.get(key), new.get(key)
        if isinstance(a, dict) and isinstance(b, dict):
            out += _changed_keys(a, b, f"{prefix}{key}.")
        elif a != b:
            out.append(f"{prefix}{key}: {a!r} -> {b!r}")
    return out


def resume_state(cfg: DictConfig, directory: Path, fingerprint: str) -> dict | None:
    """The newest good checkpoint in ``directory`` if ``train.resume`` and it continues this very run;
    a ValueError naming the changed keys when it belongs to another configuration or data."""
    if not cfg.train.resume:
        return None
    state = checkpoint.load_latest(directory)
    if state is None or state["fingerprint"] == fingerprint:
        return state
    changed = _changed_keys(state["config"], resume_config(OmegaConf.to_container(cfg, resolve=True)))
    what = "; ".join(changed[:4]) if changed else "the training data differ"
    raise ValueError(f"the run folder's checkpoints ({directory}) belong to another run ({what}); "
                     "give a new hydra.run.dir, or train.resume=false to start over there")


def train_settings(cfg: DictConfig, device: torch.device | str = "cpu", main: bool = True,
                   tol: float | None = None) -> TrainSettings:
    """The training loop's settings from the config (the progress bar on rank 0 only); ``tol``: the
    task's early-stopping tolerance, used when ``train.tol`` is null."""
    return TrainSettings(steps=cfg.train.steps, beta=float(cfg.beta),
                         optim=OptimConfig(**OmegaConf.to_container(cfg.optim, resolve=True)),
                         smoothing=float(cfg.loss.smoothing), batch_size=cfg.train.batch_size, seed=cfg.train.seed,
                         log_every=cfg.train.log_every, precision=cfg.precision,
                         checkpoint_every=cfg.train.checkpoint_every, on_nonfinite=cfg.train.on_nonfinite,
                         bucketing=cfg.train.get("bucketing", True), progress=cfg.train.progress and main,
                         device=device, share_prompt=cfg.train.get("share_prompt", True),
                         tol=tol if cfg.train.get("tol") is None else cfg.train.tol)


def prepare_session(cfg: DictConfig, run_dir: Path, context: distributed.Context) -> tuple[losses.MarginLoss, Session]:
    """The loss and the task's session for this run (rank 0 first: it may write caches in the run folder)."""
    loss = build_loss(cfg.loss)
    validate_hyperparameters(cfg.beta, cfg.loss.smoothing)
    task = task_for_model(build_task(cfg.task), OmegaConf.to_container(cfg.model, resolve=True))
    with distributed.main_first(context):  # rank 0 writes any cache in the run folder before the others read it
        groups = {k: cfg.task[k] for k in ("feedback", "group_size") if k in cfg.task}  # finite tasks only
        session = task.prepare(loss, beta=float(cfg.beta), smoothing=float(cfg.loss.smoothing),
                               mode=cfg.task.mode, n_pairs=cfg.task.n_pairs, seed=cfg.train.seed, run_dir=run_dir,
                               **groups)
    threads = cfg.train.get("threads") or session_threads(session)
    if threads:  # tiny finite-task tensors run fastest on one thread; a pool only adds overhead
        torch.set_num_threads(int(threads))
    return loss, session


def method_of(cfg: DictConfig, session: Session, context: distributed.Context,
              device: torch.device) -> tuple[dict, MethodView | None]:
    """The ``method`` group and the session's view for it (None where the task offers none), checked
    against the task, the number of processes and the device."""
    method = OmegaConf.to_container(cfg.method, resolve=True) if "method" in cfg else {"name": "offline"}
    view = method_view(session, method)  # environment, exact target
    name = method["name"]
    if name != "offline" and view is None:
        raise ValueError(f"method={name} needs a task that offers it (the finite tasks do); "
                         "this task trains with method=offline only")
    if name != "offline" and context.active:
        raise ValueError(f"method={name} runs on one process; torchrun trains method=offline only")
    if device.type != "cpu" and (name != "offline" or not trains_on_gpu(session)):
        raise ValueError(f"train.device={cfg.train.device} trains task=pairs with method=offline; this task "
                         "and method are small enough for the CPU: use train.device=cpu")
    return method, view


def objective_of(method: dict, view: MethodView | None, session: Session, policy: torch.nn.Module,
                 loss: losses.MarginLoss, settings: TrainSettings, context: distributed.Context):
    """(the batch objective of this run, the per-step evaluation): the loss on the session's pairs,
    or the method's objective on the view's environment."""
    settings.check()
    if method["name"] == "offline" and hasattr(session, "groups"):  # task.feedback beyond pairs, or a group objective
        return GroupBatches(policy, session.groups, session.loss, settings, context), session.evaluate
    if method["name"] == "offline":
        return PairBatches(policy, session.pairs, loss, settings, context), session.evaluate
    loss = losses.resolve_margin(method.get("loss", "squared"))
    step = method_objective(method, policy, view.environment(), loss=loss,
                            beta=settings.beta, target=view.target_tensor(), seed=settings.seed)
    return MethodBatches(step, method["name"]), view.evaluate


def training_data(session: Session, policy: torch.nn.Module) -> tuple:
    """The tensors a run trains on, for its checkpoints' fingerprint: the session's groups, or its pairs."""
    if hasattr(session, "groups"):
        return session.groups.identity()
    p = session.pairs
    # lengths of index pairs are data of their own (a task file's "lengths"); token pairs' follow from the tokens
    lengths = () if getattr(policy, "pad_id", None) is not None else (getattr(p, "len_winner", None),
                                                                       getattr(p, "len_loser", None))
    return p.identity() if hasattr(p, "identity") else (p.prompt, p.winner, p.loser, p.reference_winner,
                                                         p.reference_loser, p.weight, *lengths)  # identity: streamed


def run(cfg: DictConfig, run_dir: Path, context: distributed.Context = distributed.SINGLE,
        device: torch.device | None = None) -> dict:
    """Train as ``cfg`` says, write the run folder, return summary.json's content.

    Offline losses and methods take the same path through the one training loop and the one run-folder
    writer; offline runs checkpoint and resume, method runs start over and leave ``policy.pt``.
    With several processes (``context``, from torchrun) every rank trains and only rank 0 writes.
    ``device``: where the training loop runs (``train.device`` resolved; None: resolve it here)."""
    check_complete(cfg)
    if device is None:
        device = devices.resolve(cfg.train.get("device"), local_rank=context.local_rank,
                                 processes=context.world_size)
    folder = RunFolder(run_dir, main=context.is_main)
    folder.write_config(OmegaConf.to_yaml(cfg, resolve=True))
    loss, session = prepare_session(cfg, run_dir, context)
    method, view = method_of(cfg, session, context, device)
    offline = method["name"] == "offline"
    policy = session.build_policy(**OmegaConf.to_container(cfg.model, resolve=True))
    if cfg.train.get("compile", False):
        compile_policy(policy)
    # the checkpoints of this run: same resume-relevant config and the same pairs, bit for bit
    config = resume_config(OmegaConf.to_container(cfg, resolve=True))
    fingerprint = checkpoint.fingerprint(config, *training_data(session, policy))
    checkpoint.validate_keep(cfg.train.keep_checkpoints)
    state = resume_state(cfg, folder.checkpoints, fingerprint)
    distributed.barrier(context)  # every rank has read the same checkpoint before rank 0 writes a new one
    state = state if offline else None  # method runs are short and start over; they do not resume
    if state is not None and context.is_main:
        print(f"polopt train: resuming from {folder.checkpoints / checkpoint.checkpoint_name(state['step'])} "
              f"(step {state['step']} of {cfg.train.steps})", file=sys.stderr)
    keys = dict(run_id=state["run_id"] if state is not None else uuid.uuid4().hex, fingerprint=fingerprint,
                config=config, keep=cfg.train.keep_checkpoints)
    save = None if not offline else folder.checkpoint_saver(**keys)
    if offline and context.sharded:  # train.strategy=fsdp: every rank writes its shards
        save = sharded_checkpoint.saver(folder.checkpoints, is_main=context.is_main, **keys)
    settings = train_settings(cfg, device, context.is_main, tol=session_tol(session))
    objective, evaluate = objective_of(method, view, session, policy, loss, settings, context)
    metrics_path = folder.start_metrics(None if state is None else state["history"])
    policy.to(device)  # the training loop only; the summary and the files below work on the CPU
    result = optimise(policy, objective, settings, evaluate=evaluate, metrics_path=metrics_path,
                      save_checkpoint=save, resume=state, context=context)
    policy.to("cpu")
    if not offline:
        folder.write_policy(policy, result.steps, config)
    summary = run_summary(session, view, policy, result, method=method["name"], context=context)
    summary.setdefault("reached_optimum", None)  # no exact optimum known (e.g. task=pairs)
    if context.is_main:
        folder.write_summary(summary)  # first: a failure to save the policy below never loses the summary
        folder.write_pretrained(pretrained_saver(session), policy)  # model=local_lm: RUN/policy/
        print((session if offline else view).table(summary))
        print(f"run folder: {run_dir}")
        print(reached_line(summary))  # the verdict last, where the eye lands
    return summary


def precheck(cfg: DictConfig) -> None:
    """The refusals that need no task (missing values, the loss, beta): before any folder is made."""
    plain = OmegaConf.masked_copy(cfg, [k for k in cfg if k != "hydra"])
    check_complete(plain)
    runs.check_sweep(cfg)
    build_loss(plain.loss)
    validate_hyperparameters(plain.beta, plain.loss.smoothing)


@hydra.main(version_base="1.3", config_path=str(CONFIG_DIR), config_name="config")
def train_main(cfg: DictConfig) -> float | None:
    """Hydra's entry point for ``polopt train``: errors are carried past Hydra's own report to the
    commands' error boundary (:mod:`polopt.commands.errors`); a run refused before training leaves no folder.
    Returns what a tuned sweep minimises (:func:`polopt.commands.runs.sweep_objective`)."""
    run_dir = Path(HydraConfig.get().runtime.output_dir)
    try:
        context = distributed.from_environment()
        device = devices.resolve(cfg.train.get("device"), local_rank=context.local_rank, processes=context.world_size)
        if device.type == "cuda":
            torch.cuda.set_device(device)
        strategy = distributed.with_strategy(context, cfg.train.get("strategy")).strategy  # fsdp: under torchrun
        context = distributed.with_strategy(distributed.setup(backend=devices.process_group_backend(device)), strategy)
        # every rank uses rank 0's folder (a ${now:...} in hydra.run.dir may differ between processes)
        run_dir = distributed.broadcast_path(run_dir, context)
        with checkpoint.exclusive(run_dir) if context.is_main else contextlib.nullcontext():
            summary = run(cfg, run_dir, context, device)
        distributed.teardown(context)
        runs.record(HydraConfig.get().overrides.task, run_dir, summary)
        return runs.sweep_objective(cfg, summary)
    except KeyboardInterrupt:
        print(f"polopt train: interrupted; rerun the same command to resume from the newest checkpoint in "
              f"{run_dir / 'checkpoints'}", file=sys.stderr)
        sys.exit(130)
    except Exception as err:
        runs.discard(run_dir)
        raise Escape(err) from err




def main(argv: list[str]) -> int:
    """The ``polopt train`` subcommand: the overrides checked and the run folder fixed (:mod:`polopt.commands.runs`),
    then Hydra's entry point; a sweep (``-m``) ends with one table of its runs."""
    plan = runs.plan(argv)
    for cfg in plan.configs if plan.folder is not None else ():  # (not for --cfg / --info: nothing runs)
        precheck(cfg)
    sys.argv = ["polopt train", *plan.argv]
    train_main()
    if plan.multirun:
        print(runs.sweep_table(plan))
    return 0
