"""What a pair file holds, for people: the summary text, the length histogram, the rejects file.

Owns :func:`write_rejects` (one JSON object per rejected row, in file order),
:func:`histogram` (counts of pair lengths in equal-width bins), :func:`summary_text`
(the terminal report of ``polopt data``) and :func:`plot_lengths` (the same
histogram as a PNG, matplotlib's Agg backend).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from polopt.data.rows import KINDS, REASONS, Reject
from polopt.data.validate import PairData

BAR = 40  # characters of the longest histogram bar


def write_rejects(rejects: list[Reject], path: str | Path) -> Path:
    """Write ``rejects`` to ``path`` as JSON Lines (an empty file when there are none)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with path.open("w", encoding="utf-8") as f:
        for reject in rejects:
            f.write(json.dumps(reject.record(), ensure_ascii=False, allow_nan=False) + "\n")
    return path


def histogram(lengths: list[int], bins: int = 10) -> tuple[np.ndarray, np.ndarray]:
    """(counts, edges) of ``lengths`` in at most ``bins`` bins of equal integer width: bin k
    holds ``edges[k] <= length < edges[k + 1]`` (numpy's histogram with integer edges)."""
    if not lengths:
        return np.zeros(0, dtype=int), np.zeros(0, dtype=int)
    low, high = min(lengths), max(lengths)
    width = max(1, -(-(high - low + 1) // bins))  # ceiling division
    edges = np.arange(low, high + width + 1, width)
    edges = edges[: int(np.searchsorted(edges, high, side="right")) + 1]
    counts, _ = np.histogram(lengths, bins=edges)
    return counts, edges


def summary_text(data: PairData, rejects_path: str | Path | None = None, *, show: int = 10) -> str:
    """The report ``polopt data`` prints: counts, reasons, truncation, histogram, first rejects."""
    a = data.accounting
    unit = "bytes" if a["tokenizer"] == "byte" else "tokens"
    lines = [f"{a['source']} ({a['format']}, read by {a['reader']})",
             f"  rows in        {a['rows_in']:>8}",
             f"  accepted       {a['rows_accepted']:>8}",
             f"  rejected       {a['rows_rejected']:>8}"]
    kind = a.get("row_kind", "pairs")
    if kind != "pairs":
        sizes = ", ".join(f"{g}: {n}" for g, n in a.get("group_sizes", {}).items())
        lines.append(f"  row kind       {kind} ({' + '.join(KINDS[kind])})"
                     + (f"; responses per row (accepted) {sizes}" if kind != "unpaired" and sizes else ""))
    for reason, count in a["rejected_by_reason"].items():
        lines.append(f"    {reason:<18}{count:>6}  {REASONS[reason]}")
    lines.append(f"  {a['balance']}")
    if a["blank_lines"]:
        lines.append(f"  blank lines skipped (not rows): {a['blank_lines']}")
    limit = "no limit" if a["max_length"] is None else f"max_length {a['max_length']} {unit}"
    lines.append(f"  length: {limit}; truncation {a['truncation']}; truncated rows {a['rows_truncated']}"
                 + (f" ({', '.join(f'{k} {v}' for k, v in a['truncated_fields'].items())}; "
                    f"{a['tokens_removed']} {unit} removed)" if a["rows_truncated"] else ""))
    lines.append(f"  duplicates found {a['duplicate_rows']} ({'rejected' if a['duplicates'] == 'reject' else 'kept'}; "
                 "the first of each is kept)")
    lines.append(f"  weights: {'column ' + repr(a['columns']['weight']) if a['weighted'] else 'none (all 1)'}")
    counts, edges = histogram(data.length)
    if len(counts):
        what = "pair length" if kind == "pairs" else "row length"
        lines.append(f"  {what} ({unit}: prompt + {'longer' if kind == 'pairs' else 'longest'} response) of the "
                     "accepted rows:")
        top, longest = max(int(counts.max()), 1), max(data.length)
        for c, lo, hi in zip(counts, edges[:-1], edges[1:], strict=True):
            bar = "#" * int(round(BAR * int(c) / top))
            lines.append(f"    {int(lo):>7}-{min(int(hi) - 1, longest):<7} {int(c):>7} {bar}")
    if data.rejects:
        lines.append(f"  first rejects ({a['row_numbering']}):")
        lines += [f"    {r.message()}" for r in data.rejects[:show]]
        if len(data.rejects) > show:
            lines.append(f"    ... and {len(data.rejects) - show} more")
    if rejects_path is not None:
        lines.append(f"  rejects file: {rejects_path}")
    return "\n".join(lines)


def plot_lengths(data: PairData, path: str | Path) -> Path:
    """A PNG histogram of the accepted pair lengths, with max_length marked."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    a = data.accounting
    unit = "bytes" if a["tokenizer"] == "byte" else "tokens"
    fig, ax = plt.subplots(figsize=(6, 3.5))
    if data.length:
        ax.hist(data.length, bins=min(40, max(1, len(set(data.length)))), color="#4477aa")
    if a["max_length"] is not None:
        ax.axvline(a["max_length"], color="#cc3311", linestyle="--", label=f"max_length {a['max_length']}")
        ax.legend()
    pairs = a.get("row_kind", "pairs") == "pairs"
    ax.set_xlabel(f"{'pair' if pairs else 'row'} length ({unit}: prompt + {'longer' if pairs else 'longest'} "
                  "response)")
    ax.set_ylabel("accepted pairs" if pairs else f"accepted {a['row_kind']} rows")
    ax.set_title(f"{Path(a['source']).name}: {a['rows_accepted']} accepted, {a['rows_rejected']} rejected")
    fig.tight_layout()
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path
