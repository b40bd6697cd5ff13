"""How fast pair files are read and checked, against a bare read of the same file in the same run.

    PYTHONPATH=. python bench/data_load.py [--pairs 5000]

Writes the invented library-desk files (good rows only: the bare reads would stop at a
bad byte, pyarrow's included) to a temporary folder, then for each format prints the
seconds of ``polopt.data.load_pairs`` and of a bare reference read that checks nothing
(JSONL: ``json.loads`` per line; CSV: ``csv.reader``; Parquet and folder: ``datasets`` to
Python lists), and their ratio. Prints numbers only; never passes or fails.
"""

from __future__ import annotations

import argparse
import csv
import json
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from examples.library_desk import MAX_LENGTH, write_all  # noqa: E402
from polopt.data import load_pairs  # noqa: E402


def bare_read(path: Path, fmt: str) -> int:
    if fmt == "jsonl":
        with path.open("rb") as f:
            return sum(1 for line in f if line.strip() and _loads(line))
    if fmt == "csv":
        with path.open(encoding="utf-8", errors="replace", newline="") as f:
            return sum(1 for _ in csv.reader(f)) - 1
    import datasets

    ds = datasets.Dataset.from_parquet(str(path)) if fmt == "parquet" else datasets.load_from_disk(str(path))
    return len(ds.with_format("arrow")[:].to_pylist())


def _loads(line: bytes):
    try:
        return json.loads(line.decode("utf-8", errors="replace")) or True
    except ValueError:
        return True


def best_of(fn, repeats: int = 3) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--pairs", type=int, default=5000)
    args = parser.parse_args()
    import datasets

    datasets.disable_progress_bars()
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)
        write_all(out, args.pairs, seed=0, bad=False, weights=True)
        print(f"{'format':<8} {'rows':>7} {'load_pairs s':>13} {'bare read s':>12} {'ratio':>7} {'rows/s':>10}")
        for fmt, name in (("jsonl", "pairs.jsonl"), ("csv", "pairs.csv"), ("parquet", "pairs.parquet"),
                          ("folder", "pairs_folder")):
            path = out / name
            load_pairs(path, max_length=MAX_LENGTH)  # warm imports and caches once
            ours = best_of(lambda p=path: load_pairs(p, max_length=MAX_LENGTH))
            bare = best_of(lambda p=path, f=fmt: bare_read(p, f))
            rows = load_pairs(path, max_length=MAX_LENGTH).accounting["rows_in"]
            print(f"{fmt:<8} {rows:>7} {ours:>13.3f} {bare:>12.3f} {ours / bare:>7.1f} {rows / ours:>10.0f}")


if __name__ == "__main__":
    main()
