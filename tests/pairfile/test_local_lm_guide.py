"""docs/guides/your-own-model.md runs as written: its bash blocks (the example model, the runs, sft then a run) and its
Python block (loading RUN/policy with transformers and peft), taken from the page itself, in a fresh folder."""

from __future__ import annotations

import json
import re
import shlex
import subprocess
import sys
from pathlib import Path

import pytest

pytest.importorskip("transformers")
pytest.importorskip("peft")

from polopt.commands.main import main  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
GUIDE = ROOT / "docs" / "guides" / "your-own-model.md"
pytestmark = pytest.mark.slow  # four training runs and a fresh interpreter or two


def blocks(language: str) -> list[str]:
    return re.findall(rf"```{language}\n(.*?)```", GUIDE.read_text(encoding="utf-8"), re.S)


def test_the_guide_runs_as_written(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    lines = [line for block in blocks("bash") for line in block.splitlines() if line.strip()]
    for line in lines:
        if line.startswith("torchrun"):
            continue  # several processes: tests/pairfile/test_local_lm_runs.py
        words = shlex.split(line)
        if words[0] == "python":
            done = subprocess.run([sys.executable, str(ROOT / words[1]), *words[2:]], capture_output=True, text=True,
                                  timeout=300)
            assert done.returncode == 0, done.stderr[-2000:]
        else:
            assert words[0] == "polopt", line
            assert main(words[1:]) == 0, (line, capsys.readouterr().err)
    for run in ("own-full", "own-lora", "own-after-sft"):
        summary = json.loads((tmp_path / "runs" / run / "summary.json").read_text())
        assert summary["rows_in"] == summary["rows_accepted"] == 24  # plain and chat rows, every one accepted
        assert summary["steps"] == 20 and summary["saved_policy"].endswith(f"{run}/policy")
    (python,) = blocks("python")
    done = subprocess.run([sys.executable, "-c", python], capture_output=True, text=True, timeout=300,
                          cwd=tmp_path)
    assert done.returncode == 0, done.stderr[-2000:]
