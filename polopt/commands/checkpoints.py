"""``polopt checkpoints RUN_DIR``: verify a run folder's checkpoints and show the resume point."""

from __future__ import annotations

import argparse


def main(argv: list[str]) -> int:
    """The ``polopt checkpoints`` subcommand."""

    parser = argparse.ArgumentParser(prog="polopt checkpoints",
                                     description="Verify every checkpoint of a run folder: size, SHA-256 and "
                                                 "torch.load(weights_only=True); the newest good one is what a "
                                                 "rerun resumes from.")
    parser.add_argument("run_dir", help="a run folder (hydra.run.dir of polopt train)")
    args = parser.parse_args(argv)
    from pathlib import Path  # after parsing: --help loads no torch

    from polopt.checkpoints.store import list_checkpoints

    folder = Path(args.run_dir) / "checkpoints"
    if not folder.is_dir():
        raise ValueError(f"{folder} does not exist; give the run folder of a polopt train run")
    entries = list_checkpoints(folder)
    for e in entries:
        print(f"{e['file']}  step {e['step']:>8}  {'ok' if e['ok'] else 'BAD: ' + e['problem']}")
    good = [e for e in entries if e["ok"]]
    print(f"resume point: {good[-1]['file'] if good else 'none (a rerun starts from step 0)'}")
    return 0 if len(good) == len(entries) else 1
