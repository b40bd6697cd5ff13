"""The files of a ``checkpoints/`` folder: names, SHA-256 checksums, atomic writes, the manifest.

The primitives :mod:`polopt.checkpoints.store` (whole training states in one file) and
:mod:`polopt.checkpoints.sharded` (folders written by torch.distributed.checkpoint) both stand on;
see :mod:`polopt.checkpoints.store` for the folder's layout and the order of writes.
"""

from __future__ import annotations

import errno
import hashlib
import json
import math
import os
import re
import shutil
from pathlib import Path

import torch

FORMAT = 1
MANIFEST = "manifest.json"
_NAME = re.compile(r"^ckpt-(\d+)\.(?:pt|dcp)$")  # .dcp: a sharded checkpoint folder
_CHUNK = 1 << 20
class CheckpointError(Exception):
    """A checkpoint could not be written (the message is one line and says what to do)."""


def checkpoint_name(step: int) -> str:
    return f"ckpt-{step:08d}.pt"


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def file_sha256(path: Path) -> str:
    """SHA-256 of a file, read in chunks (a shard may be larger than memory should hold twice)."""
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(_CHUNK), b""):
            digest.update(block)
    return digest.hexdigest()


def nonfinite_entries(state: dict) -> list[str]:
    """Paths like ``policy.scores`` of the floating tensors in ``state`` holding NaN or infinity."""
    found: list[str] = []

    def walk(value, path: str) -> None:
        if isinstance(value, torch.Tensor):
            if value.is_floating_point() and not bool(torch.isfinite(value).all()):
                found.append(path)
        elif isinstance(value, dict):
            for k, v in value.items():
                walk(v, f"{path}.{k}" if path else str(k))
        elif isinstance(value, (list, tuple)):
            for i, v in enumerate(value):
                walk(v, f"{path}[{i}]")
        elif isinstance(value, float) and not math.isfinite(value):
            found.append(path)

    walk({k: state[k] for k in ("policy", "optimiser") if k in state}, "")
    return found


def fsync_dir(directory: Path) -> None:
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def atomic_write(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` so that ``path`` holds either its old content or all of
    ``data``, never a part: a temporary file in the same folder, fsync, rename, fsync the folder.
    Raises OSError (the temporary file is removed)."""
    tmp = path.with_name(f"{path.name}.{os.getpid()}.tmp")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
    try:
        view = memoryview(data)
        while view:
            written = os.write(fd, view[:_CHUNK])
            view = view[written:]
        os.fsync(fd)
    except BaseException:
        os.close(fd)
        tmp.unlink(missing_ok=True)
        raise
    os.close(fd)
    os.replace(tmp, path)
    fsync_dir(path.parent)


def write_error(err: OSError, path: Path, previous: str | None) -> CheckpointError:
    kept = f"the previous checkpoint {previous} is intact" if previous else "no earlier checkpoint exists"
    if err.errno in (errno.ENOSPC, errno.EDQUOT):
        what = "the disk is full" if err.errno == errno.ENOSPC else "the disk quota is exceeded"
        return CheckpointError(f"cannot write checkpoint {path}: {what} ({err.strerror}) in {path.parent}; "
                               f"{kept}; free some space and rerun the same command to resume")
    return CheckpointError(f"cannot write checkpoint {path}: {err.strerror or err}; {kept}")


def validate_keep(keep) -> None:
    if not isinstance(keep, int) or isinstance(keep, bool) or keep < 1:
        raise ValueError(f"train.keep_checkpoints must be an integer >= 1, got {keep!r}")


def write_manifest(directory: Path, run_id: str, entries: list[dict]) -> None:
    text = json.dumps({"format": FORMAT, "run_id": run_id, "checkpoints": entries}, indent=1) + "\n"
    atomic_write(directory / MANIFEST, text.encode())


def prune(directory: Path, keep: set[str]) -> None:
    """Delete checkpoints (and their checksum files) not in ``keep``, and stale temporary files."""
    for p in directory.iterdir():
        base = p.name.removesuffix(".sha256")
        stale_tmp = p.name.endswith(".tmp") and (p.name.startswith("ckpt-") or p.name.startswith(MANIFEST))
        if stale_tmp or (_NAME.match(base) and base not in keep):
            try:
                if p.is_dir():
                    shutil.rmtree(p)
                else:
                    p.unlink()
            except OSError:  # pruning is housekeeping; a leftover file costs only space
                pass


def read_manifest(directory: Path) -> dict | None:
    """The manifest, or None when it is missing or not a valid one (the reason is not needed here)."""
    try:
        return _parse_manifest(directory)
    except ValueError:
        return None


def _parse_manifest(directory: Path) -> dict | None:
    path = directory / MANIFEST
    if not path.is_file():
        return None
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError, RecursionError) as err:
        raise ValueError(f"not valid JSON ({type(err).__name__})") from err
    ok = (isinstance(data, dict) and data.get("format") == FORMAT and isinstance(data.get("run_id"), str)
          and isinstance(data.get("checkpoints"), list)
          and all(isinstance(e, dict) and isinstance(e.get("file"), str) and _NAME.match(e["file"])
                  and isinstance(e.get("step"), int) and isinstance(e.get("sha256"), str)
                  and isinstance(e.get("bytes"), int) for e in data["checkpoints"]))
    if not ok:
        raise ValueError("not a polopt checkpoint manifest of format 1")
    return data


def refuse_nonfinite(step: int, bad: list[str]) -> None:
    """Raise FloatingPointError naming the entries (``bad``, from :func:`nonfinite_entries`) of the state at
    ``step`` that hold NaN or infinity: such a state is never written as a checkpoint."""
    if bad:
        raise FloatingPointError(f"not writing a checkpoint at step {step}: {', '.join(bad[:5])} "
                                 "hold non-finite values (NaN or infinity)")
