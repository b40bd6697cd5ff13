"""Plots of a ``polopt check`` report (matplotlib, Agg backend: no display needed).

One PNG, three panels:

1. f(x) beside the built-in losses;
2. the per-pair optimum x*(p) = argmin p f(x) + (1 - p) f(-x) against p, beside the
   built-ins' closed forms (logit p, 2p - 1, logit(p) / 2, ...);
3. trained against exact optimal probabilities on every finite task checked
   (points on the diagonal: the trainer reaches the exact optimum).
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")  # files only; never needs a display

import matplotlib.pyplot as plt  # noqa: E402  (after the backend is chosen)
import numpy as np  # noqa: E402
import torch  # noqa: E402

from polopt import losses  # noqa: E402
from polopt.checks.margin import Report, pair_optimum_curve  # noqa: E402
from polopt.losses.margin import MarginLoss  # noqa: E402

_X = np.linspace(-4.0, 4.0, 401)
_MARGIN_LIMIT = 6.0  # the optimum panel shows scaled margins in [-6, 6]


def _builtins() -> list[MarginLoss]:
    return [losses.resolve_margin(name) for name in losses.builtin_names("margin")]


def plot_report(report: Report, loss: MarginLoss, path: str | Path) -> Path:
    """Write the three panels of ``report`` for ``loss`` to the PNG ``path``."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig, (ax_f, ax_p, ax_t) = plt.subplots(1, 3, figsize=(15, 4.6))
    others = [ref for ref in _builtins() if ref.name != loss.name]

    # 1. f beside the built-ins
    with torch.no_grad():
        mine = loss(torch.as_tensor(_X)).double().numpy()
        for ref in others:
            ax_f.plot(_X, ref(torch.as_tensor(_X)).double().numpy(), lw=1, alpha=0.45, label=ref.name)
    ax_f.plot(_X, mine, color="black", lw=2.4, label=loss.name)
    finite = mine[np.isfinite(mine)]
    if finite.size:
        lo, hi = float(finite.min()), float(finite.max())
        pad = 0.1 * (hi - lo or 1.0)
        ax_f.set_ylim(lo - pad, hi + pad)
    ax_f.set(title="the loss f", xlabel="scaled margin x = beta * rho", ylabel="f(x)")
    ax_f.legend(fontsize=7)

    # 2. per-pair optimum against p
    p = np.asarray(report.curve.get("p", []))
    for ref in others:
        ax_p.plot(p, np.clip(pair_optimum_curve(ref, p), -_MARGIN_LIMIT, _MARGIN_LIMIT), lw=1, alpha=0.45,
                  label=ref.name)
    if report.curve.get("optimum") is not None:
        ys = np.asarray(report.curve["optimum"], dtype=float)
        ax_p.plot(p, np.clip(ys, -_MARGIN_LIMIT, _MARGIN_LIMIT), color="black", lw=2.4, label=loss.name)
    ax_p.axhline(0.0, color="grey", lw=0.5)
    ax_p.axvline(0.5, color="grey", lw=0.5)
    ax_p.set(title="per-pair optimum x*(p) (clipped to +-6)", xlabel="p = P(first response preferred)",
             ylabel="x* = argmin p f(x) + (1-p) f(-x)", ylim=(-_MARGIN_LIMIT - 0.3, _MARGIN_LIMIT + 0.3))
    ax_p.legend(fontsize=7)

    # 3. trained against exact optimum on every task
    shown = False
    for r in report.results:
        if not r.name.startswith("population:") or r.facts.get("policy") is None:
            continue
        trained = np.asarray(r.facts["policy"]).ravel()
        exact = r.facts.get("optimum")
        label = f"{r.name.removeprefix('population:')} ({r.status})"
        if exact is None:  # no finite optimum: against the limit, all mass spread on the limit responses
            support = r.facts.get("limit_support") or []
            limit = np.zeros_like(np.asarray(r.facts["policy"], dtype=float))
            for x, members in enumerate(support):
                limit[x, members] = 1.0 / max(len(members), 1)
            ax_t.scatter(limit.ravel(), trained, marker="x", label=label + ", no finite optimum: vs its limit")
        else:
            ax_t.scatter(np.asarray(exact).ravel(), trained, s=28, label=label)
        shown = True
    ax_t.plot([0, 1], [0, 1], color="grey", lw=0.8)
    ax_t.set(title="trained vs exact optimum (exact mode)", xlabel="exact optimal probability",
             ylabel="trained probability", xlim=(-0.03, 1.03), ylim=(-0.03, 1.03))
    if shown:
        ax_t.legend(fontsize=7)
    else:
        ax_t.text(0.5, 0.5, "no finite tasks checked", ha="center", va="center")

    fig.suptitle(f"polopt check: {report.loss} at beta = {report.beta:g}: {report.status.upper()}")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
