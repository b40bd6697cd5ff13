"""Shared by the exact-solve, training and line-search tests: seeded random finite tasks, an
independent solve of a pair objective's population loss, and the small sequence task's overrides."""

from __future__ import annotations

import numpy as np
import scipy.optimize
import scipy.special
import torch

from polopt.losses.pair import PairScores
from toy_tasks.finite.task import make_task

# the small sequence task (3 symbols, length <= 3: 40 responses) and a transformer that fits it
SMALL = dict(n_symbols=3, max_length=3, n_prompts=2, reference_width=16, reference_layers=1, reference_heads=2,
             reference_sharpness=10.0, seed=0)
MODEL = dict(kind="transformer", width=16, layers=1, heads=2, context=8, seed=0)
SMALL_OVERRIDES = [f"task.{k}={v}" for k, v in SMALL.items()] + [f"model.{k}={v}" for k, v in MODEL.items()]


def random_task(seed: int, *, bradley_terry: bool = True):
    """K = 4..8 responses, 1-3 prompts, lengths 1..6 tokens, all drawn from ``seed``."""
    rng = np.random.default_rng(seed)
    k, x = int(rng.integers(4, 9)), int(rng.integers(1, 4))
    reference = rng.dirichlet(np.full(k, 2.0), size=x)
    lengths = rng.integers(1, 7, size=(x, k))
    if bradley_terry:
        return make_task(reference, rewards=rng.normal(0.0, 1.0, (x, k)), lengths=lengths)
    upper = rng.uniform(0.1, 0.9, (x, k, k))
    preference = np.triu(upper, 1) + np.tril(1.0 - np.swapaxes(upper, 1, 2), -1) + 0.5 * np.eye(k)
    return make_task(reference, preference, sampling=rng.dirichlet(np.full(k, 3.0), size=x), lengths=lengths)


def independent_policy(objective, task, beta: float) -> np.ndarray:
    """argmin of the population loss by L-BFGS-B on all logits (X K), the loss summed over a dense
    (X, K, K) grid of pairs weighted by W (zero weight on i = j); torch gradients."""
    w = torch.as_tensor(task.win_weights())  # (X, K, K)
    log_ref = torch.as_tensor(np.log(task.reference))
    n = torch.as_tensor(task.lengths)
    shape = task.reference.shape

    def loss(z_flat):
        z = torch.as_tensor(z_flat, dtype=torch.float64).reshape(shape).requires_grad_(True)
        log_pi = torch.log_softmax(z, dim=1)  # (X, K)
        grid = lambda t: (t[:, :, None].expand(w.shape), t[:, None, :].expand(w.shape))  # noqa: E731
        (pw, pl), (rw, rl), (nw, nl) = grid(log_pi), grid(log_ref), grid(n)
        pair = PairScores(pw.reshape(-1), pl.reshape(-1), rw.reshape(-1), rl.reshape(-1), nw.reshape(-1),
                          nl.reshape(-1))
        value = (w.reshape(-1) * objective(pair, beta)).sum()
        (g,) = torch.autograd.grad(value, z)
        return float(value.detach()), g.numpy().ravel()

    result = scipy.optimize.minimize(loss, np.log(task.reference).ravel(), jac=True, method="L-BFGS-B",
                                     options={"gtol": 1e-14, "ftol": 1e-16, "maxiter": 20000, "maxcor": 50})
    return scipy.special.softmax(result.x.reshape(shape), axis=1)
