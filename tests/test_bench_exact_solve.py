"""bench/exact_solve.py runs end to end on a small sequence task and prints both solvers' figures.

No timing is asserted (benches print figures, they never pass or fail); what is checked is that every
row names both solvers, their ratio and the TV between their answers, and that the answers agree (the
landed solver is the reference, tests/toy_tasks/test_landed_agreement.py); a group objective's row has the fast
solver only; the closing markdown table carries every row.
"""

from __future__ import annotations

import re

import pytest

from bench import exact_solve


@pytest.mark.slow
def test_the_bench_prints_both_solvers_side_by_side(capsys):
    exact_solve.main(["--symbols", "2", "--max-length", "3", "--objectives", "length_regularised",
                      "winner_anchored", "--margin", "huber", "--groups", "ranking_likelihood"])
    out = capsys.readouterr().out
    assert "load average before" in out and "load average after" in out
    rows = re.findall(r"^(\w+)\s+landed\s+([\d.]+) s\s+fast\s+([\d.]+) s\s+ratio\s+([\d.]+)x\s+TV\s+(\S+)$", out, re.M)
    assert [r[0] for r in rows] == ["length_regularised", "winner_anchored", "huber"]
    assert all(float(tv) <= 1e-8 for *_, tv in rows)
    assert re.search(r"^ranking_likelihood\s+landed\s+-\s+fast\s+[\d.]+ s .*certified=True", out, re.M)  # no landed
    assert out.count("certified=True") == 7
    assert re.search(r"^\| winner_anchored \| [\d.]+ \| [\d.]+ \| [\d.]+x \| [\d.]+ \| [\d.]+ \| [\d.]+x \| "
                     r"finite, unique, certified; residual", out, re.M)  # the markdown table for the docs
    assert re.search(r"winner_anchored, fast\s*: 6 of 6 starts certified", out)


def test_repeats_time_each_solve_several_times_and_keep_the_answer(monkeypatch):
    calls = []
    monkeypatch.setattr(exact_solve, "timed", lambda fn: (calls.append(1), (fn(), len(calls), 0.5 * len(calls)))[1])
    answer, wall, cpu = exact_solve.median_timed(lambda: "optimum", 3)
    assert answer == "optimum" and len(calls) == 3
    assert (wall, cpu) == (2, 1.0)  # the medians of (1, 2, 3) and (0.5, 1.0, 1.5)
