"""Running ``python -m polopt`` as a user would, from the repository root, in a subprocess."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def polopt(*args, cwd=None):
    """``python -m polopt ARGS`` with the checkout on PYTHONPATH; the completed process."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    env.pop("POLOPT_DEBUG", None)
    return subprocess.run([sys.executable, "-m", "polopt", *args], capture_output=True, text=True,
                          cwd=cwd or ROOT, env=env, timeout=300)


def assert_one_line_errors(cases, run_dir: Path, capsys) -> None:
    """Each (args, pattern) of ``cases`` run in process through ``polopt.commands.main.main`` (the command
    line's error boundary without a process per case) exits 2 with one stderr line matching ``pattern``
    and no traceback; ``train`` cases get ``train.progress=false`` and ``hydra.run.dir=run_dir``."""
    import re

    from polopt.commands.main import main

    for args, message in cases:
        extra = ("train.progress=false", f"hydra.run.dir={run_dir}") if args[0] == "train" else ()
        assert main([*args, *extra]) == 2
        err = capsys.readouterr().err
        assert len(err.strip().splitlines()) == 1, err
        assert "Traceback" not in err
        assert re.search(message, err), err
