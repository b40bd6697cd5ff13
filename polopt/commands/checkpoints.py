"""``polopt checkpoints RUN_DIR``: verify a run folder's checkpoints and show the resume point."""

from __future__ import annotations

import argparse
import sys


def main(argv: list[str]) -> int:
    """The ``polopt checkpoints`` subcommand."""
    from pathlib import Path

    from polopt.checkpoint import list_checkpoints

    parser = argparse.ArgumentParser(prog="polopt checkpoints",
                                     description="Verify every checkpoint of a run folder: size, SHA-256 and "
                                                 "torch.load(weights_only=True); the newest good one is what a "
                                                 "rerun resumes from.")
    parser.add_argument("run_dir", help="a run folder (hydra.run.dir of polopt train)")
    args = parser.parse_args(argv)
    folder = Path(args.run_dir) / "checkpoints"
    if not folder.is_dir():
        print(f"polopt checkpoints: error: {folder} does not exist; give the run folder of a polopt train run",
              file=sys.stderr)
        return 2
    entries = list_checkpoints(folder)
    for e in entries:
        print(f"{e['file']}  step {e['step']:>8}  {'ok' if e['ok'] else 'BAD: ' + e['problem']}")
    good = [e for e in entries if e["ok"]]
    print(f"resume point: {good[-1]['file'] if good else 'none (a rerun starts from step 0)'}")
    return 0 if len(good) == len(entries) else 1
