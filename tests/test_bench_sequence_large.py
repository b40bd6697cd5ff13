"""bench/sequence_large.py and the 1,365-response sequence task it measures.

No timing is asserted (benches print figures, they never pass or fail). Checked: the bench's rows on a
small task (a run stops at its first logged step within the target, or runs its budget), the steps it
names are the ones the training loop logs, and the large task's configuration path end to end: it
composes and builds with 1,365 responses per prompt, its logistic optimum certifies and equals the
closed form, and a short run moves the transformer towards it.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from omegaconf import OmegaConf

from bench import sequence_large
from polopt.commands.config import build_task, compose
from polopt.commands.train import objective_of, prepare_session, train_settings
from polopt.parallel import distributed
from polopt.training.loop import optimise

SMALL = ["--symbols", "2", "--max-length", "3"]  # 1 + 2 + 4 + 8 = 15 responses per prompt


def test_rows_stop_at_the_target_or_run_the_budget(tmp_path, capsys):
    out = tmp_path / "rows.jsonl"
    sequence_large.main([*SMALL, "--only", "logistic", "--target", "1.0", "--json", str(out),
                         "train.steps=6", "train.log_every=5"])
    sequence_large.main([*SMALL, "--only", "squared", "--target", "0.0", "--full", "--json", str(out),
                         "train.steps=6", "train.log_every=5"])
    text = capsys.readouterr().out
    assert "task.n_symbols=2 task.max_length=3" in text and "load" in text
    first, second = (json.loads(line) for line in out.read_text().splitlines())
    # TV is at most 1, so a target of 1.0 is met at the first logged step and the run ends there
    assert first["name"] == "logistic" and first["hit_step"] == 1 and first["steps"] == 1
    assert first["certified"] is True and first["tv"] <= 1.0
    # TV 0 is never reached by a sequence model: the whole budget runs, logged at 1, 5 and the last step
    assert second["hit_step"] is None and [h["step"] for h in second["history"]] == [1, 5, 6]
    assert second["tv"] == second["history"][-1]["tv"] and second["best_tv"] <= second["history"][0]["tv"]
    assert "yes" in text and "no" in text


@pytest.mark.parametrize("log_every, steps", [(3, 7), (1, 3), (5, 5)])
def test_watched_names_the_steps_the_loop_logs(log_every, steps):
    cfg = compose(["task=sequence", "task.n_symbols=2", "task.max_length=2", f"train.steps={steps}",
                   f"train.log_every={log_every}", "train.progress=false"])
    loss, session = prepare_session(cfg, None, distributed.SINGLE)
    policy = session.build_policy(**OmegaConf.to_container(cfg.model, resolve=True))
    settings = train_settings(cfg)
    objective, evaluate = objective_of({"name": "offline"}, None, session, policy, loss, settings,
                                       distributed.SINGLE)
    seen: list[dict] = []
    watch = sequence_large.watched(evaluate, target=0.0, log_every=log_every, steps=steps, stop=False,
                                   began=0.0, seen=seen)
    result = optimise(policy, objective, settings, evaluate=watch)
    assert [s["step"] for s in seen] == [h["step"] for h in result.history]
    assert [s["tv"] for s in seen] == [h["tv_to_optimum"] for h in result.history]


@pytest.mark.slow
def test_the_large_task_builds_certifies_and_trains_towards_its_optimum():
    overrides = sequence_large.task_overrides(sequence_large.SYMBOLS, sequence_large.MAX_LENGTH)
    cfg = compose([*overrides, "loss=logistic", "train.steps=8", "train.log_every=4", "train.progress=false"])
    assert cfg.model.kind == "transformer"  # task=sequence picks the tiny transformer
    task = build_task(cfg.task)
    assert task.n_responses == 1 + 4 + 16 + 64 + 256 + 1024  # every string of up to 5 of 4 symbols (by hand)
    loss, session = prepare_session(cfg, None, distributed.SINGLE)
    optimum = session.finite.optimum
    assert optimum.finite and optimum.certified
    # DPO's closed form (Rafailov et al. 2023): pi* proportional to pi_ref exp(r / beta)
    logits = task.reference_logprobs + task.rewards / float(cfg.beta)  # (X, K)
    expected = np.exp(logits - logits.max(axis=1, keepdims=True))
    expected /= expected.sum(axis=1, keepdims=True)
    np.testing.assert_allclose(session.finite.task.policy_from_logratios(optimum.logratios), expected, atol=1e-9)
    policy = session.build_policy(**OmegaConf.to_container(cfg.model, resolve=True))
    settings = train_settings(cfg)
    objective, evaluate = objective_of({"name": "offline"}, None, session, policy, loss, settings,
                                       distributed.SINGLE)
    result = optimise(policy, objective, settings, evaluate=evaluate)
    tv = [h["tv_to_optimum"] for h in result.history]
    assert [h["step"] for h in result.history] == [1, 4, 8]
    assert tv[-1] < tv[0] - 0.05  # from the reference (TV 0.67) the optimum is approached within 8 steps


def test_starts_sets_the_pair_and_group_solvers_starts(tmp_path):
    out = tmp_path / "rows.jsonl"
    # objectives without a convexity proof (which would take one start whatever --starts says): ORPO, DiscoPOP
    sequence_large.main([*SMALL, "--only", "odds_ratio_with_nll,logistic_exponential_blend", "--starts", "1",
                         "--json", str(out), "train.steps=2"])
    rows = [json.loads(line) for line in out.read_text().splitlines()]
    assert [r["name"] for r in rows] == ["odds_ratio_with_nll", "logistic_exponential_blend"]
    assert all("1 seeded starts" in r["optimum_method"] and r["starts"] == 1 for r in rows)
    sequence_large.main([*SMALL, "--only", "odds_ratio_with_nll", "--json", str(out), "train.steps=2"])
    default = json.loads(out.read_text().splitlines()[-1])
    assert "1 seeded starts" not in default["optimum_method"] and default["starts"] is None


def test_solver_flags_are_written_as_json_booleans():
    # the kink solver reports numpy booleans, which the json module refuses
    assert json.dumps([sequence_large.flag(np.bool_(True)), sequence_large.flag(None)]) == "[true, null]"
