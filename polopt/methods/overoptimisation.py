"""Over-optimisation of a learned reward: the table and the plot of true and learned reward against KL.

Optimising a learned reward harder (best-of-n with larger n, KL-regularised RL with
smaller beta) moves the policy further from the reference; the learned reward keeps
rising while the true reward rises less, and can fall (Gao et al., Scaling laws for
reward model overoptimization, 2023, who plot both against the KL or its square
root). The rows come from ``polopt compare`` runs with ``method.reward=PATH`` (each
summary's ``kl_to_reference``, ``learned_reward``, ``true_reward``) or from the exact
targets computed by ``bench/overoptimisation.py``; this module only renders them.

A row is a dict with ``group`` (what the curve is, e.g. the reward model's training
set size), ``method``, ``knob`` (n or beta), ``kl_to_reference``, ``learned_reward``,
``true_reward``.
"""

from __future__ import annotations

from pathlib import Path

HEAD = ("group", "method", "knob", "kl_to_reference", "learned_reward", "true_reward", "overestimate")


def render(rows: list[dict], title: str) -> str:
    """The rows as a fixed-width text table; ``overestimate`` = learned - true."""
    def cells(r):
        return [str(r["group"]), r["method"], f"{r['knob']:g}", f"{r['kl_to_reference']:.4f}",
                f"{r['learned_reward']:+.4f}", f"{r['true_reward']:+.4f}",
                f"{r['learned_reward'] - r['true_reward']:+.4f}"]

    body = [cells(r) for r in rows]
    widths = [max(len(line[c]) for line in [list(HEAD), *body]) for c in range(len(HEAD))]
    lines = [title] + ["  ".join(c.ljust(w) for c, w in zip(line, widths, strict=True)) for line in [list(HEAD), *body]]
    return "\n".join(lines)


def plot(rows: list[dict], path: Path, title: str) -> Path:
    """One PNG, a panel per method: true (solid) and learned (dashed) reward against KL to the reference,
    one colour per group."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    methods = list(dict.fromkeys(r["method"] for r in rows))
    groups = list(dict.fromkeys(r["group"] for r in rows))
    fig, axes = plt.subplots(1, len(methods), figsize=(6 * len(methods), 4.5), squeeze=False)
    for ax, method in zip(axes[0], methods, strict=True):
        for colour, group in enumerate(groups):
            mine = sorted((r for r in rows if r["method"] == method and r["group"] == group),
                          key=lambda r: r["kl_to_reference"])
            if not mine:
                continue
            kl = [r["kl_to_reference"] for r in mine]
            ax.plot(kl, [r["true_reward"] for r in mine], "-o", color=f"C{colour}", markersize=3,
                    label=f"{group}: true")
            ax.plot(kl, [r["learned_reward"] for r in mine], "--", color=f"C{colour}", label=f"{group}: learned")
        ax.set_xlabel("KL(pi || pi_ref)")
        ax.set_ylabel("expected reward (reference = 0)")
        ax.set_title(f"{method}: {title}")
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return Path(path)


def rows_of_runs(rows: list[dict], summaries: list[dict]) -> list[dict]:
    """``polopt compare``'s rows and summaries of runs on a learned reward, as rows of this module
    (the group is the reward model file); runs without a learned reward are left out."""
    out = []
    for r, s in zip(rows, summaries, strict=True):
        if s.get("learned_reward") is None:
            continue
        knob = s["method_config"].get("n", 4) if s["method"] == "best_of_n" else s["beta"]
        out.append({"group": s["reward_model"], "method": s["method"], "knob": float(knob),
                    "kl_to_reference": r["kl_to_reference"], "learned_reward": s["learned_reward"],
                    "true_reward": s["true_reward"]})
    return out
