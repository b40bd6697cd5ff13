"""How long ``polopt`` takes to print anything: wall time of ``--help``, ``COMMAND --help`` and ``polopt losses``
(each a fresh process, the best of ``--repeats``), beside ``import torch`` alone for scale.

    PYTHONPATH=. python bench/first_output.py [--repeats 5]

Prints figures; passes or fails nothing (tests/test_commands.py checks that these load no torch).
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
CASES = [["--help"], ["losses"], ["train", "--help"], ["check", "--help"], ["demo", "--help"], ["export", "--help"],
         ["data", "--help"], ["compare", "--help"]]


def best_of(argv: list[str], repeats: int) -> float:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        subprocess.run(argv, cwd=ROOT, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=True)
        times.append(time.perf_counter() - start)
    return min(times)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args(argv)
    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs; best of {args.repeats} fresh processes")
    print(f"{'python -c pass':<28} {best_of([sys.executable, '-c', 'pass'], args.repeats):6.2f} s")
    print(f"{'python -c import torch':<28} {best_of([sys.executable, '-c', 'import torch'], args.repeats):6.2f} s")
    for case in CASES:
        seconds = best_of([sys.executable, "-m", "polopt", *case], args.repeats)
        print(f"{'polopt ' + ' '.join(case):<28} {seconds:6.2f} s")


if __name__ == "__main__":
    main()
