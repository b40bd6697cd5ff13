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
