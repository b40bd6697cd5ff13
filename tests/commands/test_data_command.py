"""``polopt data FILE``: the report, the JSON accounting, the rejects file, the PNG, and one-line
errors with exit code 2. The file comes from examples/library_desk.py with its own record of
where the bad rows are."""

from __future__ import annotations

import json
import re

import pytest

from examples.library_desk import MAX_LENGTH, write_all
from polopt.commands.main import main


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    out = tmp_path_factory.mktemp("desk")
    return out, write_all(out, 40, seed=3, bad=True, weights=True)


def test_text_report_rejects_file_and_plot(files, tmp_path, capsys):
    out, manifest = files
    folder = tmp_path / "report"
    rejects, plot = folder / "rejects.jsonl", folder / "lengths.png"
    code = main(["data", str(out / "pairs.jsonl"), f"task.max_length={MAX_LENGTH}", f"hydra.run.dir={folder}",
                 "--plot"])
    text = capsys.readouterr().out
    n_bad, n_good = len(manifest["expected"]["jsonl"]), len(manifest["good"])
    assert code == 0
    assert f"rows_in {n_good + n_bad} = rows_accepted {n_good} + rows_rejected {n_bad}" in text
    assert "pair length (bytes: prompt + longer response)" in text and "first rejects (1-based line" in text
    assert len(rejects.read_text(encoding="utf-8").splitlines()) == n_bad
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, section 5.2)
    report = json.loads((folder / "report.json").read_text(encoding="utf-8"))
    assert report["rows_rejected"] == n_bad and report["rejects_file"] == str(rejects)


def test_json_accounting(files, tmp_path, capsys):
    out, manifest = files
    code = main(["data", str(out / "pairs.csv"), "task.max_length=200", "task.truncation=truncate_response",
                 f"hydra.run.dir={tmp_path / 'r'}", "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code == 0
    assert report["rows_in"] == report["rows_accepted"] + report["rows_rejected"]
    assert report["rows_in"] == len(manifest["good"]) + len(manifest["expected"]["csv"])
    assert report["truncation"] == "truncate_response" and report["rows_truncated"] > 0
    assert report["rejects_file"] == str(tmp_path / "r" / "rejects.jsonl")


def test_by_default_the_report_goes_under_runs_never_beside_the_input_or_loose(files, tmp_path, monkeypatch,
                                                                             capsys):
    out, _ = files
    monkeypatch.chdir(tmp_path)
    before = sorted(p.name for p in out.iterdir())
    assert main(["data", str(out / "pairs_folder")]) == 0
    (folder,) = (tmp_path / "runs" / "data").glob("*/*")  # runs/data/DATE/TIME, as polopt train's runs/DATE/TIME
    assert sorted(p.name for p in folder.iterdir()) == ["rejects.jsonl", "report.json"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["runs"] and sorted(p.name for p in out.iterdir()) == before
    assert f"rejects file: {folder.relative_to(tmp_path) / 'rejects.jsonl'}" in capsys.readouterr().out


@pytest.mark.parametrize("command", ["data", "reward", "compare", "realign", "sft", "demo", "evaluate"])
def test_a_hydra_key_other_than_the_output_folder_is_refused_in_one_line(command, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    first = {"data": ["pairs.jsonl"], "sft": ["notes.txt"], "evaluate": ["runs/mine"]}.get(command, [])
    assert main([command, *first, f"hydra.sweep.dir={tmp_path / 'x'}"]) == 2
    assert capsys.readouterr().err == (f"polopt {command}: error: polopt {command} takes hydra.run.dir=DIR (its output "
                                       f"folder) and no other hydra key; 'hydra.sweep.dir={tmp_path / 'x'}' would "
                                       "change nothing here\n")
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize(("args", "message"), [
    (["missing.jsonl"], r"^polopt data: error: pair file not found: 'missing.jsonl'"),
    (["{file}", "task.columns={{prompt: question}}"], r"^polopt data: error: .*missing column\(s\) question; the file "
                                                    r"has: 'prompt', 'winner', 'loser', 'weight'"),
    (["{file}", "task.max_length=1"], r"^polopt data: error: max_length must be an integer >= 2"),
    (["{file}", "task.max_lenght=9"], r"^polopt data: error: unknown key 'task.max_lenght'; did you mean "
                                      r"task.max_length\?$"),
    (["{file}", "beta=0.1"], r"^polopt data: error: polopt data reads task.columns, .* only; 'beta=0.1' would "
                             r"change nothing here$"),
])
def test_file_level_problems_are_one_line_and_exit_2(files, tmp_path, monkeypatch, capsys, args, message):
    out, _ = files
    monkeypatch.chdir(tmp_path)
    code = main(["data", *[a.format(file=out / "pairs.jsonl") for a in args]])
    err = capsys.readouterr().err
    assert code == 2
    assert len(err.strip().splitlines()) == 1
    assert re.search(message, err)


def test_help_lists_the_command(capsys):
    assert main(["--help"]) == 0
    assert "data" in capsys.readouterr().out
    with pytest.raises(SystemExit) as stop:
        main(["data", "--help"])
    assert stop.value.code == 0
    assert "truncate_response" in capsys.readouterr().out
