"""Text tables of a toy task's run: the trained policy beside the reference and the target."""

from __future__ import annotations


def policy_rows(summary: dict, x: int, indices, labels: list[str], width: int, target: str = "optimum") -> list[str]:
    """Prompt ``x``'s table: a header, then per response index its reference, trained and target
    probabilities (summary.json's ``reference``, ``policy`` and ``optimum``; '-' where none is finite)."""
    optimum = summary["optimum"]
    lines = [f"  {'response':<{width}}  reference   trained   {target:>7}"]
    for i in indices:
        opt = f"{optimum[x][i]:9.4f}" if optimum is not None else "        -"
        lines.append(f"  {labels[i]:<{width}}  {summary['reference'][x][i]:9.4f} {summary['policy'][x][i]:9.4f} {opt}")
    return lines


def finite_policy_table(task, summary: dict, target: str = "optimum") -> list[str]:
    """Every prompt's :func:`policy_rows` of a finite task (``task.responses`` as labels, else their
    indices), each under its prompt's line when the task has several."""
    labels = task.responses or [f"response {i}" for i in range(task.n_responses)]
    width = max(len(s) for s in labels + ["response"])
    lines = []
    for x in range(task.n_prompts):
        if task.n_prompts > 1:
            lines.append(f"prompt {x}: {task.prompts[x] if task.prompts else ''}")
        lines += policy_rows(summary, x, range(len(labels)), labels, width, target=target)
    return lines


def method_footer(summary: dict) -> list[str]:
    """The figures under a method's policy table: TV to its target, KL, win-rate, TV to the
    equilibrium, then the notes."""
    tv = summary["tv_to_optimum"]
    return [f"method {summary['method']}  tv_to_optimum {'-' if tv is None else f'{tv:.3g}'}  "
            f"kl_to_reference {summary['kl_to_reference']:.4g}  "
            f"win_rate_over_reference {summary['win_rate_over_reference']:.4f}  "
            f"tv_to_equilibrium {summary['tv_to_equilibrium']:.3g}  (target: {summary['optimum_method']})",
            *(f"note: {n}" for n in summary["notes"])]
