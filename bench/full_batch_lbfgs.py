"""Bench: the sequence task's whole population objective minimised by L-BFGS, float64 against float32.

    PYTHONPATH=. python bench/full_batch_lbfgs.py [--loss divergence_forward_kl] [--beta 0.5]
        [--rounds 100] [--report-every 10] [--dtypes float64,float32] [KEY=VALUE task options]

Why: on the default sequence task the forward-KL and alpha links of f-DPO (Wang et al. 2023) are
nearly flat where their optimum lies (the gradient in a log-ratio h scales as e^{-h}), and the
trainer's Adam ends far from the exact optimum (TV 0.40 after 400 steps, 0.11 after 3000). In exact
mode every step sees every pair, so the objective is deterministic and a quasi-Newton method with a
line search (torch.optim.LBFGS, strong Wolfe) applies. This bench starts the tiny transformer at the
reference, as the trainer does, and minimises the population loss

    L = sum_x sum_{i != j} W[x, i, j] ell(log pi_xi, log pi_xj, log ref_xi, log ref_xj, n_xi, n_xj)

(``toy_tasks.exact.pairs.pair_population_loss``'s terms) in each dtype, printing per report the
loss, the TV to the exact optimum of the pair solver and the seconds so far. Near the optimum the
loss changes by less than float32 resolves, which is where a line search in float32 stalls.
Figures only; nothing passes or fails. One round is one ``LBFGS.step`` (up to 20 iterations), as one
step of the trainer's ``optim=lbfgs`` is; this bench keeps the population loss apart from the trainer
so that the two precisions can be compared on the objective alone.
"""

from __future__ import annotations

import argparse
import ast
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent

DTYPES = ("float64", "float32")


def minimise(session, objective, beta: float, dtype, rounds: int, report_every: int):
    """Yield (round, loss, tv_to_optimum, seconds) every ``report_every`` rounds of L-BFGS on the
    population loss of ``session`` (a prepared sequence session), the policy started at the reference."""
    import numpy as np
    import torch

    from toy_tasks.exact.pairs import _pair_terms

    policy = session.build_policy(init="reference").to(dtype)
    task = session.finite.task
    weights, log_ref, lengths = (torch.tensor(np.asarray(a), dtype=dtype)
                                 for a in (task.win_weights(), np.log(task.reference), task.lengths))
    optimiser = torch.optim.LBFGS(policy.parameters(), lr=1.0, max_iter=20, history_size=50,
                                  line_search_fn="strong_wolfe", tolerance_grad=1e-14, tolerance_change=1e-16)

    def population_loss():
        log_pi = policy.log_distribution().to(dtype)  # (X, K)
        return sum(_pair_terms(objective, weights[x], log_pi[x], log_ref[x], lengths[x], beta)
                   for x in range(log_pi.shape[0]))

    def closure():
        optimiser.zero_grad()
        loss = population_loss()
        loss.backward()
        return loss

    began = time.perf_counter()
    for step in range(1, rounds + 1):
        optimiser.step(closure)  # returns the loss at the round's start: the end's is evaluated below
        if step % report_every == 0 or step == rounds:
            with torch.no_grad():
                loss = float(population_loss())
            yield step, loss, session.evaluate(policy)["tv_to_optimum"], time.perf_counter() - began


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--loss", default="divergence_forward_kl", help="a built-in objective or pkg.module:name")
    parser.add_argument("--beta", type=float, default=0.5)
    parser.add_argument("--rounds", type=int, default=100, help="LBFGS.step calls (up to 20 iterations each)")
    parser.add_argument("--report-every", type=int, default=10)
    parser.add_argument("--dtypes", default="float64,float32", help="comma-separated: float64, float32")
    parser.add_argument("task", nargs="*", help="KEY=VALUE options of toy_tasks.sequence.task.sequence_task")
    args = parser.parse_args(argv)
    dtypes = args.dtypes.split(",")
    for name in dtypes:
        if name not in DTYPES:
            parser.error(f"--dtypes: {name!r} is not one of {', '.join(DTYPES)}")
    sys.path.insert(0, str(ROOT))
    import torch

    from polopt import losses
    from toy_tasks.sequence.task import sequence_task

    torch.set_num_threads(1)
    options = {}
    for item in args.task:  # KEY=VALUE: a Python literal (3, 2.0, True) or else a string
        key, _, value = item.partition("=")
        try:
            options[key] = ast.literal_eval(value)
        except (ValueError, SyntaxError):
            options[key] = value
    objective = losses.resolve(args.loss)
    session = sequence_task(**options).prepare(objective, beta=args.beta)
    print(f"{args.loss} beta {args.beta}: {session.task.n_responses} responses per prompt, "
          f"optimum by {session.finite.optimum.method}")
    print(f"{'dtype':<8} {'round':>6} {'loss':>18} {'tv_to_optimum':>14} {'seconds':>8}")
    for name in dtypes:
        for step, loss, tv, seconds in minimise(session, objective, args.beta, getattr(torch, name), args.rounds,
                                                args.report_every):
            print(f"{name:<8} {step:>6} {loss:>18.12f} {tv:>14.4g} {seconds:>8.1f}", flush=True)


if __name__ == "__main__":
    main()
