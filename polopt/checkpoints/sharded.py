"""Sharded checkpoints of ``train.strategy=fsdp`` runs: torch.distributed.checkpoint (DCP), atomic, verified.

A sharded checkpoint is a folder beside the one-file ones in ``checkpoints/``::

    checkpoints/
      ckpt-00000040.dcp/
        __0_0.distcp, __1_0.distcp, .metadata   DCP: every rank's shards of the policy and the optimiser
        trainer.pt                             the rest of the state (step, batch order, RNG, history, run id)
        checksums.json                         {"files": {name: {"sha256", "bytes"}}}: every file above
      manifest.json                            lists it as {"file": "ckpt-00000040.dcp", "sharded": true,
                                               "sha256": <SHA-256 of checksums.json>, ...}

Writing (every rank): the folder is written under a temporary name (``.dcp.tmp``) by
``torch.distributed.checkpoint.save``, rank 0 adds ``trainer.pt`` and ``checksums.json``
(SHA-256, FIPS 180-4, of every file, read back), renames the folder to its final name,
fsyncs, and only then writes the manifest that lists it (:mod:`polopt.checkpoints.store`'s order:
a crash at any moment leaves the previous manifest and its checkpoints intact).

The policy and optimiser state go through ``get_state_dict``/``set_state_dict``
(torch.distributed.checkpoint.state_dict): keys are parameter names, not positions or
ranks, and DCP reshards on load. So a checkpoint written by N FSDP processes loads
into M FSDP processes, into DDP replicas, or into one plain process
(:func:`load_into`), without a process group there.
"""

from __future__ import annotations

import json
import os
import shutil
import warnings
from pathlib import Path

import torch

from polopt.checkpoints import files as ckpt

SUFFIX = ".dcp"
TRAINER = "trainer.pt"
CHECKSUMS = "checksums.json"


def name(step: int) -> str:
    return f"ckpt-{step:08d}{SUFFIX}"


def state_dicts(module: torch.nn.Module, optimiser) -> tuple[dict, dict]:
    """(policy, optimiser) state dicts keyed by parameter name: DTensor shards under FSDP."""
    from torch.distributed.checkpoint.state_dict import get_state_dict

    return get_state_dict(module, optimiser)


def _nonfinite_anywhere(state: dict) -> list[str]:
    """:func:`polopt.checkpoints.store.nonfinite_entries` of this rank's shards, agreed over all ranks."""
    import torch.distributed as dist

    local = {k: _local(state[k]) for k in ("policy", "optimiser")}
    bad = ckpt.nonfinite_entries(local)
    if dist.is_initialized():
        flag = torch.tensor([float(bool(bad))])
        dist.all_reduce(flag, op=dist.ReduceOp.MAX)
        if flag.item() and not bad:
            bad = ["another rank's shard"]
    return bad


def _local(value):
    if hasattr(value, "to_local"):
        return value.to_local()
    if isinstance(value, dict):
        return {k: _local(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_local(v) for v in value]
    return value


def _checksums(folder: Path) -> dict:
    files = {}
    for p in sorted(folder.iterdir()):
        if p.is_file() and p.name != CHECKSUMS:
            files[p.name] = {"sha256": ckpt.file_sha256(p), "bytes": p.stat().st_size}
    return {"format": ckpt.FORMAT, "files": files}


def save(directory: str | Path, state: dict, *, run_id: str, fingerprint: str, config: dict, keep: int,
         is_main: bool) -> Path:
    """Write ``state`` (:func:`polopt.checkpoints.store.training_state` with ``sharded=True``) as a sharded
    checkpoint; every rank calls it, rank 0 (``is_main``) writes all but the shards and the manifest."""
    import torch.distributed as dist
    import torch.distributed.checkpoint as dcp

    ckpt.validate_keep(keep)
    step = int(state["step"])
    ckpt.refuse_nonfinite(step, _nonfinite_anywhere(state))
    directory = Path(directory)
    final = directory / name(step)
    tmp = directory / f"{name(step)}.tmp"
    listed = ckpt.read_manifest(directory) if is_main else None
    entries = listed["checkpoints"] if listed and listed.get("run_id") == run_id else []
    previous = entries[-1]["file"] if entries else None
    try:
        if is_main:
            directory.mkdir(parents=True, exist_ok=True)
            shutil.rmtree(tmp, ignore_errors=True)
        _barrier()
        with warnings.catch_warnings():  # one plain process: DCP says it assumes so
            warnings.filterwarnings("ignore", message=r"torch.distributed is disabled")
            dcp.save({"policy": state["policy"], "optimiser": state["optimiser"]}, checkpoint_id=str(tmp))
        _barrier()
        if is_main:
            rest = {k: v for k, v in state.items() if k not in ("policy", "optimiser")}
            rest.update(run_id=run_id, fingerprint=fingerprint, config=config, sharded=True)
            with (tmp / TRAINER).open("wb") as f:
                torch.save(rest, f)
                f.flush()
                os.fsync(f.fileno())
            table = json.dumps(_checksums(tmp), indent=1).encode()
            ckpt.atomic_write(tmp / CHECKSUMS, table)
            if any(e["file"] == final.name for e in entries):  # about to be replaced: unlist it first
                entries = [e for e in entries if e["file"] != final.name]
                ckpt.write_manifest(directory, run_id, entries)
            shutil.rmtree(final, ignore_errors=True)
            os.replace(tmp, final)
            ckpt.fsync_dir(directory)
            why = problem(final, {"file": final.name, "step": step, "sha256": ckpt.sha256_hex(table)})[0]
            if why is not None:
                raise ckpt.CheckpointError(f"checkpoint {final} reads back wrong ({why}); the storage under "
                                           f"{directory} is unreliable")
            size = sum(p.stat().st_size for p in final.iterdir())
            entries = [*entries, {"file": final.name, "step": step, "sha256": ckpt.sha256_hex(table),
                                  "bytes": size, "sharded": True}][-keep:]
            ckpt.write_manifest(directory, run_id, entries)
            ckpt.prune(directory, {e["file"] for e in entries})
    except OSError as err:
        raise ckpt.write_error(err, final, previous) from err
    finally:
        if dist.is_initialized():
            dist.barrier()  # nobody goes on (or reads the manifest) before rank 0 has listed the checkpoint
    return final


def saver(directory: Path, *, run_id: str, fingerprint: str, config: dict, keep: int, is_main: bool):
    """``save(training_state)`` into ``directory`` as sharded checkpoints (every rank calls it)."""
    def write(state: dict) -> None:
        save(directory, state, run_id=run_id, fingerprint=fingerprint, config=config, keep=keep, is_main=is_main)

    return write


def _barrier() -> None:
    import torch.distributed as dist

    if dist.is_initialized():
        dist.barrier()


def problem(folder: Path, entry: dict) -> tuple[str | None, dict | None]:
    """(why the sharded checkpoint ``folder`` is unusable, None) or (None, its trainer state, with
    ``policy``/``optimiser`` None and ``sharded`` the folder: :func:`load_into` reads them)."""
    table_path = folder / CHECKSUMS
    try:
        raw = table_path.read_bytes()
    except FileNotFoundError:
        return "the folder or its checksums.json is missing", None
    except OSError as err:
        return f"cannot be read: {err.strerror}", None
    if ckpt.sha256_hex(raw) != entry["sha256"]:
        return "checksums.json differs from the one the manifest lists", None
    try:
        files = json.loads(raw)["files"]
    except (ValueError, KeyError, TypeError):
        return "checksums.json is not valid", None
    for file, want in files.items():
        path = folder / file
        if not path.is_file():
            return f"{file} is missing", None
        if path.stat().st_size != want["bytes"] or ckpt.file_sha256(path) != want["sha256"]:
            return f"{file} is truncated or altered (its size or SHA-256 differs from checksums.json)", None
    if TRAINER not in files or ".metadata" not in files:
        return f"it lacks {TRAINER} or DCP's .metadata", None
    try:
        payload = torch.load(folder / TRAINER, map_location="cpu", weights_only=True)
    except Exception as err:  # any unpickling failure means the same thing: not a usable checkpoint
        return f"torch.load(weights_only=True) refused {TRAINER}: {str(err).splitlines()[0][:120]}", None
    if not isinstance(payload, dict) or payload.get("format") != ckpt.FORMAT or payload.get("step") != entry["step"]:
        return f"{TRAINER} is not the state of step {entry['step']}", None
    return None, {**payload, "policy": None, "optimiser": None, "sharded": str(folder)}


def load_into(folder: str | Path, module: torch.nn.Module, optimiser) -> None:
    """Read the policy and optimiser state of the sharded checkpoint ``folder`` into ``module`` (plain,
    DDP-replicated or FSDP-sharded over any number of ranks) and ``optimiser``; resharded by DCP.
    A checkpoint of another model shape is a one-line ValueError and changes nothing on disk."""
    import torch.distributed.checkpoint as dcp
    from torch.distributed.checkpoint.state_dict import set_state_dict

    policy_sd, optimiser_sd = state_dicts(module, optimiser)
    expected = {k: tuple(v.shape) for k, v in policy_sd.items()}
    from torch.distributed.checkpoint import FileSystemReader

    stored = FileSystemReader(str(folder)).read_metadata().state_dict_metadata
    found = {k.removeprefix("policy."): tuple(v.size) for k, v in stored.items()
             if k.startswith("policy.") and hasattr(v, "size")}
    if found != expected:
        diff = sorted(k for k in set(found) | set(expected) if found.get(k) != expected.get(k))
        k = diff[0]
        raise ValueError(f"the checkpoint {folder} holds a policy of another shape ({len(diff)} tensors differ, "
                         f"e.g. {k}: {found.get(k)} in the checkpoint, {expected.get(k)} in this model); "
                         "give the model keys it was trained with, or a new hydra.run.dir")
    state = {"policy": policy_sd, "optimiser": optimiser_sd}
    with warnings.catch_warnings():  # one plain process: DCP says it assumes so
        warnings.filterwarnings("ignore", message=r"torch.distributed is disabled")
        dcp.load(state, checkpoint_id=str(folder))
    set_state_dict(module, optimiser, model_state_dict=state["policy"], optim_state_dict=state["optimiser"])
