"""``polopt train`` run folders: rerunning the same config in the same folder resumes from the newest
good checkpoint and ends as an uninterrupted run would; a changed config is refused by name."""

from __future__ import annotations

import json

import pytest
from helpers_resume import assert_same_state
from hydra import compose, initialize_config_dir

from polopt.checkpoints import store as checkpoint
from polopt.commands.train import CONFIG_DIR, run

BASE = ["task.mode=sampled", "task.n_pairs=30", "train.steps=12", "train.batch_size=7", "train.log_every=2",
        "train.checkpoint_every=3", "train.progress=false"]


def _cfg(*overrides):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose("config", overrides=[*BASE, *overrides])


def _folder(run_dir):
    state = checkpoint.load_latest(run_dir / "checkpoints")
    summary = json.loads((run_dir / "summary.json").read_text())
    metrics = [json.loads(x) for x in (run_dir / "metrics.jsonl").read_text().splitlines()]
    for r in [summary, *metrics]:
        r.pop("seconds")
    keys = ("policy", "optimiser", "scheduler", "generator", "torch_rng", "order", "cursor", "history", "step")
    return {k: state[k] for k in keys}, summary, metrics


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    run_dir = tmp_path_factory.mktemp("reference")
    run(_cfg(), run_dir)
    return _folder(run_dir)


def test_layout_and_one_metrics_line_per_logged_step(reference):
    state, summary, metrics = reference
    assert state["step"] == 12 and summary["skipped_steps"] == []
    assert [r["step"] for r in metrics] == [1, 2, 4, 6, 8, 10, 12]


def test_rerun_after_the_end_changes_nothing(tmp_path, reference, capsys):
    run(_cfg(), tmp_path)
    run(_cfg(), tmp_path)
    assert "resuming from" in capsys.readouterr().err
    got = _folder(tmp_path)
    assert_same_state(reference[0], got[0])
    assert got[1:] == reference[1:]


class Crash(Exception):
    pass


def _run_until(run_dir, step, monkeypatch):
    """Run the 12-step config but die right after the checkpoint of ``step`` is written."""
    real = checkpoint.save

    def save_then_crash(directory, state, **kwargs):
        real(directory, state, **kwargs)
        if state["step"] == step:
            raise Crash

    monkeypatch.setattr(checkpoint, "save", save_then_crash)
    with pytest.raises(Crash):
        run(_cfg(), run_dir)
    monkeypatch.undo()


def test_an_interrupted_run_resumes_and_ends_identical(tmp_path, reference, monkeypatch, capsys):
    _run_until(tmp_path, 6, monkeypatch)
    assert len((tmp_path / "metrics.jsonl").read_text().splitlines()) == 4  # steps 1, 2, 4, 6
    capsys.readouterr()
    run(_cfg(), tmp_path)
    assert "resuming from" in (err := capsys.readouterr().err) and "(step 6 of 12)" in err
    got = _folder(tmp_path)
    assert_same_state(reference[0], got[0])
    assert got[1:] == reference[1:]


@pytest.mark.parametrize("damage", ["truncate", "flip", "delete", "garbage manifest", "no manifest"])
def test_a_damaged_newest_checkpoint_falls_back_and_ends_identical(tmp_path, reference, monkeypatch, capsys,
                                                                   damage):
    _run_until(tmp_path, 9, monkeypatch)
    ckpt = tmp_path / "checkpoints"
    newest = ckpt / "ckpt-00000009.pt"
    if damage == "truncate":
        newest.write_bytes(newest.read_bytes()[:-10])
    elif damage == "flip":
        data = bytearray(newest.read_bytes())
        data[-100] ^= 0x10
        newest.write_bytes(bytes(data))
    elif damage == "delete":
        newest.unlink()
    elif damage == "garbage manifest":
        (ckpt / "manifest.json").write_text("{ half a manifest")
    else:
        (ckpt / "manifest.json").unlink()
    capsys.readouterr()
    run(_cfg(), tmp_path)
    err = capsys.readouterr().err
    if "manifest" in damage:  # the checksum files still vouch for step 9
        assert ("manifest.json is unusable" in err) == (damage == "garbage manifest")
        assert "(step 9 of 12)" in err
    else:
        assert f"{newest} is unusable" in err and "falling back to ckpt-00000006.pt" in err
        assert "(step 6 of 12)" in err
    got = _folder(tmp_path)
    assert_same_state(reference[0], got[0])
    assert got[1:] == reference[1:]


def test_a_changed_config_is_refused_by_name(tmp_path, monkeypatch):
    _run_until(tmp_path, 6, monkeypatch)
    with pytest.raises(ValueError, match=r"^the run folder's checkpoints \(.*checkpoints\) belong to another run "
                                         r"\(beta: 0.5 -> 0.7\); give a new hydra.run.dir, "
                                         r"or train.resume=false to start over there$"):
        run(_cfg("beta=0.7", "train.steps=20"), tmp_path)
    run(_cfg("train.keep_checkpoints=3", "train.checkpoint_every=4", "train.progress=true"), tmp_path)  # free keys
    summary = run(_cfg("beta=0.7", "train.resume=false"), tmp_path)  # starts over in the same folder
    assert summary["beta"] == 0.7
    assert [e["step"] for e in checkpoint.list_checkpoints(tmp_path / "checkpoints")] == [9, 12]


@pytest.mark.parametrize("override, message", [
    ("train.checkpoint_every=-1", r"train.checkpoint_every must be an integer >= 0 \(0: only at the end\), got -1"),
    ("train.keep_checkpoints=0", r"train.keep_checkpoints must be an integer >= 1, got 0"),
    ("train.on_nonfinite=ignore", r"train.on_nonfinite must be stop or skip, got 'ignore'"),
])
def test_checkpoint_keys_are_checked(tmp_path, override, message):
    with pytest.raises(ValueError, match=message):
        run(_cfg(override), tmp_path)


def test_changed_data_under_the_same_config_is_refused(tmp_path, monkeypatch):
    from toy_tasks.families import bradley_terry

    path = tmp_path / "task.json"
    bradley_terry(n_responses=3, rewards=[0.0, 1.0, 2.0]).save(path)
    cfg = ["task=file", f"task.path={path}"]
    real = checkpoint.save

    def save_then_crash(directory, state, **kwargs):
        real(directory, state, **kwargs)
        raise Crash

    monkeypatch.setattr(checkpoint, "save", save_then_crash)
    with pytest.raises(Crash):
        run(_cfg(*cfg), tmp_path / "run")
    monkeypatch.undo()
    bradley_terry(n_responses=3, rewards=[0.0, 1.0, 2.5]).save(path)  # same file name, other preferences
    with pytest.raises(ValueError, match=r"belong to another run \(the training data differ\); give a new"):
        run(_cfg(*cfg), tmp_path / "run")
