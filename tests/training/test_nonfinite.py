"""The NaN/inf guard of polopt.training.loop.train: report the step and the batch, then stop (default) or
skip by ``train.on_nonfinite``; never write a non-finite checkpoint."""

from __future__ import annotations

import pytest
import torch

from polopt import losses
from polopt.checkpoints import store as checkpoint
from polopt.commands.main import main
from polopt.pairs import PairSet
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig
from toy_tasks.families import bradley_terry
from toy_tasks.finite.session import prepare

BAD = 5  # the pair whose cached reference log-probability is NaN (a broken data row)


def _setup(bad: int | None = BAD):
    session = prepare(bradley_terry(n_responses=4, seed=0), losses.resolve_margin("logistic"), beta=0.5, mode="sampled",
                      n_pairs=12, seed=0)
    p = session.pairs
    ref_w = p.reference_winner.clone()
    if bad is not None:
        ref_w[bad] = float("nan")
    pairs = PairSet(p.prompt, p.winner, p.loser, ref_w, p.reference_loser, p.weight)
    return session, pairs


def _batches_holding(pair: int, n: int, batch_size: int, seed: int, steps: int) -> list[int]:
    """The steps whose batch holds ``pair``, replaying the documented order: a torch.randperm from a
    generator seeded with ``seed``, redrawn whenever fewer than batch_size pairs are left."""
    g = torch.Generator().manual_seed(seed)
    order, cursor, hits = torch.randperm(n, generator=g), 0, []
    for step in range(1, steps + 1):
        if cursor + batch_size > n:
            order, cursor = torch.randperm(n, generator=g), 0
        if pair in order[cursor:cursor + batch_size].tolist():
            hits.append(step)
        cursor += batch_size
    return hits


def test_stop_names_the_step_the_batch_and_the_pair():
    session, pairs = _setup()
    first = _batches_holding(BAD, len(pairs), 4, 3, 30)[0]
    policy = session.build_policy()
    with pytest.raises(FloatingPointError, match=rf"^step {first}: the loss is nan on a batch of 4 pairs \[.*\] "
                                                 rf"\(prompts \[0, 0, 0, 0\]\); non-finite at pairs \[{BAD}\]; "
                                                 r"lower optim.lr or beta, .* or set train.on_nonfinite=skip$"):
        train(policy, pairs, losses.resolve_margin("logistic"),
              TrainSettings(beta=0.5, steps=30, optim=OptimConfig(), batch_size=4, seed=3, progress=False))


def test_skip_skips_exactly_the_batches_with_the_bad_pair(capsys):
    session, pairs = _setup()
    want = _batches_holding(BAD, len(pairs), 4, 3, 30)
    assert 0 < len(want) < 30
    saved = []
    policy = session.build_policy()
    result = train(policy, pairs, losses.resolve_margin("logistic"),
                   TrainSettings(beta=0.5, steps=30, optim=OptimConfig(), batch_size=4, seed=3, progress=False,
                                 on_nonfinite="skip", checkpoint_every=5),
                   save_checkpoint=lambda s: saved.append(checkpoint.nonfinite_entries(s)))
    assert result.skipped == want
    assert torch.isfinite(policy.scores).all() and saved == [[]] * 6
    assert all(r["step"] not in want for r in result.history)  # a skipped step logs no metrics
    lines = [ln for ln in capsys.readouterr().err.splitlines() if "skipped" in ln]
    assert len(lines) == len(want) and lines[0].startswith(f"polopt: warning: skipped step {want[0]}: the loss is nan")


def test_skipped_steps_leave_the_parameters_alone():
    """Full batch with the broken pair: every step is skipped, so the parameters stay at their start."""
    session, pairs = _setup()
    policy = session.build_policy()
    before = policy.scores.detach().clone()
    result = train(policy, pairs, losses.resolve_margin("logistic"),
                   TrainSettings(beta=0.5, steps=3, optim=OptimConfig("sgd", 1.0), progress=False, on_nonfinite="skip"))
    assert result.skipped == [1, 2, 3] and result.history == [] and result.final == {}
    assert torch.equal(policy.scores, before)


def test_a_non_finite_gradient_with_a_finite_loss_is_caught():
    session, pairs = _setup(bad=None)
    loss = losses.resolve_margin("user_losses:sqrt_abs")
    with pytest.raises(FloatingPointError, match=r"^step 1: the gradient norm is nan on a batch of 12 pairs "):
        train(session.build_policy(), pairs, loss,
              TrainSettings(beta=0.5, steps=3, optim=OptimConfig(), progress=False))


def test_on_nonfinite_is_checked():
    session, pairs = _setup(bad=None)
    with pytest.raises(ValueError, match=r"train.on_nonfinite must be stop or skip, got 'ignore'"):
        train(session.build_policy(), pairs, losses.resolve_margin("logistic"),
              TrainSettings(beta=0.5, steps=1, optim=OptimConfig(), progress=False, on_nonfinite="ignore"))


def test_cli_stop_is_one_line_and_exit_2(tmp_path, capsys):
    # Adam's first step moves every score by about lr = 1e308; times score_scale = 1/beta = 2 the
    # scores overflow to infinity, so the loss of step 2 is NaN
    common = ["optim.lr=1e308", "train.steps=4", "train.progress=false"]
    code = main(["train", *common, f"hydra.run.dir={tmp_path / 'stop'}"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1
    assert err[0].startswith("polopt train: error: step 2: the loss is nan on a batch of 30 pairs [0, 1, 2,")


def test_cli_skip_never_writes_a_non_finite_checkpoint(tmp_path, capsys):
    run_dir = tmp_path / "skip"
    code = main(["train", "optim.lr=1e308", "train.steps=4", "train.progress=false", "train.checkpoint_every=1",
                 "train.on_nonfinite=skip", f"hydra.run.dir={run_dir}"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    # Adam's first step is lr / (1 - 0.9) = 1e309: the scores are infinite already after step 1
    assert err[-1] == ("polopt train: error: not writing a checkpoint at step 1: policy.scores hold non-finite "
                       "values (NaN or infinity)")
    assert checkpoint.list_checkpoints(run_dir / "checkpoints") == []
    assert checkpoint.load_latest(run_dir / "checkpoints") is None
