"""``polopt compare`` over pair objectives: per objective, TV to its own optimum, KL to the reference,
the optimum's winner log-ratio and its mean length beside the reference's, as a table and a plot.

Held against: the figures recomputed here from each run's reported optimum and the task file (the
definitions of a W-weighted mean and of an expectation), and a derived ordering: on Bradley–Terry
preferences DPO's optimum is pi_ref e^{r / beta} and length-regularised DPO's is
pi_ref e^{(r - alpha n) / beta} (Park et al., Disentangling Length from Quality in DPO, 2024); tilting a
distribution by e^{-t n} with t = alpha / beta > 0 lowers its mean n (d/dt E_t[n] = -Var_t(n) < 0,
derived).
"""

import csv
import json

import numpy as np

from polopt.commands.main import main
from toy_tasks.finite.task import load_task, make_task


def test_compare_pair_objectives_shows_displacement_and_length(tmp_path, capsys):
    task = make_task([0.4, 0.3, 0.2, 0.1], rewards=[0.0, 1.0, 0.5, 1.5], lengths=[1, 3, 5, 8])
    path = task.save(tmp_path / "long.json")
    code = main(["compare", "task=file", f"task.path={path}",
                 "loss=divergence_reverse_kl,length_regularised,length_normalised_free", "beta=0.5",
                 "train.steps=1500", f"hydra.run.dir={tmp_path / 'cmp'}", "--quiet"])
    assert code == 0, capsys.readouterr().err
    out = capsys.readouterr().out
    for key in ("tv_to_optimum", "kl_to_reference", "optimum_logratio_winner", "optimum_mean_length",
                "reference_mean_length", "reached_optimum"):
        assert key in out
    result = json.loads((tmp_path / "cmp" / "comparison.json").read_text())
    rows = {r["loss_name"]: r for r in result["rows"]}
    assert set(rows) == {"divergence_reverse_kl", "length_regularised", "length_normalised_free"}
    task = load_task(path)
    w = task.win_weights()
    for number, r in enumerate(result["rows"]):
        summary = json.loads((tmp_path / "cmp" / f"{number:02d}" / "summary.json").read_text())
        pi = np.asarray(summary["optimum"])
        h = np.log(pi) - np.log(task.reference)
        assert abs(r["optimum_logratio_winner"] - float((w.sum(axis=2) * h).sum() / w.sum())) < 1e-12
        assert abs(r["optimum_mean_length"] - float((pi * task.lengths).sum())) < 1e-12
        assert abs(r["reference_mean_length"] - (0.4 * 1 + 0.3 * 3 + 0.2 * 5 + 0.1 * 8)) < 1e-12
        assert r["tv_to_optimum"] <= 1e-3 and r["reached_optimum"] is True
    assert rows["length_regularised"]["optimum_mean_length"] < rows["divergence_reverse_kl"]["optimum_mean_length"]
    with (tmp_path / "cmp" / "comparison.csv").open() as f:
        header = next(csv.reader(f))
    assert {"optimum_logratio_winner", "optimum_mean_length", "reference_mean_length"} <= set(header)
    assert (tmp_path / "cmp" / "comparison.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
