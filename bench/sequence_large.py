"""Bench: the 1,365-response sequence task end to end, one loss at a time.

    PYTHONPATH=. python bench/sequence_large.py [--only NAME,...] [--family margin|pair|all]
        [--target 0.05] [--full] [--json out.json] [--symbols 4] [--max-length 5] [KEY=VALUE ...]

For each loss, what ``polopt train task=sequence task.n_symbols=4 task.max_length=5 loss=NAME``
does, in this process and with the same functions (:mod:`polopt.commands.train`): the task, its
3.7 million weighted pairs and the exact optimum (``prepare``: the certified solve of
toy_tasks/exact), then the tiny transformer from its reference in exact mode, with the settings the
configuration gives that loss (conf/loss/, conf/tuning/) and any ``KEY=VALUE`` given here on top.
Prints, per loss: beta, the optimum's method and whether it is certified, the seconds of the
prepare step, the first logged step at which the TV to the optimum is <= ``--target`` (or the
steps run and the TV reached where it never is), the training seconds, and the one-minute load
average before and after the row (the machine is shared: compare rows of one run only).

By default a run stops at its first logged step within ``--target`` (the figure is the steps and
seconds to get there); ``--full`` runs the configured ``train.steps`` and reports the last TV.
``--starts N`` solves a pair objective's optimum from N seeded starts per prompt instead of the
solver's own number (``toy_tasks.exact.pairs.STARTS``; the first start is the reference): each start
is a full Newton solve of the 1,365 responses, seconds to minutes, and with N = 1 the optimum
is still certified by its gradient residual but not checked for uniqueness across starts (an objective
whose convexity proof holds, toy_tasks/exact/convexity.py, takes one start whatever N, and is proved unique).
Runs go one at a time, on the run's own thread count (one, the sequence task's choice).
Figures only; nothing passes or fails.
"""

from __future__ import annotations

import argparse
import contextlib
import functools
import json
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
SYMBOLS, MAX_LENGTH = 4, 5  # 1 + 4 + 16 + 64 + 256 + 1024 = 1,365 responses per prompt
MARGIN = ["logistic", "squared", "hinge", "huber", "exponential", "truncated_quadratic", "savage"]
PAIR = ["length_normalised_free", "length_regularised", "odds_ratio_with_nll", "plus_winner_nll",
        "winner_anchored", "reference_free_logistic", "calibrated_logistic", "chi_squared_link",
        "divergence_jensen_shannon", "divergence_alpha", "divergence_forward_kl"]


class TargetReached(Exception):
    """Raised from the evaluation callback to end a run at its first logged step within the target."""

    def __init__(self, record: dict):
        super().__init__(record)
        self.record = record


def watched(evaluate, *, target: float, log_every: int, steps: int, stop: bool, began: float, seen: list):
    """The session's evaluation, noting each logged step's TV; raises TargetReached at the first
    within ``target`` when ``stop``. The loop logs the first step, every ``log_every``-th and the last."""
    def evaluate_and_watch(policy) -> dict:
        record = evaluate(policy)
        k = len(seen)
        step = k + 1 if log_every == 1 else (1 if k == 0 else min(k * log_every, steps))
        seen.append({"step": step, "tv": record["tv_to_optimum"], "seconds": time.perf_counter() - began})
        if stop and record["tv_to_optimum"] is not None and record["tv_to_optimum"] <= target:
            raise TargetReached(seen[-1])
        return record
    return evaluate_and_watch


def task_overrides(symbols: int, max_length: int) -> list[str]:
    return ["task=sequence", f"task.n_symbols={symbols}", f"task.max_length={max_length}"]


def pair_solver_starts(starts: int | None):
    """A context in which the pair solver (and the group solver, which shares its Newton runs) takes
    ``starts`` seeded starts per prompt; None: the solvers' own number."""
    from unittest import mock

    from toy_tasks.exact import pairs
    from toy_tasks.finite import group_session

    stack = contextlib.ExitStack()
    if starts is not None:
        stack.enter_context(mock.patch.object(pairs, "solve_pairs", functools.partial(pairs.solve_pairs,
                                                                                      starts=starts)))
        stack.enter_context(mock.patch.object(group_session, "solve_groups",
                                              functools.partial(group_session.solve_groups, starts=starts)))
    return stack


def run_one(name: str, overrides: list[str], *, target: float, stop: bool, starts: int | None = None) -> dict:
    """One loss on the large task: prepare (task, pairs, exact solve), then train; the figures."""
    from omegaconf import OmegaConf

    from polopt.commands.config import compose
    from polopt.commands.train import objective_of, prepare_session, train_settings
    from polopt.parallel import distributed
    from polopt.training.contracts import session_tol
    from polopt.training.loop import optimise

    cfg = compose([f"loss={name}", "train.progress=false", *overrides])
    load_before = os.getloadavg()[0]
    began = time.perf_counter()
    with tempfile.TemporaryDirectory() as run_dir, pair_solver_starts(starts):
        loss, session = prepare_session(cfg, Path(run_dir), distributed.SINGLE)
    prepare_s = time.perf_counter() - began
    policy = session.build_policy(**OmegaConf.to_container(cfg.model, resolve=True))
    settings = train_settings(cfg, tol=session_tol(session))
    objective, evaluate = objective_of({"name": "offline"}, None, session, policy, loss, settings,
                                       distributed.SINGLE)
    seen: list[dict] = []
    start = time.perf_counter()
    evaluate = watched(evaluate, target=target, log_every=settings.log_every, steps=settings.steps, stop=stop,
                       began=start, seen=seen)
    try:
        optimise(policy, objective, settings, evaluate=evaluate)
    except TargetReached:
        pass
    optimum = session.finite.optimum if hasattr(session, "finite") else session.optimum  # pairs | groups
    hit = next((s for s in seen if s["tv"] is not None and s["tv"] <= target), None)
    return {"name": name, "beta": settings.beta, "lr": settings.optim.lr, "budget": settings.steps,
            "optimum_method": getattr(optimum, "method", None),
            "certified": flag(getattr(optimum, "certified", None)), "unique": flag(getattr(optimum, "unique", None)),
            "starts": starts, "prepare_s": prepare_s,
            "hit_step": None if hit is None else hit["step"], "hit_s": None if hit is None else hit["seconds"],
            "steps": seen[-1]["step"], "tv": seen[-1]["tv"], "best_tv": min(s["tv"] for s in seen),
            "train_s": time.perf_counter() - start, "load_before": load_before, "load_after": os.getloadavg()[0],
            "history": seen}


def flag(value) -> bool | None:
    """A solver's flag as a JSON value (the solvers may give numpy booleans)."""
    return None if value is None else bool(value)


def row(r: dict) -> str:
    if "error" in r:
        return f"{r['name']:<26} failed: {r['error']}"
    met = "yes" if r["hit_step"] is not None else "no"
    step = r["hit_step"] if r["hit_step"] is not None else r["steps"]
    return (f"{r['name']:<26}{r['beta']:>5g}{r['lr']:>8g}  {str(r['certified']):<6}{r['prepare_s']:>8.1f}  {met:<4}"
            f"{step:>6}{r['tv']:>8.4f}{r['train_s']:>8.1f}{r['prepare_s'] + r['train_s']:>8.1f}"
            f"{r['load_before']:>6.1f}{r['load_after']:>6.1f}")


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--symbols", type=int, default=SYMBOLS, help=f"task.n_symbols (default {SYMBOLS})")
    parser.add_argument("--max-length", type=int, default=MAX_LENGTH, help=f"task.max_length (default {MAX_LENGTH})")
    parser.add_argument("--only", default="", help="comma-separated loss names (default: --family's)")
    parser.add_argument("--family", choices=("margin", "pair", "all"), default="all")
    parser.add_argument("--target", type=float, default=0.05, help="TV to the exact optimum (default 0.05)")
    parser.add_argument("--full", action="store_true", help="run every configured step, not to the target")
    parser.add_argument("--starts", type=int, default=None,
                        help="seeded starts per prompt of the pair solver (default: the solver's own)")
    parser.add_argument("--json", default=None, help="append each row to this JSON Lines file")
    parser.add_argument("overrides", nargs="*", help="KEY=VALUE for every run, e.g. train.steps=600")
    args = parser.parse_args(argv)
    sys.path.insert(0, str(ROOT))
    families = {"margin": MARGIN, "pair": PAIR, "all": MARGIN + PAIR}
    names = [n for n in args.only.split(",") if n] or families[args.family]
    overrides = [*task_overrides(args.symbols, args.max_length), *args.overrides]
    print(f"polopt train {' '.join(overrides)} loss=NAME: {len(names)} losses, one at a "
          f"time, {os.cpu_count()} CPUs; target TV <= {args.target:g}, {'full runs' if args.full else 'stop there'}",
          flush=True)
    print(f"{'loss':<26}{'beta':>5}{'lr':>8}  {'cert':<6}{'prep s':>8}  {'met':<4}{'step':>6}{'TV':>8}"
          f"{'train s':>8}{'wall s':>8}{'load':>6}{'':>6}", flush=True)
    for name in names:
        try:
            r = run_one(name, overrides, target=args.target, stop=not args.full, starts=args.starts)
        except (ValueError, TypeError, FloatingPointError) as err:
            r = {"name": name, "error": str(err).splitlines()[0]}
        print(row(r), flush=True)
        if args.json:
            with open(args.json, "a", encoding="utf-8") as sink:
                sink.write(json.dumps(r) + "\n")


if __name__ == "__main__":
    main()
