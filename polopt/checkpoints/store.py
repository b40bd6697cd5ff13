"""Checkpoints of a training run: written atomically, checksummed, verified on load.

This module owns the ``checkpoints/`` folder of a run folder::

    checkpoints/
      ckpt-00000040.pt          torch.save of a plain dict (see :func:`training_state`)
      ckpt-00000040.pt.sha256   "<sha256>  ckpt-00000040.pt" (coreutils format: ``sha256sum -c`` checks it)
      manifest.json             {"format", "run_id", "checkpoints": [{"file", "step", "sha256", "bytes"}, ...]}

A checkpoint counts once ``manifest.json`` lists it. Writing goes: the bytes to a
temporary file, fsync, rename over the final name, fsync the folder; the same for
the checksum file; read the file back and compare its SHA-256 (FIPS 180-4); then
write the new manifest the same way; only then delete checkpoints beyond the last
``keep``. A crash or a full disk at any moment therefore leaves the previous
manifest and every checkpoint it lists intact.

Loading walks the manifest newest first and takes the first checkpoint whose size
and SHA-256 match and which ``torch.load(weights_only=True)`` reads (tensors and
plain containers only; nothing in a checkpoint can run code); each one it passes
over gets a one-line warning naming the file and why. Without a readable manifest
it falls back to the checksum files beside the checkpoints.

The payload holds everything a bit-identical resume needs (common practice):
model, optimiser and scheduler state dicts, the step, the batch-order generator's
state with the current order and cursor, torch's global RNG state, the logged
history and the skipped steps. A resumed run then ends bit-identical to an
uninterrupted one (tests/test_checkpoint.py, tests/test_kill_resume.py) on the same
machine, torch version and thread count. Where that cannot hold: another torch
version or CPU (kernels differ by instruction set, bf16 most visibly); another
number of intra-op threads for tensors large enough to be split (summation order);
GPUs without deterministic algorithms; any source of randomness outside torch's
global RNG and the batch-order generator (a new one must be added to the payload).
Wall-clock ``seconds`` differ by nature.
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import json
import re
import sys
from collections.abc import Callable
from pathlib import Path

import torch

from polopt.checkpoints import sharded as sharded_checkpoint
from polopt.checkpoints.files import (
    _NAME,
    FORMAT,
    MANIFEST,
    CheckpointError,
    _parse_manifest,
    atomic_write,
    checkpoint_name,
    nonfinite_entries,
    prune,
    read_manifest,
    refuse_nonfinite,
    sha256_hex,
    validate_keep,
    write_error,
    write_manifest,
)

_PAYLOAD_KEYS = ("format", "step", "policy", "optimiser", "scheduler", "generator", "torch_rng", "order",
                 "cursor", "history", "skipped", "seconds", "run_id", "fingerprint", "config")










def fingerprint(config: dict, *tensors: torch.Tensor) -> str:
    """SHA-256 of a config (as canonical JSON) and the bytes of some tensors (the training data),
    so that a resume can tell whether it continues the same run."""
    digest = hashlib.sha256(json.dumps(config, sort_keys=True, default=str).encode())
    for t in tensors:
        if t is not None:
            digest.update(str((t.dtype, tuple(t.shape))).encode())
            digest.update(t.detach().cpu().contiguous().view(torch.uint8).numpy().tobytes())
    return digest.hexdigest()


# ----------------------------------------------------------------------------
# The payload
# ----------------------------------------------------------------------------


def training_state(*, step: int, policy: torch.nn.Module, optimiser, scheduler, generator: torch.Generator,
                   order: torch.Tensor, cursor: int, history: list[dict], skipped: list[int],
                   seconds: float, sharded: bool = False, convergence: dict | None = None) -> dict:
    """The trainer's whole state after ``step`` as a plain dict of tensors and containers; ``sharded``
    (train.strategy=fsdp): the policy and optimiser entries are this rank's shards, keyed by parameter
    name (:mod:`polopt.checkpoints.sharded` writes them). ``convergence``: the early-stopping window
    (:meth:`polopt.training.stopping.Convergence.state`, with ``stopped`` once the run has stopped on ``train.tol``)."""
    if sharded:
        model_state, optimiser_state = sharded_checkpoint.state_dicts(policy, optimiser)
    else:
        model_state, optimiser_state = policy.state_dict(), optimiser.state_dict()
    return {"format": FORMAT, "step": step, "policy": model_state, "optimiser": optimiser_state,
            "scheduler": scheduler.state_dict(), "generator": generator.get_state(),
            "torch_rng": torch.get_rng_state(), "order": order.clone(), "cursor": cursor,
            "history": [dict(r) for r in history], "skipped": list(skipped), "seconds": seconds,
            "convergence": dict(convergence or {})}


def restore_training_state(state: dict, *, policy: torch.nn.Module, optimiser, scheduler,
                           generator: torch.Generator) -> dict:
    """Load ``state`` into the given objects; return the loop variables
    (step, order, cursor, history, skipped, seconds, convergence: {} in checkpoints that predate it)."""
    try:
        if state.get("sharded"):  # a sharded checkpoint's folder: DCP reads it into any layout
            sharded_checkpoint.load_into(state["sharded"], policy, optimiser)
        else:
            policy.load_state_dict(state["policy"])
            optimiser.load_state_dict(state["optimiser"])
        scheduler.load_state_dict(state["scheduler"])
        generator.set_state(state["generator"])
        torch.set_rng_state(state["torch_rng"])
    except (RuntimeError, KeyError, ValueError, TypeError) as err:
        raise ValueError(f"the checkpoint of step {state.get('step')} does not fit this model and optimiser: "
                         f"{str(err).strip().splitlines()[0][:160]}") from err
    return {**{k: state[k] for k in ("step", "order", "cursor", "history", "skipped", "seconds")},
            "convergence": state.get("convergence") or {}}




# ----------------------------------------------------------------------------
# Writing
# ----------------------------------------------------------------------------










def save(directory: str | Path, state: dict, *, run_id: str, fingerprint: str, config: dict,
         keep: int = 2) -> Path:
    """Write ``state`` (from :func:`training_state`) as the newest checkpoint of run ``run_id``.

    Refuses (FloatingPointError) a state whose parameters or optimiser moments are not finite.
    Entries of another run id are dropped from the manifest once the new checkpoint is in;
    at most ``keep`` checkpoints stay. Raises :class:`CheckpointError` when writing fails.
    """
    validate_keep(keep)
    step = int(state["step"])
    refuse_nonfinite(step, nonfinite_entries(state))
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    payload = {**state, "run_id": run_id, "fingerprint": fingerprint, "config": config}
    buffer = io.BytesIO()
    torch.save(payload, buffer)
    data = buffer.getvalue()
    digest = sha256_hex(data)
    name = checkpoint_name(step)
    path = directory / name

    listed = read_manifest(directory)
    entries = listed["checkpoints"] if listed and listed.get("run_id") == run_id else []
    previous = entries[-1]["file"] if entries else None
    try:
        if any(e["file"] == name for e in entries):  # about to be replaced: unlist it first
            entries = [e for e in entries if e["file"] != name]
            write_manifest(directory, run_id, entries)
        atomic_write(path, data)
        atomic_write(directory / f"{name}.sha256", f"{digest}  {name}\n".encode())
        if sha256_hex(path.read_bytes()) != digest:
            raise CheckpointError(f"checkpoint {path} reads back with a different SHA-256 than was written; "
                                  f"the storage under {directory} is unreliable")
        entries = [*entries, {"file": name, "step": step, "sha256": digest, "bytes": len(data)}][-keep:]
        write_manifest(directory, run_id, entries)
    except OSError as err:
        raise write_error(err, path, previous) from err
    prune(directory, {e["file"] for e in entries})
    return path






# ----------------------------------------------------------------------------
# Reading
# ----------------------------------------------------------------------------






def _from_checksum_files(directory: Path) -> list[dict]:
    """Candidates from the ``.sha256`` files, newest step first (used without a manifest)."""
    found = []
    for p in directory.glob("ckpt-*.pt.sha256"):
        m = _NAME.match(p.name.removesuffix(".sha256"))
        try:
            digest, _, file = p.read_text(encoding="ascii").strip().partition("  ")
        except (OSError, UnicodeDecodeError):
            continue
        if m and file == m.group(0) and re.fullmatch(r"[0-9a-f]{64}", digest):
            found.append({"file": file, "step": int(m.group(1)), "sha256": digest, "bytes": None})
    return sorted(found, key=lambda e: e["step"], reverse=True)


def _problem(path: Path, entry: dict) -> tuple[str | None, dict | None]:
    """(why ``path`` is unusable, None) or (None, its payload)."""
    if entry.get("sharded") or path.name.endswith(".dcp"):
        return sharded_checkpoint.problem(path, entry)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        return "the file is missing", None
    except OSError as err:
        return f"cannot be read: {err.strerror}", None
    if entry["bytes"] is not None and len(data) != entry["bytes"]:
        return f"truncated or grown: {len(data)} bytes, the manifest says {entry['bytes']} bytes", None
    digest = sha256_hex(data)
    if digest != entry["sha256"]:
        return f"checksum mismatch: SHA-256 {digest[:12]}..., expected {entry['sha256'][:12]}...", None
    try:
        payload = torch.load(io.BytesIO(data), map_location="cpu", weights_only=True)
    except Exception as err:  # any unpickling failure means the same thing: not a usable checkpoint
        return f"torch.load(weights_only=True) refused it: {str(err).splitlines()[0][:120]}", None
    if not isinstance(payload, dict) or payload.get("format") != FORMAT:
        return "not a polopt checkpoint of format 1", None
    missing = [k for k in _PAYLOAD_KEYS if k not in payload]
    if missing:
        return f"missing entries {missing}", None
    if payload["step"] != entry["step"]:
        return f"holds step {payload['step']}, the manifest says {entry['step']}", None
    bad = nonfinite_entries(payload)
    if bad:
        return f"holds non-finite values in {', '.join(bad[:3])}", None
    return None, payload


def _warn(message: str) -> None:
    print(f"polopt: warning: {message}", file=sys.stderr)


def load_latest(directory: str | Path, *, warn: Callable[[str], None] = _warn) -> dict | None:
    """The newest usable checkpoint's payload in ``directory``, or None when there is none.

    Every checkpoint passed over gets one ``warn`` line naming the file and why.
    """
    directory = Path(directory)
    if not directory.is_dir():
        return None
    try:
        manifest = _parse_manifest(directory)
    except ValueError as err:
        manifest = None
        warn(f"checkpoint manifest {directory / MANIFEST} is unusable ({err}); using the checksum files instead")
    if manifest is not None:
        candidates = list(reversed(manifest["checkpoints"]))
    else:
        candidates = _from_checksum_files(directory)
    for k, entry in enumerate(candidates):
        path = directory / entry["file"]
        why, payload = _problem(path, entry)
        if why is None:
            return payload
        nxt = f"falling back to {candidates[k + 1]['file']}" if k + 1 < len(candidates) else \
            "no earlier checkpoint is left; starting from step 0"
        warn(f"checkpoint {path} is unusable ({why}); {nxt}")
    return None


@contextlib.contextmanager
def exclusive(run_dir: str | Path):
    """Hold an exclusive lock on ``run_dir`` (``run_dir/.lock``, flock) while the block runs, so that two
    processes never train into one run folder at once; the system drops the lock when a process dies,
    even by SIGKILL."""
    try:
        import fcntl
    except ImportError:  # not POSIX (Windows): no lock, one process per run folder is up to the user
        yield
        return
    run_dir = Path(run_dir)
    run_dir.mkdir(parents=True, exist_ok=True)
    with (run_dir / ".lock").open("a") as handle:
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError as err:
            raise ValueError(f"another polopt train is running in {run_dir}; wait for it to end or give "
                             "another hydra.run.dir") from err
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def list_checkpoints(directory: str | Path) -> list[dict]:
    """The manifest's entries (oldest first), each with ``ok`` and ``problem`` from a full verification."""
    directory = Path(directory)
    manifest = read_manifest(directory)
    out = []
    for entry in manifest["checkpoints"] if manifest else _from_checksum_files(directory)[::-1]:
        why, _ = _problem(directory / entry["file"], entry)
        out.append({**entry, "ok": why is None, "problem": why})
    return out
