"""Response lengths in finite tasks: the optional ``"lengths"`` field of a task file.

What is checked and against what: the default (1 token per response, docs/maths.md's contract), a
round trip through the JSON file, one-line errors naming the file, the field, what was given and what
to do, ``polopt export`` writing the field, and the sequence task's lengths against a count of the
non-padding tokens of each enumerated response (counted here from the token tensor, not from the code
under test).
"""

import json

import numpy as np
import pytest
from helpers_cli import polopt

from toy_tasks.finite.task import load_task, make_task, task_from_dict
from toy_tasks.sequence.task import sequence_task

FLAT = {"reference": [0.2, 0.3, 0.5], "rewards": [0.0, 1.0, -1.0]}


def test_lengths_default_to_one_token_per_response():
    task = task_from_dict(FLAT)
    np.testing.assert_array_equal(task.lengths, np.ones((1, 3)))


def test_lengths_round_trip_through_a_task_file(tmp_path):
    path = tmp_path / "long.json"
    path.write_text(json.dumps({**FLAT, "lengths": [3, 1, 12]}))
    task = load_task(path)
    np.testing.assert_array_equal(task.lengths, [[3, 1, 12]])
    again = load_task(task.save(tmp_path / "again.json"))
    np.testing.assert_array_equal(again.lengths, [[3, 1, 12]])


def test_per_prompt_lengths_and_a_prompt_without_them():
    data = {"prompts": [{**FLAT, "lengths": [2, 2, 7]}, dict(FLAT)]}
    task = task_from_dict(data)
    np.testing.assert_array_equal(task.lengths, [[2, 2, 7], [1, 1, 1]])
    assert task.to_dict()["prompts"][1]["lengths"] == [1, 1, 1]


@pytest.mark.parametrize(("lengths", "match"), [
    ([1, 2], r"t\.json: field 'lengths' must have 3 entries, one per response .*got 2.*leave 'lengths' out"),
    ([1, 0, 2], r"field 'lengths' entry 1 is 0; every length must be a positive whole number"),
    ([1, -3, 2], r"field 'lengths' entry 1 is -3"),
    ([1, 2.5, 2], r"field 'lengths' must hold whole numbers of tokens, got '\[1, 2.5, 2\]'"),
    ([1, "2", 2], r"field 'lengths' must hold whole numbers of tokens"),
    ([1, True, 2], r"field 'lengths' must hold whole numbers of tokens"),
])
def test_bad_lengths_get_one_line(tmp_path, lengths, match):
    path = tmp_path / "t.json"
    path.write_text(json.dumps({**FLAT, "lengths": lengths}))
    with pytest.raises(ValueError, match=match) as err:
        load_task(path)
    assert "\n" not in str(err.value)


def test_bad_lengths_of_one_prompt_are_named():
    data = {"prompts": [{**FLAT, "lengths": [2, 2, 7]}, {**FLAT, "lengths": [1, 1]}]}
    with pytest.raises(ValueError, match=r"field 'prompts\[1\]\.lengths' must have 3 entries.*got 2"):
        task_from_dict(data, where="task file two.json")
    data["prompts"][1]["lengths"] = [1, 1, 0]
    with pytest.raises(ValueError, match=r"field 'prompts\[1\]\.lengths' entry 2 is 0"):
        task_from_dict(data)


def test_make_task_takes_lengths_per_prompt():
    task = make_task([[0.5, 0.5], [0.1, 0.9]], rewards=[[0, 1], [1, 0]], lengths=[[1, 4], [2, 3]])
    np.testing.assert_array_equal(task.lengths, [[1, 4], [2, 3]])


def test_export_writes_the_lengths(tmp_path):
    out = polopt("export", "bradley_terry", str(tmp_path / "bt.json"), "task.n_responses=4")
    assert out.returncode == 0, out.stderr
    assert json.loads((tmp_path / "bt.json").read_text())["lengths"] == [1, 1, 1, 1]


def test_export_rejects_a_file_with_bad_lengths_in_one_line(tmp_path):
    path = tmp_path / "bad.json"
    path.write_text(json.dumps({**FLAT, "lengths": [1, 2]}))
    out = polopt("train", "task=file", f"task.path={path}", "train.steps=1", "train.progress=false",
                 f"hydra.run.dir={tmp_path / 'run'}")
    assert out.returncode == 2
    assert "field 'lengths' must have 3 entries" in out.stderr and len(out.stderr.strip().splitlines()) == 1


def test_the_sequence_task_carries_its_token_counts():
    task = sequence_task(n_symbols=2, max_length=3, n_prompts=2, reference_width=8, reference_layers=1,
                         reference_heads=2, seed=0)
    # tokens of each enumerated response, counted from the padded token tensor: symbols and end token
    counted = (task.response_tokens != task.vocab.pad_id).sum(dim=1).numpy()
    np.testing.assert_array_equal(task.finite.lengths, np.broadcast_to(counted, (2, task.n_responses)))
    assert counted.min() == 1 and counted.max() == 3  # "<end>" alone; three symbols with no end token
