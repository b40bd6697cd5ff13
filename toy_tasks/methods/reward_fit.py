"""Bradley–Terry reward models of finite tasks: the maximum-likelihood table, its existence, its measures.

Given counts ``C[x, i, j]`` of pairs in which response i beat response j for
prompt x, the Bradley–Terry log-likelihood is (Bradley & Terry 1952)::

    l(r) = sum_{x,i,j} C[x,i,j] log sigmoid(r_xi - r_xj).

It depends only on differences within a prompt, so the rewards are identified
up to one constant per prompt. We pin that gauge to the reference-weighted mean
zero, ``sum_y pi_ref(y|x) r(x, y) = 0`` (:data:`GAUGE`): the reference then has
learned reward 0 and a policy's learned reward is its gain over the reference.

Existence (Ford, Solution of a ranking problem from binary comparisons, 1957):
the maximiser is finite and unique iff, per prompt, the directed graph with an
edge i -> j whenever i beat j at least once is strongly connected over *all*
responses (a response never compared, or never beaten by the rest, has no
finite estimate). :func:`mle_problems` reuses the strongly-connected-component
test of :mod:`toy_tasks.exact.margin`. Where it fails, ``reward.l2 > 0`` gives the
penalised fit ``argmax l(r) - (l2 / 2) ||r||^2`` (the posterior mode under an
independent N(0, 1/l2) prior on each reward), which always exists.

Both are solved per prompt by scipy's trust-region Newton method (trust-exact)
with the exact gradient and Hessian in float64; without a penalty a term
``(pi_ref . r)^2 / 2`` pins the gauge (it vanishes at the reported solution, so it
changes nothing else), then polished by plain Newton steps until ``max |grad| < 1e-10``
(the trust region stops early once loss values of a few thousand pairs no longer resolve
the last digits). The residual reached is reported.
"""

from __future__ import annotations

import hashlib

import numpy as np
import scipy.optimize
import scipy.special
import torch

from polopt.methods.reward_model import CALIBRATION, load_reward_model, pair_metrics, split_heldout
from toy_tasks.exact.margin import _limit_support, _strong_components

GAUGE = "per prompt, sum_y pi_ref(y|x) r(x, y) = 0 (reference-weighted mean zero)"
GRADIENT_TOLERANCE = 1e-10


# ------------------------------------------------------------------ the fit


def pair_counts(task, pairs, index: np.ndarray | None = None) -> np.ndarray:
    """``C[x, i, j]``: how often i beat j for prompt x among ``pairs`` (those at ``index`` if given). (X, K, K)."""
    pick = slice(None) if index is None else index
    counts = np.zeros((task.n_prompts, task.n_responses, task.n_responses))
    np.add.at(counts, (pairs.prompt[pick], pairs.winner[pick], pairs.loser[pick]), 1.0)
    return counts


def mle_problems(counts: np.ndarray) -> list[str]:
    """Why the maximum-likelihood estimate does not exist, one phrase per failing prompt (empty: it exists)."""
    out = []
    for x, c in enumerate(counts):
        strong = _strong_components(c)
        if len(np.unique(strong)) == 1:
            continue
        never = np.flatnonzero((c + c.T).sum(1) == 0)
        top = _limit_support(c, strong, np.ones(len(c), dtype=bool))
        what = f"responses {never.tolist()} are never compared" if len(never) else \
            f"responses {top} are never beaten by the others"
        out.append(f"prompt {x}: {what}")
    return out


def _objective(r, c, reference, l2):
    d = r[:, None] - r[None, :]  # (K, K) r_i - r_j
    value = float((c * np.logaddexp(0.0, -d)).sum())  # -log sigmoid(d) = softplus(-d), stably
    g_pair = -c * scipy.special.expit(-d)  # d(-l)/d(r_i - r_j)
    grad = g_pair.sum(1) - g_pair.sum(0)
    a = c * scipy.special.expit(d) * scipy.special.expit(-d)
    a = a + a.T
    hess = np.diag(a.sum(1)) - a  # a weighted graph Laplacian
    if l2 > 0:
        value, grad, hess = value + 0.5 * l2 * r @ r, grad + l2 * r, hess + l2 * np.eye(len(r))
    else:  # pin the gauge: zero at the reported solution, so the likelihood's maximiser is unchanged
        m = reference @ r
        value, grad, hess = value + 0.5 * m**2, grad + m * reference, hess + np.outer(reference, reference)
    return value, grad, hess


def fit_table(counts: np.ndarray, reference: np.ndarray, *, l2: float = 0.0) -> tuple[np.ndarray, float]:
    """Bradley–Terry rewards (X, K) in :data:`GAUGE` maximising the (penalised) likelihood of ``counts``,
    and the residual ``max |grad|`` of the solve. Raise a ValueError where the estimate does not exist."""
    if not (isinstance(l2, (int, float)) and not isinstance(l2, bool) and l2 >= 0):
        raise ValueError(f"reward.l2 (the L2 penalty of the fit) must be a number >= 0, got {l2!r}")
    if l2 == 0:
        problems = mle_problems(counts)
        if problems:
            raise ValueError("the Bradley–Terry maximum-likelihood fit does not exist on these pairs (the win graph "
                             f"is not strongly connected, Ford 1957): {'; '.join(problems)}; give reward.l2=0.01 "
                             "(or another penalty > 0) for the L2-penalised fit, or more pairs (task.n_pairs)")
    rewards, residual = np.zeros(reference.shape), 0.0
    for x in range(len(counts)):
        result = scipy.optimize.minimize(
            lambda r, x=x: _objective(r, counts[x], reference[x], l2)[:2], np.zeros(reference.shape[1]), jac=True,
            hess=lambda r, x=x: _objective(r, counts[x], reference[x], l2)[2], method="trust-exact",
            options={"gtol": GRADIENT_TOLERANCE, "maxiter": 1000})
        r = result.x
        for _ in range(20):  # plain Newton steps: the trust region stalls once loss values stop resolving
            _, grad, hess = _objective(r, counts[x], reference[x], l2)
            if np.abs(grad).max() < GRADIENT_TOLERANCE:
                break
            r = r - np.linalg.solve(hess, grad)
        rewards[x] = r
        residual = max(residual, float(np.abs(_objective(r, counts[x], reference[x], l2)[1]).max()))
    return to_gauge(rewards, reference), residual


def to_gauge(rewards: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """Rewards shifted per prompt to :data:`GAUGE`."""
    return rewards - (reference * rewards).sum(1, keepdims=True)


# ------------------------------------------------------------------ the file


def task_identity(task) -> dict:
    """What a table reward model must match: the task's name, shape and a hash of its reference policy."""
    digest = hashlib.sha256(np.ascontiguousarray(task.reference, dtype=np.float64).tobytes()).hexdigest()[:16]
    return {"task": task.name, "prompts": task.n_prompts, "responses": task.n_responses, "reference_sha256": digest}


def learned_rewards(task, path, *, key: str = "method.reward") -> np.ndarray:
    """The (X, K) learned rewards of a reward model file fitted for ``task``: a table, or a scalar head on
    the sequence task, whose file carries its scores of every enumerated response."""
    data = load_reward_model(path, task_identity(task), key=key)
    if str(data["kind"]).startswith("preference"):  # polopt.methods.preference_model.PREFERENCE_KINDS
        raise ValueError(f"{key}: {path} holds a preference model (kind {data['kind']!r}), not a reward: a preference "
                         "has no reward to optimise; give it to method=selfplay method.preference=PATH, or fit a "
                         "reward with polopt reward reward.kind=bradley_terry")
    rewards = data["state"].get("rewards")
    if rewards is None or tuple(rewards.shape) != (task.n_prompts, task.n_responses):
        raise ValueError(f"{key}: {path} holds no reward table of shape ({task.n_prompts}, {task.n_responses}); "
                         "fit one for this task with polopt reward")
    return rewards.double().numpy()


# ------------------------------------------------------------------ methods on a learned reward


def _expected(policy: np.ndarray, rewards: np.ndarray, task) -> float:
    """Prompt-weighted ``E_pi r``."""
    return float(task.prompt_weights @ (policy * rewards).sum(1))


def true_rewards(task) -> tuple[np.ndarray, str]:
    """The task's true rewards in :data:`GAUGE`: its Bradley–Terry rewards, else the win rate P(y > mu)."""
    if task.rewards is not None:
        return to_gauge(task.rewards, task.reference), "the task's Bradley–Terry rewards"
    return to_gauge(np.einsum("xij,xj->xi", task.preference, task.sampling), task.reference), \
        "the win rate P(y > mu) (the task has no Bradley–Terry rewards)"


def learned_reward_fields(policy: np.ndarray, target: np.ndarray | None, learned: np.ndarray, task,
                          path: str) -> dict:
    """summary.json's fields of a method run against a learned reward: the learned and the true expected
    reward (both in :data:`GAUGE`, so the reference scores 0 under either) of the trained policy, of the
    method's exact target and of the reference."""
    true, which = true_rewards(task)
    out = {"reward_model": str(path), "learned_reward": _expected(policy, learned, task),
           "true_reward": _expected(policy, true, task),
           "reference_learned_reward": _expected(task.reference, learned, task),
           "reference_true_reward": _expected(task.reference, true, task), "reward_gauge": GAUGE,
           "true_reward_is": which}
    if target is not None:
        out.update({"target_learned_reward": _expected(target, learned, task),
                    "target_true_reward": _expected(target, true, task),
                    "target_kl_to_reference": task.kl_to_reference(target)})
    return out


# ------------------------------------------------------------------ the command's work


def fit_task_reward(task, *, mode: str, n_pairs: int, seed: int, l2: float = 0.0,
                    heldout: float = 0.2, bins: int = 10) -> dict:
    """Fit a table reward model to ``task``'s pairs; return ``summary`` (summary.json), ``screen``
    (its text) and ``file`` (the reward model file's fields).

    ``sampled``: ``n_pairs`` pairs drawn with ``seed``, a share ``heldout`` of them kept
    out of the fit by a permutation seeded with ``seed``. ``exact``: the population win
    weights stand in for counts (infinitely many pairs) and are also what is measured.
    """
    if mode == "exact":
        counts = held = task.win_weights()
        notes = ["task.mode=exact: fitted to the population win weights (as if infinitely many pairs); the held-out "
                 "measures are population values"]
    elif mode == "sampled":
        pairs = task.sample_pairs(n_pairs, seed)
        fit, out = split_heldout(len(pairs), heldout, seed)
        counts, held = pair_counts(task, pairs, fit), pair_counts(task, pairs, out)
        notes = []
    else:
        raise ValueError(f"task.mode must be one of exact, sampled, got {mode!r}")
    rewards, residual = fit_table(counts, task.reference, l2=l2)
    x, w, lo = np.nonzero(held)
    measures = pair_metrics(rewards[x, w] - rewards[x, lo], held[x, w, lo], bins=bins)
    summary = {"task": task.name, "kind": "table", "mode": mode, "n_pairs": int(n_pairs) if mode == "sampled" else None,
               "fitted_pairs": float(counts.sum()), "l2": float(l2), "gauge": GAUGE, "rewards": rewards.tolist(),
               "pair_counts": counts.tolist(), "heldout_pair_counts": held.tolist(), **measures,
               "heldout_pairs": int(held.sum()) if mode == "sampled" else None,
               "calibration": CALIBRATION.format(bins=bins),
               "solver": f"trust-region Newton (scipy trust-exact) per prompt, float64, gradient tolerance "
                         f"{GRADIENT_TOLERANCE:g}", "residual": residual, "notes": notes}
    summary.update(true_reward_distance(rewards, task))
    state = {"rewards": torch.as_tensor(rewards)}  # (X, K) float64
    return {"summary": summary, "screen": format_summary(summary),
            "file": {"kind": "table", "identity": task_identity(task), "state": state, "gauge": GAUGE,
                     "l2": float(l2)}}


def true_reward_distance(rewards: np.ndarray, task) -> dict:
    """Distance of learned to true rewards with both in :data:`GAUGE`: the reference-weighted RMS and the
    largest absolute difference (null where the task has no Bradley–Terry rewards)."""
    if task.rewards is None:
        return {"true_rewards": None, "reward_rms_error": None, "reward_max_error": None}
    true = to_gauge(task.rewards, task.reference)
    gap = rewards - true
    rms = float(np.sqrt(task.prompt_weights @ (task.reference * gap**2).sum(1)))
    return {"true_rewards": true.tolist(), "reward_rms_error": rms, "reward_max_error": float(np.abs(gap).max())}


def format_summary(summary: dict) -> str:
    """The command's screen output: per prompt, learned beside true rewards, then the measures."""
    lines = []
    true = summary.get("true_rewards")
    for x, row in enumerate(summary["rewards"] or []):
        lines.append(f"prompt {x}: learned " + " ".join(f"{v:+.3f}" for v in row))
        if true is not None:
            lines.append(f"prompt {x}: true    " + " ".join(f"{v:+.3f}" for v in true[x]))
    acc, ece = summary.get("heldout_accuracy"), summary.get("calibration_error")
    lines.append(f"heldout_accuracy {'-' if acc is None else f'{acc:.4f}'}  calibration_error "
                 f"{'-' if ece is None else f'{ece:.4f}'}  heldout_pairs {summary['heldout_pairs'] or '-'}")
    if summary.get("reward_rms_error") is not None:
        lines.append(f"distance to the true rewards (both reference-weighted mean zero): "
                     f"rms {summary['reward_rms_error']:.4g}  max {summary['reward_max_error']:.4g}")
    lines += [f"note: {n}" for n in summary.get("notes", [])]
    return "\n".join(lines)
