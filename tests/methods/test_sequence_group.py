"""``method=group`` on the 364-response sequence task: sampled groups from the tiny transformer, end to end,
with the update's exact stationary point (on the responses lumped by equal reward) and pi_ref e^{r / beta}
in summary.json.

Held against: the closed form pi_ref e^{r / beta} recomputed here from the task's enumerated reference and
rewards; with the leave-one-out advantage and the KL inside the reward the update's stationary point is
that policy (Kool et al., Buy 4 REINFORCE samples, get a baseline for free!, 2019: the leave-one-out
baseline keeps the expected update the gradient of E_pi[r'], r' = r - beta log(pi / pi_ref) held; derived
by hand); the definition of total variation.
"""

import json

import numpy as np
import pytest
import scipy.special

from polopt.commands.main import main
from toy_tasks.sequence.task import sequence_task

BETA = 0.5


@pytest.mark.slow  # the lumped exact target (56 reward classes per prompt, 3 starts) and 40 sampled steps: ~1 min
def test_group_updates_on_the_sequence_task_report_both_targets(tmp_path):
    code = main(["train", "task=sequence", "method=group", "method.estimator=sampled", "method.group_size=2",
                 "method.advantage=leave_one_out", "method.kl=in_reward", f"beta={BETA}", "train.steps=40",
                 "train.progress=false", f"hydra.run.dir={tmp_path / 'run'}"])
    assert code == 0
    summary = json.loads((tmp_path / "run" / "summary.json").read_text())
    finite = sequence_task().finite_task()
    closed = scipy.special.softmax(np.log(finite.reference) + finite.rewards / BETA, axis=1)  # (2, 364)
    np.testing.assert_allclose(summary["kl_regularised_optimum"], closed, rtol=0, atol=1e-10)
    optimum = np.asarray(summary["optimum"])
    assert optimum.shape == (2, 364) and summary["optimum_kind"] == "stationary point"
    assert "lumped by equal reward (56, 56 classes per prompt)" in summary["optimum_method"]
    np.testing.assert_allclose(optimum, closed, rtol=0, atol=1e-8)
    apart = float(finite.prompt_weights @ (0.5 * np.abs(optimum - closed).sum(1)))
    assert abs(summary["tv_optimum_to_kl_regularised_optimum"] - apart) < 1e-12
    policy = np.asarray(summary["policy"])
    trained = float(finite.prompt_weights @ (0.5 * np.abs(policy - optimum).sum(1)))
    assert abs(summary["tv_to_optimum"] - trained) < 1e-9 and summary["method_config"]["estimator"] == "sampled"


def test_a_group_size_whose_lumped_target_is_out_of_reach_says_so():
    from polopt import losses

    task = sequence_task()
    session = task.prepare(losses.resolve("logistic"), beta=BETA)
    view = session.for_method("group", group_size=3, estimator="sampled")
    assert view.target is None and view.target_method == (
        "none computed: the exact expected update sums over 364^3 groups (175616 groups of reward classes), more "
        "than 100000; a smaller method.group_size has one")
