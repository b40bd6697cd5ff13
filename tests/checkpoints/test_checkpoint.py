"""polopt.checkpoints.store: atomic writes, checksums, fallback to the last good checkpoint, full disk,
safe loading, and bit-identical resume of polopt.training.loop.train.

Checksums are SHA-256 (FIPS 180-4) as computed by Python's hashlib; the ``.sha256`` files follow
GNU coreutils' ``sha256sum`` line format ("<hex>  <name>").
"""

from __future__ import annotations

import copy
import errno
import hashlib
import io
import json
import os
import re

import pytest
import torch
from helpers_resume import SETUPS, assert_same_state, build, run_steps, without_seconds

from polopt.checkpoints import store as checkpoint
from polopt.training.loop import TrainSettings, train


def _state(step: int, value: float = 1.0) -> dict:
    policy = torch.nn.Linear(2, 1)
    torch.nn.init.constant_(policy.weight, value)
    optimiser = torch.optim.Adam(policy.parameters())
    scheduler = torch.optim.lr_scheduler.ConstantLR(optimiser, factor=1.0, total_iters=0)
    return checkpoint.training_state(step=step, policy=policy, optimiser=optimiser, scheduler=scheduler,
                                     generator=torch.Generator().manual_seed(0), order=torch.arange(3), cursor=0,
                                     history=[{"step": step, "loss": value}], skipped=[], seconds=0.0)


def _save(d, step, value=1.0, keep=2, run_id="run"):
    return checkpoint.save(d, _state(step, value), run_id=run_id, fingerprint="f", config={"beta": 0.5}, keep=keep)


def _no_warning(message):
    raise AssertionError(f"unexpected warning: {message}")


class TestWriting:
    def test_layout_manifest_and_checksums(self, tmp_path):
        for step in (2, 4, 6):
            _save(tmp_path, step)
        names = sorted(p.name for p in tmp_path.iterdir())
        # keep=2: the oldest is gone, nothing temporary is left behind
        assert names == ["ckpt-00000004.pt", "ckpt-00000004.pt.sha256", "ckpt-00000006.pt",
                         "ckpt-00000006.pt.sha256", "manifest.json"]
        manifest = json.loads((tmp_path / "manifest.json").read_text())
        assert [e["step"] for e in manifest["checkpoints"]] == [4, 6]
        for entry in manifest["checkpoints"]:
            data = (tmp_path / entry["file"]).read_bytes()
            assert entry["sha256"] == hashlib.sha256(data).hexdigest() and entry["bytes"] == len(data)
            line = (tmp_path / f"{entry['file']}.sha256").read_text()
            assert line == f"{entry['sha256']}  {entry['file']}\n"  # sha256sum's format

    def test_newest_loads_with_its_values(self, tmp_path):
        _save(tmp_path, 2, value=2.0)
        _save(tmp_path, 4, value=4.0)
        state = checkpoint.load_latest(tmp_path, warn=_no_warning)
        assert state["step"] == 4 and torch.equal(state["policy"]["weight"], torch.full((1, 2), 4.0))
        assert state["run_id"] == "run" and state["config"] == {"beta": 0.5}

    def test_a_new_run_replaces_an_old_one_only_once_its_first_checkpoint_is_in(self, tmp_path):
        _save(tmp_path, 10, run_id="old")
        _save(tmp_path, 12, run_id="old")
        _save(tmp_path, 2, run_id="new")
        state = checkpoint.load_latest(tmp_path, warn=_no_warning)
        assert state["run_id"] == "new" and state["step"] == 2
        assert not (tmp_path / "ckpt-00000012.pt").exists()

    def test_resaving_a_listed_step_replaces_it(self, tmp_path):
        _save(tmp_path, 2, value=1.0)
        _save(tmp_path, 4, value=1.0)
        _save(tmp_path, 4, value=5.0)  # a resumed run writes step 4 again
        state = checkpoint.load_latest(tmp_path, warn=_no_warning)
        assert torch.equal(state["policy"]["weight"], torch.full((1, 2), 5.0))
        assert [e["step"] for e in checkpoint.list_checkpoints(tmp_path)] == [2, 4]

    @pytest.mark.parametrize("keep", [0, -1, 1.5, True])
    def test_keep_must_be_a_positive_integer(self, tmp_path, keep):
        with pytest.raises(ValueError, match=r"train.keep_checkpoints must be an integer >= 1, got"):
            _save(tmp_path, 1, keep=keep)

    def test_a_non_finite_state_is_never_written(self, tmp_path):
        _save(tmp_path, 2)
        with pytest.raises(FloatingPointError, match=r"not writing a checkpoint at step 4: policy.weight hold"):
            _save(tmp_path, 4, value=float("nan"))
        assert not (tmp_path / "ckpt-00000004.pt").exists()
        assert checkpoint.load_latest(tmp_path, warn=_no_warning)["step"] == 2


class TestFullDisk:
    @pytest.mark.parametrize("fail_on", [1, 2, 3])  # the checkpoint, its checksum file, the manifest
    def test_enospc_keeps_the_previous_checkpoint(self, tmp_path, monkeypatch, fail_on):
        _save(tmp_path, 2, value=2.0)
        before = {p.name: p.read_bytes() for p in tmp_path.iterdir()}
        real_write, calls = os.write, []

        def full_disk(fd, data):  # the n-th write gets a few bytes down, then the disk is full
            calls.append(fd)
            if len(calls) >= fail_on:
                real_write(fd, bytes(data[:7]))
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
            return real_write(fd, data)

        monkeypatch.setattr(os, "write", full_disk)
        with pytest.raises(checkpoint.CheckpointError,
                           match=rf"cannot write checkpoint .*ckpt-00000004.pt: the disk is full \(No space left "
                                 rf"on device\) in {re.escape(str(tmp_path))}; the previous checkpoint "
                                 r"ckpt-00000002.pt is intact"):
            _save(tmp_path, 4, value=4.0)
        monkeypatch.undo()
        after = {p.name: p.read_bytes() for p in tmp_path.iterdir()}
        assert after.get("manifest.json") == before["manifest.json"]
        assert after["ckpt-00000002.pt"] == before["ckpt-00000002.pt"]
        assert not [n for n in after if n.endswith(".tmp")]
        state = checkpoint.load_latest(tmp_path, warn=_no_warning)
        assert state["step"] == 2 and torch.equal(state["policy"]["weight"], torch.full((1, 2), 2.0))


    @pytest.mark.skipif(not os.path.isdir("/proc/self/fd"), reason="needs Linux's /proc/self/fd")
    def test_cli_says_disk_full_in_one_line_and_a_rerun_resumes(self, tmp_path, monkeypatch, capsys):
        from polopt.commands.main import main

        run_dir = tmp_path / "run"
        args = ["train", "train.steps=6", "train.checkpoint_every=2", "train.progress=false",
                f"hydra.run.dir={run_dir}"]
        real_write = os.write

        def full_when_step_4(fd, data):  # the disk fills up while ckpt-00000004.pt is written
            if "ckpt-00000004.pt" in os.readlink(f"/proc/self/fd/{fd}"):
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
            return real_write(fd, data)

        monkeypatch.setattr(os, "write", full_when_step_4)
        code = main(args)
        monkeypatch.undo()
        err = capsys.readouterr().err.strip().splitlines()
        assert code == 2 and len(err) == 1
        assert re.fullmatch(r"polopt train: error: cannot write checkpoint .*ckpt-00000004.pt: the disk is full "
                            r"\(No space left on device\) in .*checkpoints; the previous checkpoint ckpt-00000002.pt "
                            r"is intact; free some space and rerun the same command to resume", err[0])
        assert main(args) == 0
        assert "resuming from" in capsys.readouterr().err
        assert checkpoint.load_latest(run_dir / "checkpoints", warn=_no_warning)["step"] == 6


class TestFallback:
    def _two(self, tmp_path):
        _save(tmp_path, 2, value=2.0)
        _save(tmp_path, 4, value=4.0)
        return tmp_path / "ckpt-00000004.pt"

    def _load(self, tmp_path):
        warnings = []
        return checkpoint.load_latest(tmp_path, warn=warnings.append), warnings

    def test_truncated(self, tmp_path):
        newest = self._two(tmp_path)
        newest.write_bytes(newest.read_bytes()[:100])
        state, warnings = self._load(tmp_path)
        assert state["step"] == 2
        assert len(warnings) == 1 and re.fullmatch(
            r"checkpoint .*ckpt-00000004.pt is unusable \(truncated or grown: 100 bytes, the manifest says \d+ "
            r"bytes\); falling back to ckpt-00000002.pt", warnings[0])

    def test_one_flipped_bit(self, tmp_path):
        newest = self._two(tmp_path)
        data = bytearray(newest.read_bytes())
        data[len(data) // 2] ^= 1
        newest.write_bytes(bytes(data))
        state, warnings = self._load(tmp_path)
        assert state["step"] == 2 and "checksum mismatch: SHA-256" in warnings[0]

    def test_missing_file(self, tmp_path):
        self._two(tmp_path).unlink()
        state, warnings = self._load(tmp_path)
        assert state["step"] == 2 and "ckpt-00000004.pt is unusable (the file is missing)" in warnings[0]

    def test_every_checkpoint_bad_starts_over(self, tmp_path):
        self._two(tmp_path)
        for p in tmp_path.glob("ckpt-*.pt"):
            p.write_bytes(b"")
        state, warnings = self._load(tmp_path)
        assert state is None and len(warnings) == 2
        assert warnings[-1].endswith("no earlier checkpoint is left; starting from step 0")

    @pytest.mark.parametrize("content", ["", "{", '{"format": 1}', "[1, 2]", "\xff"])
    def test_broken_manifest_uses_the_checksum_files(self, tmp_path, content):
        self._two(tmp_path)
        (tmp_path / "manifest.json").write_text(content, encoding="latin-1")
        state, warnings = self._load(tmp_path)
        assert state["step"] == 4
        assert re.fullmatch(r"checkpoint manifest .*manifest.json is unusable \(.+\); using the checksum files "
                            r"instead", warnings[0])

    def test_no_manifest_and_a_bad_newest(self, tmp_path):
        newest = self._two(tmp_path)
        (tmp_path / "manifest.json").unlink()
        newest.write_bytes(newest.read_bytes()[:-1])
        state, warnings = self._load(tmp_path)
        assert state["step"] == 2 and "checksum mismatch" in warnings[0]

    def test_a_checkpoint_without_checksum_is_not_trusted(self, tmp_path):
        self._two(tmp_path)
        (tmp_path / "manifest.json").unlink()
        (tmp_path / "ckpt-00000004.pt.sha256").unlink()  # as after a crash between the two renames
        state, _ = self._load(tmp_path)
        assert state["step"] == 2

    def test_empty_or_missing_folder(self, tmp_path):
        assert checkpoint.load_latest(tmp_path / "none", warn=_no_warning) is None
        assert checkpoint.load_latest(tmp_path, warn=_no_warning) is None


def _write_listed(directory, payload: dict, step: int = 2) -> None:
    """A checkpoint file with a correct manifest entry, whatever its content."""
    buffer = io.BytesIO()
    torch.save(payload, buffer)
    data = buffer.getvalue()
    (directory / checkpoint.checkpoint_name(step)).write_bytes(data)
    (directory / "manifest.json").write_text(json.dumps({"format": 1, "run_id": "r", "checkpoints": [
        {"file": checkpoint.checkpoint_name(step), "step": step, "sha256": hashlib.sha256(data).hexdigest(),
         "bytes": len(data)}]}))


def test_a_non_finite_checkpoint_is_not_loaded_either(tmp_path):
    _write_listed(tmp_path, {**_state(2, float("inf")), "run_id": "r", "fingerprint": "f", "config": {}})
    warnings = []
    assert checkpoint.load_latest(tmp_path, warn=warnings.append) is None
    assert "(holds non-finite values in policy.weight" in warnings[0]


def test_a_checkpoint_of_another_shape_is_one_line():
    state = _state(2)
    policy = torch.nn.Linear(3, 1)
    optimiser = torch.optim.Adam(policy.parameters())
    scheduler = torch.optim.lr_scheduler.ConstantLR(optimiser, factor=1.0, total_iters=0)
    with pytest.raises(ValueError, match=r"^the checkpoint of step 2 does not fit this model and optimiser: "
                                         r"Error\(s\) in loading state_dict for Linear:$"):
        checkpoint.restore_training_state(state, policy=policy, optimiser=optimiser, scheduler=scheduler,
                                          generator=torch.Generator())


def test_one_run_folder_one_process(tmp_path, capsys):
    from polopt.commands.main import main

    with checkpoint.exclusive(tmp_path):  # as if another polopt train were running there
        code = main(["train", "train.steps=2", "train.progress=false", f"hydra.run.dir={tmp_path}"])
    assert code == 2
    assert capsys.readouterr().err.strip() == (f"polopt train: error: another polopt train is running in {tmp_path}; "
                                               "wait for it to end or give another hydra.run.dir")
    assert main(["train", "train.steps=2", "train.progress=false", f"hydra.run.dir={tmp_path}"]) == 0


class _Marker:
    """Unpickling this would create a file: what a malicious checkpoint could do with plain pickle."""

    def __init__(self, path):
        self.path = path

    def __reduce__(self):
        return (open, (self.path, "w"))


def test_loading_never_runs_pickled_code(tmp_path):
    marker = tmp_path / "ran"
    _write_listed(tmp_path, {**_state(2), "run_id": "r", "fingerprint": "f", "config": {},
                             "extra": _Marker(str(marker))})
    warnings = []
    assert checkpoint.load_latest(tmp_path, warn=warnings.append) is None
    assert not marker.exists()
    assert "torch.load(weights_only=True) refused it" in warnings[0]


class TestBitIdenticalResume:
    """Run N steps in one go, or k steps, save, load in a fresh process state and run to N: every
    parameter, optimiser moment, scheduler and RNG state, and every logged metric must be equal."""

    @pytest.mark.parametrize("setup", sorted(SETUPS))
    @pytest.mark.parametrize("k", [1, 5, 12, 20])
    def test_resume_equals_uninterrupted(self, tmp_path, setup, k):
        n = 20
        saved = {}
        policy_full, full = run_steps(setup, n, checkpoint_every=1,
                                      save_checkpoint=lambda s: saved.update(full=_copy(s)))

        class Stop(Exception):
            pass

        def save_then_stop(state):
            checkpoint.save(tmp_path, state, run_id="r", fingerprint="f", config={}, keep=2)
            if state["step"] == k:
                raise Stop

        with pytest.raises(Stop):
            run_steps(setup, n, checkpoint_every=1, save_checkpoint=save_then_stop)
        torch.manual_seed(12345)  # a fresh process would not share the global RNG state either
        resumed_state = checkpoint.load_latest(tmp_path, warn=_no_warning)
        assert resumed_state["step"] == k
        policy_resumed, resumed = run_steps(setup, n, checkpoint_every=1, resume=resumed_state,
                                            save_checkpoint=lambda s: saved.update(resumed=_copy(s)))
        for name, p in policy_full.state_dict().items():
            assert torch.equal(p, policy_resumed.state_dict()[name]), name
        # at k = n the resumed run has no step left to take: the checkpoint itself is its end state
        end = saved.get("resumed", resumed_state)
        assert_same_state(saved["full"], {k: v for k, v in end.items() if k not in ("run_id", "fingerprint",
                                                                                    "config")})
        assert without_seconds(full.history) == without_seconds(resumed.history)

    def test_resuming_at_the_last_step_trains_nothing(self, tmp_path):
        session, policy, loss = build("adam-minibatch")
        run_steps("adam-minibatch", 6, save_checkpoint=lambda s: checkpoint.save(
            tmp_path, s, run_id="r", fingerprint="f", config={}))
        state = checkpoint.load_latest(tmp_path, warn=_no_warning)
        result = train(policy, session.pairs, loss,
                       TrainSettings(beta=0.5, steps=6, optim=SETUPS["adam-minibatch"]["optim"], batch_size=6, seed=7,
                                     log_every=3, progress=False),
                       resume=state)
        assert torch.equal(policy.scores, state["policy"]["scores"]) and result.history == state["history"]


def _copy(state):
    return copy.deepcopy(state)  # state dicts share storage with the live parameters


def test_cli_checkpoints_verifies_and_names_the_resume_point(tmp_path, capsys):
    from polopt.commands.main import main

    folder = tmp_path / "checkpoints"
    _save(folder, 2)
    _save(folder, 4)
    assert main(["checkpoints", str(tmp_path)]) == 0
    assert capsys.readouterr().out.splitlines()[-1] == "resume point: ckpt-00000004.pt"
    (folder / "ckpt-00000004.pt").write_bytes(b"x")
    assert main(["checkpoints", str(tmp_path)]) == 1
    out = capsys.readouterr().out.splitlines()
    assert out[1].startswith("ckpt-00000004.pt  step        4  BAD: truncated or grown: 1 bytes")
    assert out[-1] == "resume point: ckpt-00000002.pt"
    assert main(["checkpoints", str(tmp_path / "nowhere")]) == 2
    assert capsys.readouterr().err.startswith("polopt checkpoints: error: ")
