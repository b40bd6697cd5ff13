"""Peak memory and rows/s of ``polopt train task=pairs task.stream=true`` on generated files of two sizes.

    PYTHONPATH=. python bench/stream_file.py [--sizes 100000 1000000] [--steps 20] [--json out.json]

For each size, writes a JSON Lines file of invented word pairs (each row distinct, plus one bad
row per 1,000: invalid JSON, so the reject path runs too), then runs ``polopt train task=pairs
task.stream=true`` on it in a fresh process (a tiny transformer, ``--steps`` minibatch steps, the
summary's statistics over the first 2,000 pairs: ``task.summary_pairs``) and
reads that process's peak resident set size (``resource.getrusage(RUSAGE_CHILDREN).ru_maxrss`` in a
wrapper process that runs only this one child). The rows/s of the validation pass come from the
run's own summary (``data.rows_per_s``: rows read, checked, deduplicated, tokenised and written to
the Arrow file, per second of the pass). Prints the figures and the ratio of the peaks; never passes
or fails. Peak memory does not depend on the machine's load; rows/s does (the load average is
printed beside them).
"""

from __future__ import annotations

import argparse
import json
import os
import random
import resource
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
WORDS = ["amber", "birch", "cobalt", "dune", "ember", "fjord", "glade", "harbor", "iris", "juniper", "kelp", "lumen",
         "moss", "nectar", "opal", "pine", "quartz", "reed", "slate", "thistle"]
RUN = ["task=pairs", "task.stream=true", "model=transformer", "model.width=32", "model.layers=2", "model.context=128",
       "train.batch_size=64", "train.progress=false", "train.log_every=10", "optim.schedule=constant",
       "task.summary_pairs=2000"]


def write_file(path: Path, n: int, seed: int = 0) -> Path:
    """``n`` rows: row i's prompt carries its number, so no two rows are duplicates; every 1000th is bad JSON."""
    rng = random.Random(seed)

    def text(k: int) -> str:
        return " ".join(rng.choice(WORDS) for _ in range(rng.randint(1, k)))

    with path.open("w") as f:
        for i in range(n):
            if i % 1000 == 999:
                f.write("{not json\n")
                continue
            w = text(8)
            f.write(json.dumps({"prompt": f"{i} {text(4)}", "winner": w, "loser": w + " " + text(3)}) + "\n")
    return path


def free_port() -> int:
    """A TCP port nobody listens on now (bound to port 0, the system picks one)."""
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def measured_child(cmd: list[str]) -> None:
    """Run ``cmd`` as the only child; print its exit status and peak RSS (MiB) as JSON."""
    done = subprocess.run(cmd, cwd=ROOT, env={**os.environ, "PYTHONPATH": str(ROOT)}, capture_output=True,
                          text=True)
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    print(json.dumps({"returncode": done.returncode, "peak_rss_mib": peak, "stderr": done.stderr[-2000:]}))


def run_size(n: int, steps: int, tmp: Path) -> dict:
    data = write_file(tmp / f"pairs-{n}.jsonl", n)
    run_dir = tmp / f"run-{n}"
    cmd = [sys.executable, "-m", "polopt", "train", *RUN, f"task.path={data}", f"train.steps={steps}",
           f"hydra.run.dir={run_dir}"]
    wrapper = subprocess.run([sys.executable, __file__, "--child", json.dumps(cmd)], cwd=ROOT, capture_output=True,
                             text=True, env={**os.environ, "PYTHONPATH": str(ROOT)})
    out = json.loads(wrapper.stdout.strip().splitlines()[-1])
    if out["returncode"] != 0:
        raise RuntimeError(f"polopt train on {n} pairs failed: {out['stderr']}")
    summary = json.loads((run_dir / "summary.json").read_text())
    a = summary["data"]
    return {"pairs": n, "file_mib": data.stat().st_size / 2**20, "peak_rss_mib": out["peak_rss_mib"],
            "rows_in": a["rows_in"], "rows_accepted": a["rows_accepted"], "rows_rejected": a["rows_rejected"],
            "pass_seconds": a["pass_seconds"], "rows_per_s": a["rows_per_s"],
            "arrow_mib": (run_dir / "pairs.arrow").stat().st_size / 2**20, "steps": summary["steps"]}


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[100_000, 1_000_000])
    parser.add_argument("--steps", type=int, default=20)
    parser.add_argument("--json", type=Path, default=None)
    parser.add_argument("--child", default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child is not None:
        measured_child(json.loads(args.child))
        return
    rows = []
    with tempfile.TemporaryDirectory(prefix="polopt-stream-") as tmp:
        for n in args.sizes:
            rows.append(run_size(n, args.steps, Path(tmp)))
            r = rows[-1]
            print(f"{r['pairs']:>9} pairs ({r['file_mib']:.0f} MiB JSONL, {r['arrow_mib']:.0f} MiB Arrow): peak RSS "
                  f"{r['peak_rss_mib']:.0f} MiB; pass {r['pass_seconds']:.1f} s, {r['rows_per_s']:.0f} rows/s; "
                  f"rows_in {r['rows_in']} = {r['rows_accepted']} + {r['rows_rejected']}"
                  f"  (load {os.getloadavg()[0]:.1f})",
                  flush=True)
    if len(rows) > 1:
        print(f"peak RSS ratio, {rows[-1]['pairs']} vs {rows[0]['pairs']} pairs: "
              f"{rows[-1]['peak_rss_mib'] / rows[0]['peak_rss_mib']:.3f}")
    if args.json:
        args.json.write_text(json.dumps(rows, indent=1) + "\n")


if __name__ == "__main__":
    main()
