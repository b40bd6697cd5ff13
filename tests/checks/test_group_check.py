"""``polopt check`` of group objectives (polopt.checks.group): a verdict for every built-in, broken
objectives failing with their reason, a user's objective by dotted path.

Held against: DPO's gradient (Rafailov et al., Direct Preference Optimization, 2023, section 4:
d/d theta of -log sigma(beta h_w - beta h_l) is -beta sigma(beta h_l - beta h_w) (grad log pi_w - grad
log pi_l), so -beta/2 on h_w and +beta/2 on h_l at the reference), pushed through the softmax's chain
rule d/dz_k = g_k - pi_k sum_i g_i (derived by hand); the flat populations of KTO and APO-zero with no
signal (derived by hand: sigma(z) + sigma(-z) = 1, so a label that is desirable with probability 1/2
leaves KTO's loss constant, and APO-zero's -sigma(beta h_w) + sigma(beta h_l) over pairs seen equally
often in both orders sums to 0); the certified exact targets of toy_tasks/exact/groups.py (held to
independent solves in tests/toy_tasks/test_group_solve.py).
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
import torch.nn.functional as F

from polopt import losses
from polopt.checks import margin as check
from polopt.checks.group import check_reference_pull, field_at_reference
from polopt.commands.check import group_check_tasks
from polopt.commands.main import main
from polopt.losses.group import ranking_likelihood

STEPS = 2000


@pytest.fixture(scope="module")
def tasks():
    return group_check_tasks()


def flipped_ranking(group, beta):  # listwise DPO with its sign flipped: rewards the lower-ranked member
    return -ranking_likelihood(group, beta)


def reversed_ranks(group, beta):  # listwise DPO reading rank 0 as the worst: a sign error in the convention
    return ranking_likelihood(dataclasses.replace(group, ranks=group.size - 1 - group.ranks), beta)


def per_member(group, beta):  # forgets to reduce over the members: (B, G)
    return F.softplus(-beta * group.logratio)


def _status(report) -> dict:
    return {r.name: r.status for r in report.results}


def _reason(report, name: str) -> str:
    return report.result(name).reason


def test_the_field_at_the_reference_is_dpos_published_gradient(tasks):
    signal, _ = tasks
    beta = 0.5
    session = signal.prepare(losses.resolve("ranking_likelihood"), beta=beta, mode="exact", feedback="ranking",
                             group_size=2)
    grad, _ = field_at_reference(session)
    mu, r, pi = signal.sampling[0], signal.rewards[0], signal.reference[0]
    p = 1.0 / (1.0 + np.exp(-(r[:, None] - r[None, :])))  # Plackett–Luce at G = 2: P(i ranked above j)
    # i ranked above j: from the tuples (i, j) and (j, i), weight 2 mu_i mu_j p_ij; -beta/2 on h_i, +beta/2 on h_j
    g = -beta * (mu * (p @ mu)) + beta * (mu * (p.T @ mu))
    np.testing.assert_allclose(grad, g - pi * g.sum(), rtol=0, atol=1e-12)


@pytest.mark.parametrize(("name", "kind"), [("unpaired_prospect", "unpaired"), ("anchored_raise_lower", "ranking")])
def test_kto_and_apo_zero_are_flat_with_no_signal(tasks, name, kind):
    _, silent = tasks
    objective = losses.resolve(name)
    session = silent.prepare(objective, beta=0.5, mode="exact", feedback=kind, group_size=2)
    result = check_reference_pull(objective, session, kind=kind)
    assert result.status == "warn" and "flat at the reference" in result.reason
    assert max(abs(e) for e in result.facts["eigenvalues"]) < 1e-12


def test_a_reversed_ranking_fails_as_rewarding_the_worse_responses(tasks):
    report = check.run_checks(reversed_ranks, beta=0.5, group_tasks=tasks, steps=STEPS)
    status = _status(report)
    assert status["signal:ranking"] == "fail" and report.status == "fail"
    assert _reason(report, "signal:ranking").startswith("rewards the worse responses")
    assert status["reference_pull:ranking"] == "pass"  # with no signal the reversal changes nothing


@pytest.mark.slow  # the exact solver follows the unbounded objective to the simplex's boundary (~2 minutes)
def test_a_sign_flipped_objective_fails_as_rewarding_the_worse_responses(tasks):
    report = check.run_checks(flipped_ranking, beta=0.5, group_tasks=tasks, steps=300)
    status = _status(report)
    assert status["signal:ranking"] == "fail" and report.status == "fail"
    assert _reason(report, "signal:ranking").startswith("rewards the worse responses: the first step of gradient "
                                                         "descent from the reference lowers the expected reward")
    assert status["reference_pull:ranking"] == "warn"  # the reference is a maximum with no signal


def test_a_shape_error_fails_per_group_and_skips_the_rest():
    report = check.run_checks(per_member, beta=0.5)
    assert _status(report) == {"per_group": "fail", "finite": "skip"}
    assert "returned shape (4, 3) for a batch of 4 groups" in _reason(report, "per_group")


def test_cli_shape_error_is_one_line_and_exit_2(capsys):
    assert main(["check", "user_group_objectives:one_loss_per_member", "--quick"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("polopt check: error: loss 'user_group_objectives:one_loss_per_member' "
                                               "returned shape (4, 3) for a batch of 4 groups")


def test_a_users_objective_by_dotted_path_passes_with_the_time_of_each_check(capsys):
    code = main(["check", "user_group_objectives:best_of_group_logistic", "loss.margin=0.2", "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    report = json.loads(out)
    status = {c["name"]: c["status"] for c in report["checks"]}
    assert {k: v for k, v in status.items() if v != "skip"} == {
        "per_group": "pass", "finite": "pass", "reference_pull:ranking": "pass", "noisy_optimum:ranking": "pass",
        "signal:ranking": "pass", "descent:ranking": "pass"}
    assert err.count(" s  (total ") == 6  # one progress line with its seconds per check run


@pytest.mark.parametrize(("argv", "message"), [
    (["check", "method=group"], "polopt check: error: polopt check takes a loss, got 'method=group': a method's check "
                                "is its run against its exact target"),
    (["check", "ranking_likelihood", "--tasks", "nontransitive"],
     "polopt check: error: --tasks chooses the pair tasks of margin and pair losses; group objective "
     "'ranking_likelihood' is checked on bradley_terry task.n_responses=4"),
])
def test_cli_refusals_are_one_line(capsys, argv, message):
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith(message)


# verdicts measured on bradley_terry task.n_responses=4, beta 0.5, groups of 2, 2000 Adam steps; the reasons
# for each warning are derived in the module docstring (KTO, APO-zero flat) or are the solver's certified
# targets (DiscoPOP's global minimum; APO's boundary infima)
EXPECTED = {
    "unpaired_prospect": {"reference_pull:unpaired": "warn", "noisy_optimum:unpaired": "warn",
                          "descent:unpaired": "warn"},
    "anchored_raise_lower": {"reference_pull:ranking": "warn", "noisy_optimum:ranking": "warn"},
    "anchored_lower_both": {"reference_pull:ranking": "warn", "noisy_optimum:ranking": "warn",
                            "descent:ranking": "warn"},
    "logistic_exponential_blend": {"reference_pull:ranking": "warn", "signal:ranking": "warn",
                                   "descent:ranking": "warn"},
}


@pytest.mark.slow
@pytest.mark.parametrize("name", losses.builtin_names("group"))
def test_every_builtin_group_objective_gets_a_verdict(name, tasks):
    report = check.run_checks(name, beta=0.5, group_tasks=tasks, steps=STEPS)
    status = {k: v for k, v in _status(report).items() if v != "skip"}
    assert report.failures == [], [(r.name, r.reason) for r in report.failures]
    expected = EXPECTED.get(name, {})
    for check_name, verdict in status.items():
        assert verdict == expected.get(check_name, "pass"), (check_name, _reason(report, check_name))
    if name == "logistic_exponential_blend":  # f'(0) > 0 at tau = 0.05: a wrong-sign local minimum near 0
        assert "stops at a wrong-sign local minimum" in _reason(report, "descent:ranking")
        facts = report.result("descent:ranking").facts
        assert facts["tv_to_optimum"] > 0.1 and facts["target_expected_reward_gain"] > 0
