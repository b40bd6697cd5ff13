"""``polopt compare`` over group objectives, feedback kinds and ``method=group``: each run against its own
minimiser or stationary point, and for ``method=group`` the TV from the update's stationary point to
``pi_ref e^{r / beta}``.

Held against: the closed form of Plackett–Luce listwise DPO, pi* ∝ pi_ref e^{r / beta} (Rafailov et al., Direct
Preference Optimization, 2023, appendix A.3); the definition of total variation, recomputed here from each
run's summary.json; and, derived by hand, the stationary point of the group update with the KL inside the
reward: with r'_y = r_y - beta log(pi_y / pi_ref_y) held, the expected update of the leave-one-out advantage
(Kool et al., Buy 4 REINFORCE samples, get a baseline for free!, 2019) is sum_y pi_y (r'_y - E_pi r') grad log
pi_y, and the centred one (1 - 1/G) times it; both vanish where r' is constant, i.e. at pi_ref e^{r / beta}.
"""

import json

import numpy as np
import pytest

from polopt.commands.main import main
from toy_tasks import families

BETA = 0.5


def _kl_regularised(task) -> np.ndarray:
    tilted = task.reference * np.exp(task.rewards / BETA)
    return tilted / tilted.sum(1, keepdims=True)


def _compare(tmp_path, name, *overrides) -> dict:
    code = main(["compare", "task=bradley_terry", "task.n_responses=4", f"beta={BETA}", *overrides,
                 f"hydra.run.dir={tmp_path / name}", "--quiet"])
    assert code == 0
    return json.loads((tmp_path / name / "comparison.json").read_text())


def _summary(tmp_path, name, number) -> dict:
    return json.loads((tmp_path / name / f"{number:02d}" / "summary.json").read_text())


@pytest.mark.slow  # three runs, two exact solves: ~25 s on a shared machine
def test_compare_feedback_kinds_objectives_and_the_group_method(tmp_path, capsys):
    result = _compare(tmp_path, "cmp", "task.feedback=ranking,unpaired", "loss=ranking_likelihood,unpaired_classifier",
                      "method=offline,group")
    out = capsys.readouterr().out
    assert "optimum_kind" in out and "tv_optimum_to_kl_regularised_optimum" in out
    rows = {r["run"]: (number, r) for number, r in enumerate(result["rows"])}
    assert set(rows) == {"offline ranking_likelihood (ranking, G=2)", "group G=4 standardised estimator",
                         "offline unpaired_classifier (unpaired, G=2)"}
    task = families.bradley_terry(n_responses=4)
    closed = _kl_regularised(task)
    number, row = rows["offline ranking_likelihood (ranking, G=2)"]
    np.testing.assert_allclose(_summary(tmp_path, "cmp", number)["optimum"], closed, rtol=0, atol=1e-8)
    assert row["optimum_kind"] == "minimiser" and row["tv_to_optimum"] <= 1e-3 and row["reached_optimum"] is True
    _, row = rows["offline unpaired_classifier (unpaired, G=2)"]
    assert row["optimum_kind"] == "stationary point" and row["reached_optimum"] is True
    number, row = rows["group G=4 standardised estimator"]
    stationary = np.asarray(_summary(tmp_path, "cmp", number)["optimum"])
    tv = 0.5 * np.abs(stationary - closed).sum()
    assert abs(row["tv_optimum_to_kl_regularised_optimum"] - tv) < 1e-12 and tv > 0.05
    assert row["optimum_kind"] == "stationary point" and row["reached_optimum"] is True
    assert "note: skipped loss=unpaired_classifier task.feedback=ranking: the objective cannot read that feedback" \
        in out
    assert any(n.startswith("method=group draws its own samples and ignores task.feedback") for n in result["notes"])


def test_group_updates_with_the_kl_in_the_reward_stop_at_the_kl_regularised_optimum(tmp_path):
    result = _compare(tmp_path, "cmp", "method=group", "method.group_size=2", "method.kl=in_reward",
                      "method.advantage=leave_one_out,centred")
    assert [r["run"] for r in result["rows"]] == ["group G=2 leave_one_out in_reward", "group G=2 centred in_reward"]
    for row in result["rows"]:
        assert row["tv_optimum_to_kl_regularised_optimum"] < 1e-8 and row["reached_optimum"] is True
