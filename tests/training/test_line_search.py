"""``optim=lbfgs``: torch.optim.LBFGS with a strong-Wolfe line search in the training loop, and
``precision=fp64``.

Held against: the exact optima of finite tasks (toy_tasks.exact.margin and the pair solver, themselves pinned
to published closed forms in test_solve.py and test_pair_solve.py: Rafailov et al. 2023 for the logistic
loss, Wang et al. 2023 for the divergence links), torch.optim.LBFGS driven directly by a closure (the
reference the loop's one-step-at-a-time use must equal), and the refusals a line search needs (one fixed
objective: full batch, one process, no sampling method).
"""

import dataclasses
import json

import pytest
import torch

from polopt import losses
from polopt.parallel import distributed
from polopt.training.loop import PairBatches, TrainSettings, line_search_counts, train
from polopt.training.optim import LBFGS_TOLERANCE_CHANGE, OptimConfig, make_optimiser
from toy_tasks import families

LBFGS = OptimConfig("lbfgs", 1.0, schedule="constant", iterations=20, history=50)


def settings(**kwargs) -> TrainSettings:
    return TrainSettings(**{"beta": 0.5, "steps": 30, "optim": LBFGS, "progress": False, "log_every": 5, **kwargs})


@pytest.mark.parametrize("name", ["logistic", "squared", "exponential"])
def test_reaches_the_exact_optimum_of_a_finite_task(name):
    task = families.noisy_labels()
    loss = losses.resolve_margin(name)
    session = task.prepare(loss, beta=0.5)
    policy = session.build_policy()
    result = train(policy, session.pairs, loss, settings(), evaluate=session.evaluate)
    summary = session.summarise(policy, result)
    assert summary["tv_to_optimum"] <= 1e-6  # a quasi-Newton method on a smooth convex problem: far below 1e-3
    assert result.final["iterations"] >= 30 and result.final["evaluations"] >= result.final["iterations"]


@pytest.mark.parametrize("name", ["divergence_forward_kl", "divergence_alpha", "length_normalised_free"])
def test_reaches_the_certified_optimum_of_a_pair_objective(name):
    from helpers_exact import random_task

    task = random_task(7, bradley_terry=True)
    objective = losses.resolve(name)
    session = task.prepare(objective, beta=0.7)
    policy = session.build_policy()
    result = train(policy, session.pairs, objective, settings(beta=0.7), evaluate=session.evaluate)
    summary = session.summarise(policy, result)
    if summary["optimum_finite"]:
        assert summary["tv_to_optimum"] <= 1e-3 and summary["reached_optimum"] is True
    else:  # a reference-free objective whose infimum lies on the simplex's boundary: no NaN on the way
        assert all(v == v for row in summary["policy"] for v in row)


def test_one_loop_step_is_one_call_of_torch_lbfgs():
    """Twelve loop steps equal twelve ``LBFGS.step(closure)`` calls on the same full-batch loss."""
    task = families.bradley_terry()
    loss = losses.resolve_margin("logistic")
    session = task.prepare(loss, beta=0.5)
    trained = session.build_policy()
    train(trained, session.pairs, loss, settings(steps=12, optim=dataclasses.replace(LBFGS, iterations=3)))

    direct = session.build_policy()
    optimiser = torch.optim.LBFGS(direct.parameters(), lr=1.0, max_iter=3, history_size=50,
                                  line_search_fn="strong_wolfe", tolerance_grad=0.0,
                                  tolerance_change=LBFGS_TOLERANCE_CHANGE)
    batches = PairBatches(direct, session.pairs, loss, settings())

    def closure():
        optimiser.zero_grad()
        value = batches(0).share
        value.backward()
        return value

    for _ in range(12):
        optimiser.step(closure)
    for (name, a), b in zip(trained.state_dict().items(), direct.state_dict().values(), strict=True):
        torch.testing.assert_close(a, b, rtol=0, atol=1e-12, msg=name)


def test_fp64_trains_a_float32_model_in_float64():
    from toy_tasks.sequence.task import sequence_task

    task = sequence_task(n_symbols=2, max_length=2, n_prompts=1, reference_width=8, reference_layers=1,
                         reference_heads=2, seed=0)
    loss = losses.resolve_margin("logistic")
    session = task.prepare(loss, beta=0.5)
    policy = session.build_policy(width=8, layers=1, heads=2, context=4)
    assert next(policy.parameters()).dtype == torch.float32
    start = session.evaluate(policy)["tv_to_optimum"]
    result = train(policy, session.pairs, loss, settings(steps=10, precision="fp64"), evaluate=session.evaluate)
    assert {p.dtype for p in policy.parameters()} == {torch.float64}
    assert result.final["tv_to_optimum"] < start / 10


def test_refusals_say_what_to_do():
    task = families.bradley_terry()
    loss = losses.resolve_margin("logistic")
    session = task.prepare(loss, beta=0.5, mode="sampled", n_pairs=40, seed=0)
    policy = session.build_policy()
    with pytest.raises(ValueError, match=r"set train.batch_size=null \(all 40 pairs each step\)"):
        train(policy, session.pairs, loss, settings(batch_size=8))
    with pytest.raises(ValueError, match=r"bf16 autocast rounds them to about 3 significant digits: use "
                                         r"precision=fp64 \(its default\) or fp32"):
        train(policy, session.pairs, loss, settings(precision="bf16"))
    with pytest.raises(ValueError, match=r"optim=lbfgs trains on one process"):
        train(policy, session.pairs, loss, settings(), context=distributed.Context(rank=0, world_size=2))
    weights = [torch.nn.Parameter(torch.zeros(3))]
    for change, named in ((dict(weight_decay=0.01), "optim.weight_decay=0.01"),
                          (dict(schedule="cosine"), "optim.schedule='cosine'"),
                          (dict(warmup_steps=5), "optim.warmup_steps=5"), (dict(grad_clip=1.0), "optim.grad_clip=1.0")):
        with pytest.raises(ValueError, match=f"optim=lbfgs sets its step length by line search: drop {named}"):
            make_optimiser(weights, dataclasses.replace(LBFGS, **change), 10)
    with pytest.raises(ValueError, match=r"optim.iterations must be a positive integer, got 0"):
        make_optimiser(weights, dataclasses.replace(LBFGS, iterations=0), 10)


def test_a_method_run_is_refused():
    from polopt.training.loop import MethodBatches, optimise

    policy = families.bradley_terry().prepare(losses.resolve_margin("logistic"), beta=0.5).build_policy()
    objective = MethodBatches(lambda step: (torch.zeros(()), {}), "selfplay")
    with pytest.raises(ValueError, match=r"method=selfplay draws new samples every step"):
        optimise(policy, objective, settings())


def test_counts_are_empty_for_other_optimisers():
    weights = [torch.nn.Parameter(torch.zeros(3))]
    assert line_search_counts(make_optimiser(weights, OptimConfig(), 10)[0]) == {}


@pytest.mark.parametrize("on_nonfinite", ["stop", "skip"])
def test_a_step_that_leaves_nan_parameters_is_undone(monkeypatch, on_nonfinite):
    task = families.bradley_terry()
    loss = losses.resolve_margin("logistic")
    session = task.prepare(loss, beta=0.5)
    policy = session.build_policy()
    real_step = torch.optim.LBFGS.step

    def poisoned(self, closure):  # the third step's line search ends on a NaN
        loss_value = real_step(self, closure)
        poisoned.calls += 1
        if poisoned.calls == 3:
            with torch.no_grad():
                self.param_groups[0]["params"][0].view(-1)[0] = float("nan")
        return loss_value

    poisoned.calls = 0
    monkeypatch.setattr(torch.optim.LBFGS, "step", poisoned)
    run = settings(steps=6, optim=dataclasses.replace(LBFGS, iterations=3), on_nonfinite=on_nonfinite)
    if on_nonfinite == "stop":
        with pytest.raises(FloatingPointError, match=r"step 3: L-BFGS's line search left the parameters non-finite"):
            train(policy, session.pairs, loss, run)
        return
    result = train(policy, session.pairs, loss, run, evaluate=session.evaluate)
    assert result.skipped == [3]
    assert all(bool(torch.isfinite(p).all()) for p in policy.parameters())
    assert result.final["iterations"] >= 1  # the history was dropped at step 3 and training went on


def test_a_sequence_run_with_lbfgs_reaches_its_exact_optimum(tmp_path):
    """``optim=lbfgs`` on the command line brings its defaults (float64, the transformer's step budget) and a
    sequence-task run through the one trainer ends at the forward-KL link's exact optimum (Wang et al. 2023's
    closed form f'(pi/pi_ref) = r/beta + c, solved by the pair solver)."""
    from helpers_exact import SMALL_OVERRIDES
    from hydra import compose, initialize_config_dir

    from polopt.commands.train import CONFIG_DIR, run

    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        defaults = compose("config", overrides=["task=sequence", "optim=lbfgs"])
        cfg = compose("config", overrides=[*SMALL_OVERRIDES, "task=sequence", "loss=divergence_forward_kl", "beta=2",
                                           "optim=lbfgs", "train.steps=20", "train.progress=false"])
        alpha = compose("config", overrides=["task=sequence", "loss=divergence_alpha", "optim=lbfgs"])
    assert defaults.precision == "fp64" and defaults.train.steps == 150 and defaults.optim.schedule == "constant"
    assert alpha.train.steps == 200  # conf/tuning/objective/lbfgs_transformer_divergence_alpha.yaml
    summary = run(cfg, tmp_path / "run")
    assert summary["optimum_method"].startswith("closed form")
    assert summary["tv_to_optimum"] <= 0.01 and summary["reached_optimum"] is True
    assert "precision: fp64" in (tmp_path / "run" / "config.yaml").read_text()
    logged = [json.loads(line) for line in (tmp_path / "run" / "metrics.jsonl").read_text().splitlines()]
    assert logged[-1]["iterations"] > logged[0]["iterations"] >= 1  # L-BFGS's counters reach metrics.jsonl


def test_a_pair_file_trains_in_float64_with_lbfgs(tmp_path):
    """Token pairs (a pair file, the reference computed by the tiny transformer) cast to float64 with the
    policy; the full batch is one fixed objective, so L-BFGS's loss falls monotonically (its line search
    accepts only decreasing steps: the Armijo condition, Nocedal & Wright 2006, ch. 3, from memory)."""
    from hydra import compose, initialize_config_dir

    from polopt.commands.train import CONFIG_DIR, run

    path = tmp_path / "pairs.jsonl"
    rows = [{"prompt": f"dish {i}?", "winner": f"bake it for {10 + i} minutes", "loser": "no idea"} for i in range(10)]
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=["task=pairs", f"task.path={path}", "model.width=16", "model.layers=1",
                                           "model.heads=2", "model.context=48", "optim=lbfgs", "optim.iterations=3",
                                           "train.steps=4", "train.batch_size=null", "train.log_every=1",
                                           "train.progress=false"])
    run(cfg, tmp_path / "run")
    losses_logged = [json.loads(line)["loss"] for line in (tmp_path / "run" / "metrics.jsonl").read_text().splitlines()]
    assert len(losses_logged) == 4
    assert all(b < a for a, b in zip(losses_logged, losses_logged[1:], strict=False))
