"""Property-based fuzzing (hypothesis): the loss family and the objective at the extremes, and the
task-file loader over malformed input.

Losses: every registered member, margins in [-1e4, 1e4], beta from 1e-4 to 1e4, float32 and
bfloat16, with and without label smoothing and weights: the reduced loss and its gradient with
respect to the margins are finite (the contract of docs/maths.md's loss table: finite at extremes).

Task files (toy_tasks.finite.task.load_task / task_from_dict): any bytes, any JSON value, and valid
tasks with one field broken either load or raise ValueError with a one-line message; nothing
else escapes. When a file loads, nothing is lost: as many prompts and responses as it holds, and
every number exactly as written.

The strategies and the one-line check live in ``helpers_fuzz`` so that the preference-pair data
loader (issue 6) can be fuzzed the same way (see that module's docstring).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
from helpers_fuzz import FUZZ, assert_loads_or_one_line_error, json_values, junk_bytes, scalars
from helpers_losses import loss_of_margins
from hypothesis import given
from hypothesis import strategies as st

from polopt import losses
from polopt.losses.reduce import margins
from toy_tasks.finite.task import FiniteTask, load_task, task_from_dict

DTYPES = [torch.float32, torch.bfloat16]

# --------------------------------------------------------------------- losses

margin_values = st.lists(st.floats(-1e4, 1e4, allow_nan=False), min_size=1, max_size=16)
betas = st.floats(-4.0, 4.0).map(lambda e: 10.0**e)  # log-uniform over [1e-4, 1e4]


@pytest.mark.parametrize("dtype", DTYPES, ids=str)
@pytest.mark.parametrize("name", losses.names("margin"))
@FUZZ
@given(rho=margin_values, beta=betas, smoothing=st.sampled_from([0.0, 0.1, 0.49]),
       weighted=st.booleans(), seed=st.integers(0, 2**16))
def test_loss_and_gradient_are_finite_at_extreme_margins(name, dtype, rho, beta, smoothing, weighted, seed):
    loss = losses.resolve_margin(name)
    r = torch.tensor(rho, dtype=dtype, requires_grad=True)  # (B,)
    weights = torch.rand(len(rho), generator=torch.Generator().manual_seed(seed)) + 1e-3 if weighted else None
    value = loss_of_margins(loss, r, beta=beta, smoothing=smoothing, weights=weights)
    (grad,) = torch.autograd.grad(value, r)
    assert torch.isfinite(value), (name, dtype, beta, rho)
    assert torch.isfinite(grad).all(), (name, dtype, beta, rho, grad)


logprob_values = st.lists(st.floats(-1e4, 0.0), min_size=4, max_size=4)


@pytest.mark.parametrize("dtype", DTYPES, ids=str)
@pytest.mark.parametrize("name", losses.names("margin"))
@FUZZ
@given(columns=st.lists(logprob_values, min_size=1, max_size=8), beta=betas)
def test_objective_from_extreme_log_probabilities(name, dtype, columns, beta):
    """margins() of log-probabilities down to -1e4 (margins up to +-2e4) then the loss: finite."""
    pw, pl, rw, rl = (torch.tensor(c, dtype=dtype) for c in zip(*columns, strict=True))  # four (B,)
    pw.requires_grad_(True)
    pl.requires_grad_(True)
    value = loss_of_margins(losses.resolve_margin(name), margins(pw, pl, rw, rl), beta=beta)
    grads = torch.autograd.grad(value, [pw, pl])
    assert torch.isfinite(value) and all(torch.isfinite(g).all() for g in grads)


# --------------------------------------------------------------------- task files

def _reference_rows(data) -> list:
    return [e["reference"] for e in data["prompts"]] if "prompts" in data else [data["reference"]]


def _check_nothing_lost(task: FiniteTask, data: dict) -> None:
    rows = _reference_rows(data)
    assert task.n_prompts == len(rows) and task.n_responses == len(rows[0])
    np.testing.assert_array_equal(task.reference, np.asarray(rows, dtype=np.float64))  # exactly as written
    labels = (data["prompts"][0] if "prompts" in data else data).get("responses")
    if labels is not None:  # null means "not given", as for every optional field
        assert task.responses == labels


@FUZZ
@given(blob=junk_bytes)
def test_task_file_of_any_bytes(tmp_path, blob):
    path = tmp_path / "task.json"
    path.write_bytes(blob)
    task = assert_loads_or_one_line_error(load_task, path)
    if task is not None:
        _check_nothing_lost(task, json.loads(blob))


@FUZZ
@given(data=json_values)
def test_task_from_any_json_value(data):
    if not isinstance(data, dict):
        data = {"prompts": data}
    task = assert_loads_or_one_line_error(task_from_dict, data)
    if task is not None:
        _check_nothing_lost(task, data)


@st.composite
def valid_tasks(draw):
    k = draw(st.integers(2, 5))
    raw = np.asarray(draw(st.lists(st.floats(0.05, 1.0), min_size=k, max_size=k)))
    reference = (raw / raw.sum()).tolist()
    data = {"reference": reference, "responses": [f"r{i}" for i in range(k)]}
    if draw(st.booleans()):
        data["rewards"] = draw(st.lists(st.floats(-5, 5), min_size=k, max_size=k))
    else:
        p = np.full((k, k), 0.5)
        for i in range(k):
            for j in range(i + 1, k):
                p[i, j] = draw(st.floats(0.0, 1.0))
                p[j, i] = 1.0 - p[i, j]
        data["preference"] = p.tolist()
    if draw(st.booleans()):
        data = {"prompts": [dict(data, prompt="q", weight=draw(st.floats(0.1, 2))) for _ in range(2)]}
    return data


def _break_one_field(draw_value, data: dict, key_choice) -> dict:
    entry = data["prompts"][0] if "prompts" in data else data
    entry[key_choice] = draw_value
    return data


@FUZZ
@given(data=valid_tasks(), junk=scalars | st.lists(scalars, max_size=6) | st.lists(st.lists(scalars, max_size=3)),
       key=st.sampled_from(["reference", "preference", "rewards", "sampling", "responses", "weight", "prompt",
                            "_target_", "description"]))
def test_valid_task_with_one_field_broken(data, junk, key):
    assert isinstance(task_from_dict(json.loads(json.dumps(data))), FiniteTask)  # the unbroken one loads
    broken = _break_one_field(junk, data, key)
    task = assert_loads_or_one_line_error(task_from_dict, broken)
    if task is not None:
        _check_nothing_lost(task, broken)


@pytest.mark.parametrize("data, message", [
    ({"reference": ["0.5", "0.5"], "rewards": [0, 1]}, r"field 'reference' must hold numbers"),
    ({"reference": [True, 0.5], "rewards": [0, 1]}, r"field 'reference' must hold numbers"),
    ({"reference": [0.5, 0.5], "rewards": [0, 1], "responses": "ab"}, r"field 'responses' must be a list of 2"),
    ({"reference": [0.5, 0.5], "rewards": [0, 1], "responses": 7}, r"field 'responses' must be a list of 2"),
    ({"reference": [0.5, 0.5], "rewards": [10**400, 1]}, r"field 'rewards' holds a number too large"),
    ({"reference": [0.5, 0.5], "rewards": [0, 1], "_target_": "os.system"}, r"unknown field\(s\) \['_target_'\]"),
])
def test_silent_coercions_are_refused(data, message):
    """Strings, booleans and over-long numbers are not numbers; a string is not a list of labels."""
    with pytest.raises(ValueError, match=message):
        task_from_dict(data)


def test_deep_nesting_is_one_line(tmp_path):
    path = tmp_path / "deep.json"
    path.write_text("[" * 100_000 + "]" * 100_000)
    with pytest.raises(ValueError, match=r"task file .*deep.json: nested too deeply to be a task file"):
        load_task(path)
