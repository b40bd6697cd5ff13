"""Bench: the exact solvers beside the landed ones, in the same run, on the enumerable sequence task.

    PYTHONPATH=. python bench/exact_solve.py [--threads 1] [--blas-threads N] [--repeats N] [--objectives NAME ...]
                                             [--margin NAME ...] [--large] [--landed-large] [--only-large]
                                             [--large-objectives NAME ...] [--groups NAME ...]

For every built-in pair objective (and the margin losses named by ``--margin``) on ``task=sequence``
(3 symbols, length 5: 364 responses per prompt, 2 prompts), solves the exact optimum with the landed solver
(:mod:`toy_tasks.exact.landed`) and the fast one (:mod:`toy_tasks.exact.pairs`, :mod:`toy_tasks.exact.margin`)
one after the other, and prints each one's seconds, their ratio, the TV between the two answers and both
certificates (finite, unique, certified, residual), and the seconds of CPU time of this process beside the wall
clock; then the built-in group objectives (``--groups``; the fast solver only: the landed code had none) on the
pairs (or single labelled responses) of the same task. Then DPO-Positive's kink case from every start (how many
of the 3 starts per prompt certified, for each solver), and with ``--large`` the 1,365-response task
(4 symbols, length 5) with the fast solver (the landed one too with ``--landed-large``: it took over 18
minutes for 3 of 4 starts when measured for issue 26). The machine's load average (os.getloadavg) is
printed before and after: other processes on the machine slow both solvers alike, but not evenly over time.

Threads as a run has them: torch on ``--threads`` (default 1, what ``polopt train`` sets for a finite task),
BLAS (numpy / scipy, which the landed solver's trust region calls) at its own default unless
``--blas-threads`` sets it; the fast solver does its linear algebra in torch. On a shared machine a
multi-threaded BLAS pool spins and slows the landed solver several times: ``--blas-threads 1`` compares the
two on equal terms. Figures only; nothing passes or fails.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time


def _limit_blas(argv: list[str]) -> str:
    """Set the BLAS thread count before numpy loads it (it reads the environment once, at import)."""
    if "--blas-threads" not in argv:
        return "library default"
    threads = argv[argv.index("--blas-threads") + 1]
    for key in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[key] = threads
    return threads


def parse(argv: list[str]) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--threads", type=int, default=1, help="torch threads")
    parser.add_argument("--blas-threads", type=int, default=None, help="BLAS threads (default: the library's)")
    parser.add_argument("--objectives", nargs="*", default=None, help="pair objectives (default: every built-in)")
    parser.add_argument("--margin", nargs="*", default=["exponential", "savage", "huber"],
                        help="margin losses solved by Newton (no closed form on this task)")
    parser.add_argument("--symbols", type=int, default=3)
    parser.add_argument("--max-length", type=int, default=5)
    parser.add_argument("--large", action="store_true", help="also the 1,365-response task (4 symbols)")
    parser.add_argument("--landed-large", action="store_true", help="run the landed solver on it too (slow)")
    parser.add_argument("--large-objectives", nargs="*", default=None,
                        help="pair objectives on the large task (default: every built-in)")
    parser.add_argument("--groups", nargs="*", default=None,
                        help="group objectives (default: every built-in that the 364-response task admits)")
    parser.add_argument("--skip-kink", action="store_true")
    parser.add_argument("--repeats", type=int, default=1,
                        help="on the 364-response task, each solve this many times and its medians")
    parser.add_argument("--only-large", action="store_true", help="skip the 364-response task")
    return parser.parse_args(argv)


def timed(fn):
    """``fn()``, its wall seconds and its CPU seconds (this process: other processes on a shared machine slow
    the wall clock, much less the CPU time)."""
    start, cpu = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - start, time.process_time() - cpu


def certificate(optimum) -> str:
    residual = "-" if optimum.residual is None else f"{optimum.residual:.1e}"
    return f"finite={optimum.finite} unique={optimum.unique} certified={optimum.certified} residual={residual}"


def short_certificate(optimum) -> str:
    """The certificate in a table cell: which of finite / unique / certified hold, and the residual."""
    held = [word for word, ok in (("finite", optimum.finite), ("unique", optimum.unique),
                                  ("certified", optimum.certified)) if ok]
    residual = "-" if optimum.residual is None else f"{optimum.residual:.1e}"
    return f"{', '.join(held) or 'none'}; residual {residual}"


def distance(task, a, b) -> str:
    import numpy as np

    if not (a.finite and b.finite):
        return "-" if a.limit_support == b.limit_support else "limit supports differ"
    p, q = task.policy_from_logratios(a.logratios), task.policy_from_logratios(b.logratios)
    return f"{0.5 * np.abs(p - q).sum(axis=1).max():.1e}"


def median_timed(fn, repeats: int):
    """``fn()`` run ``repeats`` times: its last answer and the median wall and CPU seconds (a solve of
    hundredths of a second varies by more than its own length between single runs)."""
    runs = [timed(fn) for _ in range(max(1, repeats))]
    return runs[-1][0], statistics.median(r[1] for r in runs), statistics.median(r[2] for r in runs)


def solve_both(name: str, finite, *, margin: bool, landed: bool = True, repeats: int = 1) -> dict:
    """Both solvers' answers and seconds for one objective on ``finite`` (a FiniteTask)."""
    from polopt import losses
    from toy_tasks.exact import margin as fast_margin
    from toy_tasks.exact import pairs as fast_pairs
    from toy_tasks.exact.landed import margin as landed_margin
    from toy_tasks.exact.landed import pairs as landed_pairs

    weights = finite.win_weights()
    if margin:
        loss = losses.resolve_margin(name)
        run = lambda module: lambda: module.solve(loss, weights, beta=0.5)  # noqa: E731
        fast_module, landed_module = fast_margin, landed_margin
    else:
        objective = losses.resolve(name)
        run = lambda module: lambda: module.solve_pairs(  # noqa: E731
            objective, weights, finite.reference, finite.lengths, beta=0.5, rewards=finite.rewards, population=True)
        fast_module, landed_module = fast_pairs, landed_pairs
    slow, slow_s, slow_cpu = median_timed(run(landed_module), repeats) if landed else (None, None, None)
    fast, fast_s, fast_cpu = median_timed(run(fast_module), repeats)
    return {"name": name, "fast": fast, "fast_s": fast_s, "fast_cpu": fast_cpu, "landed": slow, "landed_s": slow_s,
            "landed_cpu": slow_cpu}


def solve_group(name: str, finite) -> dict:
    """The fast solver's answer and seconds for a group objective on ``finite`` (the landed code had no group
    solver): pair feedback for an objective of rankings, unpaired single responses for one of labels."""
    from polopt import losses
    from toy_tasks.exact.groups import solve_groups
    from toy_tasks.finite.feedback import population_groups

    objective = losses.resolve(name)
    kind = "unpaired" if objective.reads_feedback("unpaired") else "pairs"
    groups = population_groups(finite, kind, 1 if kind == "unpaired" else 2)
    fast, fast_s, fast_cpu = timed(lambda: solve_groups(objective, groups, finite.reference, finite.lengths, beta=0.5,
                                                        rewards=finite.rewards))
    return {"name": name, "fast": fast, "fast_s": fast_s, "fast_cpu": fast_cpu, "landed": None, "landed_s": None,
            "landed_cpu": None, "feedback": kind}


def print_row(row: dict, finite, table: list[str] | None = None) -> None:
    """One objective's figures; with ``table``, its markdown row appended there (wall s, ratio, CPU s, ratio)."""
    fast, slow = row["fast"], row["landed"]
    if slow is None:
        print(f"{row['name']:28s} landed        -   fast {row['fast_s']:7.2f} s   ratio     -   "
              f"fast: {certificate(fast)}", flush=True)
        print(f"{'':28s}   cpu: fast {row['fast_cpu']:.2f} s", flush=True)
        if table is not None:
            table.append(f"| {row['name']} | - | {row['fast_s']:.2f} | - | - | {row['fast_cpu']:.2f} | - | "
                         f"{short_certificate(fast)} |")
        return
    wall, cpu = row["landed_s"] / row["fast_s"], row["landed_cpu"] / row["fast_cpu"]
    print(f"{row['name']:28s} landed {row['landed_s']:7.2f} s   fast {row['fast_s']:7.2f} s   "
          f"ratio {wall:6.1f}x   TV {distance(finite, fast, slow):>8s}", flush=True)
    print(f"{'':28s}   cpu: landed {row['landed_cpu']:.2f} s   fast {row['fast_cpu']:.2f} s   ratio {cpu:.1f}x",
          flush=True)
    print(f"{'':28s}   landed: {certificate(slow)}\n{'':28s}   fast:   {certificate(fast)}", flush=True)
    if table is not None:
        table.append(f"| {row['name']} | {row['landed_s']:.2f} | {row['fast_s']:.2f} | {wall:.1f}x | "
                     f"{row['landed_cpu']:.2f} | {row['fast_cpu']:.2f} | {cpu:.1f}x | {short_certificate(fast)} |")


def kink_starts(finite) -> None:
    """How many starts certify DPO-Positive's kinked optimum, per solver (3 seeded starts per prompt)."""
    import numpy as np

    from polopt import losses
    from toy_tasks.exact import pairs as fast_pairs
    from toy_tasks.exact.landed import pairs as landed_pairs

    objective = losses.resolve("winner_anchored")
    for label, module in (("landed", landed_pairs), ("fast", fast_pairs)):
        certified, start_s, start_cpu = 0, time.perf_counter(), time.process_time()
        for x in range(finite.n_prompts):
            log_ref = np.log(finite.reference[x])
            problem = module._Prompt(objective, finite.win_weights()[x], log_ref, finite.lengths[x], 0.5)
            for start, z0 in enumerate(module._starts(log_ref, module.STARTS, x)):
                if label == "landed":  # the landed solver searched a kink from the reference start only at K > 128
                    run = module._solve_prompt(problem, z0, kink_search=len(log_ref) <= module.KINK_LIMIT or start == 0)
                else:
                    run = module._solve_prompt(problem, z0)
                certified += run["residual"] <= module.CERTIFIED
        print(f"winner_anchored, {label:6s}: {certified} of {finite.n_prompts * module.STARTS} starts certified "
              f"({time.perf_counter() - start_s:.1f} s, cpu {time.process_time() - start_cpu:.1f} s)", flush=True)


def default_groups() -> list[str]:
    """The built-in group objectives of rankings or labels: on 364 responses the task enumerates pairs and single
    labelled responses; groups of scores (and rankings of 3) are more than it admits."""
    from polopt import losses

    return [n for n in losses.builtin_names("group")
            if losses.resolve(n).reads_feedback("pairs") or losses.resolve(n).reads_feedback("unpaired")]


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    blas = _limit_blas(argv)
    args = parse(argv)
    import torch

    from polopt import losses
    from toy_tasks.sequence.task import sequence_task

    torch.set_num_threads(args.threads)
    print(f"torch threads {args.threads}, BLAS threads {blas}, {os.cpu_count()} CPUs; load average before: "
          f"{os.getloadavg()}", flush=True)
    if not args.only_large:
        finite = sequence_task(n_symbols=args.symbols, max_length=args.max_length).finite_task()
        print(f"sequence task: {finite.n_responses} responses per prompt, {finite.n_prompts} prompts", flush=True)
        table = ["| objective | landed s | fast s | ratio | landed CPU s | fast CPU s | CPU ratio | fast certificate |",
                 "|---|---|---|---|---|---|---|---|"]
        for name in args.objectives if args.objectives is not None else losses.builtin_names("pair"):
            print_row(solve_both(name, finite, margin=False, repeats=args.repeats), finite, table)
        for name in args.margin:
            print_row(solve_both(name, finite, margin=True, repeats=args.repeats), finite, table)
        for name in args.groups if args.groups is not None else default_groups():
            print_row(solve_group(name, finite), finite, table)
        if not args.skip_kink:
            kink_starts(finite)
        print("\n".join(table), flush=True)
    if args.large:
        large = sequence_task(n_symbols=4, max_length=5).finite_task()
        print(f"large sequence task: {large.n_responses} responses per prompt", flush=True)
        names = args.large_objectives if args.large_objectives is not None else losses.builtin_names("pair")
        table = ["| objective (1,365 responses) | landed s | fast s | ratio | landed CPU s | fast CPU s | CPU ratio | "
                 "fast certificate |", "|---|---|---|---|---|---|---|---|"]
        for name in names:
            print_row(solve_both(name, large, margin=False, landed=args.landed_large), large, table)
        for name in args.margin:
            print_row(solve_both(name, large, margin=True, landed=args.landed_large), large, table)
        print("\n".join(table), flush=True)
    print(f"load average after: {os.getloadavg()}", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
