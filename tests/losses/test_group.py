"""Group objectives (polopt/losses/group.py, group_pairwise.py, group_objective.py and the registry):
a worked value per built-in from its paper's equation, the pair adapter against the pair path value
for value, reductions to DPO, the stop-gradient flag, masks, gradients, and the one-line errors.

Every HAND value below was worked out by hand from the equation in the member's docstring (the
arithmetic is written beside it; the decimals were evaluated with Python's math module, not with
polopt).
"""

import math

import numpy as np
import pytest
import torch

from polopt.losses import registry as objectives
from polopt.losses.group_objective import (
    FEEDBACK_FIELDS,
    GroupObjective,
    GroupScores,
    probe_group,
    ranked_pairs,
    validate_group,
)
from polopt.losses.pair import PairScores
from polopt.losses.reduce import per_pair_losses

BETA = 0.5


def group_of(h, *, labels=None, ranks=None, scores=None, ref=(-1.0, -2.0, -0.5)):
    """One group (B = 1) whose members have log-ratios ``h`` over the reference log-probs ``ref``."""
    ref_t = torch.tensor([ref[: len(h)]], dtype=torch.float64)
    logp = ref_t + torch.tensor([h], dtype=torch.float64)
    extra = {}
    if labels is not None:
        extra["labels"] = torch.tensor([labels], dtype=torch.float64)
    if ranks is not None:
        extra["ranks"] = torch.tensor([ranks])
    if scores is not None:
        extra["scores"] = torch.tensor([scores], dtype=torch.float64)
    return GroupScores(logp, ref_t, torch.ones_like(ref_t), torch.ones_like(ref_t, dtype=torch.bool), **extra)


H3 = (0.4, 0.0, -0.1)  # log-ratios of three members; beta h = (0.2, 0.0, -0.05)
PAIR = dict(h=(0.4, -0.3), ranks=(0, 1))  # winner h_w = 0.4, loser h_l = -0.3: beta rho = 0.35

HAND = [
    # KTO (Ethayarajh et al. 2024): z0 = max(0, (0.4 + 0 - 0.1) / 3) = 0.1; z = 0.5 (h - z0) = (0.15, -0.05, -0.1);
    # labels (1, 0, 1): desirable 1 - sigma(z) = sigma(-z), undesirable 1 - sigma(-z) = sigma(z):
    # (sigma(-0.15) + sigma(-0.05) + sigma(0.1)) / 3
    ("unpaired_prospect", {}, dict(h=H3, labels=(1.0, 0.0, 1.0)), 0.49168398188366),
    # KTO's clamp: mean h = (-0.4 - 0.2 + 0.1) / 3 < 0, so z0 = 0 and z = (-0.2, -0.1, 0.05):
    # (sigma(0.2) + sigma(-0.1) + sigma(-0.05)) / 3
    ("unpaired_prospect", {}, dict(h=(-0.4, -0.2, 0.1), labels=(1.0, 0.0, 1.0)), 0.5041191377831092),
    # BCO (Jung et al. 2024): beta h = (0.2, 0, -0.05); delta = ((0.2 - 0.05) / 2 + 0) / 2 = 0.0375;
    # (-log sigma(0.2 - d) - log sigma(-(0 - d)) - log sigma(-0.05 - d)) / 3
    ("unpaired_classifier", {}, dict(h=H3, labels=(1.0, 0.0, 1.0)), 0.6758737315485074),
    # Plackett-Luce (Rafailov et al. 2023, A.3): ranks (1, 2, 0): order s = (-0.05, 0.2, 0.0);
    # [-(-0.05) + log(e^-0.05 + e^0.2 + e^0)] + [-0.2 + log(e^0.2 + e^0)] + 0
    ("ranking_likelihood", {}, dict(h=H3, ranks=(1, 2, 0)), 1.802700454261364),
    # InfoNCA (Chen et al. 2024): p = softmax((1, 0, 2) / 0.5); -sum p_i log softmax(0.2, 0, -0.05)_i
    ("score_cross_entropy", {"temperature": 0.5}, dict(h=H3, scores=(1.0, 0.0, 2.0)), 1.1744401659243993),
    # NCA (Chen et al. 2024): -sum_i [p_i log sigma(s_i) + log sigma(-s_i) / 3], same p and s
    ("score_binary_contrast", {"temperature": 0.5}, dict(h=H3, scores=(1.0, 0.0, 2.0)), 1.423858131839543),
    # EXO (Ji et al. 2024): q = softmax(0.2, 0, -0.05); sum_i q_i (log q_i - log p_i)
    ("score_reverse_kl", {"temperature": 0.5}, dict(h=H3, scores=(1.0, 0.0, 2.0)), 1.0811196012315532),
    # robust DPO (Chowdhury et al. 2024), eps = 0.2: [(0.8) l(0.35) - 0.2 l(-0.35)] / 0.6, l(z) = log(1 + e^-z)
    ("flip_corrected_logistic", {"flip_rate": 0.2}, PAIR, 0.4167154887521104),
    # Cal-DPO (Xiao et al. 2024): log(1 + e^-0.7) + (0.4 - 1)^2 + (-0.3 + 1)^2
    ("calibrated_logistic", {}, PAIR, 1.2531860488854578),
    # APO-zero (D'Oosterlinck et al. 2024): 1 - sigma(0.2) + sigma(-0.15)
    ("anchored_raise_lower", {}, PAIR, 0.9127361573437724),
    # APO-down: sigma(0.2) + 1 - sigma(0.35)
    ("anchored_lower_both", {}, PAIR, 0.9632164183951478),
    # DiscoPOP (Lu et al. 2024): x = 0.35, m = sigma(0.35 / 0.05); (1 - m) log(1 + e^-0.35) + m e^-0.35
    ("logistic_exponential_blend", {}, PAIR, 0.7045320212426617),
]


def test_every_group_builtin_has_a_worked_value_and_a_config():
    from pathlib import Path

    assert {name for name, *_ in HAND} == set(objectives.builtin_names("group")) == set(objectives.names("group"))
    conf = Path(__file__).resolve().parents[2] / "conf" / "loss"
    for name in objectives.builtin_names("group"):
        assert (conf / f"{name}.yaml").read_text().count(f"name: {name}") == 1


@pytest.mark.parametrize(("name", "params", "group", "want"), HAND, ids=[f"{n}-{i}" for i, (n, *_) in enumerate(HAND)])
def test_each_paper_equation_on_a_hand_computed_group(name, params, group, want):
    value = objectives.resolve(name, **params)(group_of(**group), BETA)
    assert value.shape == (1,)
    assert float(value[0]) == pytest.approx(want, abs=1e-12)


@pytest.mark.parametrize("name", objectives.builtin_names("pair") + ["logistic", "squared", "savage", "hinge"])
def test_a_pair_objective_through_the_adapter_gives_the_pair_path_values_bit_for_bit(name):
    pair_objective = objectives.resolve(name)
    probe = objectives.probe_pair()
    swap = torch.tensor([0, 1, 1, 0])  # the winner sits in either slot of the two-member group
    logp = torch.stack([probe.winner, probe.loser], 1)
    ref = torch.stack([probe.ref_winner, probe.ref_loser], 1)
    lengths = torch.stack([probe.len_winner, probe.len_loser], 1)
    flip = lambda t: torch.where(swap[:, None] == 1, t.flip(1), t)  # noqa: E731
    ranks = flip(torch.tensor([[0, 1]] * 4))
    group = GroupScores(flip(logp), flip(ref), flip(lengths), torch.ones(4, 2, dtype=torch.bool), ranks=ranks)
    through = objectives.as_group_objective(pair_objective)(group, BETA)
    direct = per_pair_losses(pair_objective, probe, beta=BETA)
    assert torch.equal(through, direct)


def test_the_adapter_averages_the_pairs_a_larger_ranking_orders():
    group = group_of(H3, ranks=(1, 2, 0))  # member 2 > member 0 > member 1
    h = torch.tensor(H3, dtype=torch.float64)
    pairs = [(2, 0), (2, 1), (0, 1)]
    logistic = lambda w, lo: math.log1p(math.exp(-BETA * (float(h[w]) - float(h[lo]))))  # noqa: E731
    want = sum(logistic(w, lo) for w, lo in pairs) / 3
    got = objectives.as_group_objective(objectives.resolve("logistic"))(group, BETA)
    assert float(got[0]) == pytest.approx(want, abs=1e-14)


def test_plackett_luce_of_two_and_infonca_of_a_sure_pair_are_dpo():
    group = group_of(PAIR["h"], ranks=(0, 1))
    dpo = math.log1p(math.exp(-0.35))  # Rafailov et al. 2023, eq. 7 at beta rho = 0.35
    assert float(objectives.resolve("ranking_likelihood")(group, BETA)[0]) == pytest.approx(dpo, abs=1e-14)
    # InfoNCA's target softmax((1, 0) / 1e-3) is (1, 0) in float64: DPO (Chen et al. 2024, section 3)
    scored = group_of(PAIR["h"], scores=(1.0, 0.0))
    infonca = objectives.resolve("score_cross_entropy", temperature=1e-3)(scored, BETA)
    assert float(infonca[0]) == pytest.approx(dpo, abs=1e-14)


def test_flip_corrected_logistic_is_unbiased_for_the_clean_logistic_loss():
    """Chowdhury et al. 2024: averaged over a label flipped with probability eps, the corrected loss is
    the clean loss l(beta rho); at eps = 0 it is the logistic loss itself."""
    objective = objectives.resolve("flip_corrected_logistic", flip_rate=0.3)
    probe = objectives.probe_pair()
    swapped = PairScores(probe.loser, probe.winner, probe.ref_loser, probe.ref_winner, probe.len_loser,
                         probe.len_winner)
    as_group = lambda pair: GroupScores(  # noqa: E731
        torch.stack([pair.winner, pair.loser], 1), torch.stack([pair.ref_winner, pair.ref_loser], 1),
        torch.ones(4, 2, dtype=torch.float64), torch.ones(4, 2, dtype=torch.bool), ranks=torch.tensor([[0, 1]] * 4))
    noisy = 0.7 * objective(as_group(probe), BETA) + 0.3 * objective(as_group(swapped), BETA)
    clean = per_pair_losses(objectives.resolve("logistic"), probe, beta=BETA)
    torch.testing.assert_close(noisy, clean, rtol=0, atol=1e-14)
    at_zero = objectives.resolve("flip_corrected_logistic", flip_rate=0.0)(as_group(probe), BETA)
    torch.testing.assert_close(at_zero, clean, rtol=0, atol=1e-15)


def test_stop_gradient_is_declared_by_the_builtins_and_found_in_a_users_function():
    flagged = {n for n in objectives.names("group") if objectives.resolve(n).stop_gradient}
    assert flagged == {"unpaired_prospect", "unpaired_classifier"}
    assert objectives.resolve("user_group_objectives:detached_centre").stop_gradient
    assert not objectives.resolve("user_group_objectives:labelled_squared").stop_gradient


def test_the_feedback_an_objective_reads_is_found_on_probe_groups():
    assert objectives.resolve("user_group_objectives:best_of_group_logistic").reads == ("ranks",)
    assert objectives.resolve("user_group_objectives:labelled_squared").reads == ("labels",)
    ranked = objectives.resolve("ranking_likelihood")
    assert ranked.reads_feedback("ranking") and ranked.reads_feedback("pairs") and not ranked.reads_feedback("scored")
    assert set(FEEDBACK_FIELDS) == {"pairs", "unpaired", "ranking", "scored"}


@pytest.mark.parametrize("name", objectives.builtin_names("group"))
def test_an_absent_member_changes_nothing_and_gradients_stay_finite(name):
    kind = objectives.resolve(name).reads[0]
    full = probe_group(kind)
    pad = lambda t, v: torch.cat([t, torch.full_like(t[:, :1], v)], 1)  # noqa: E731  a fourth slot
    padded = GroupScores(pad(full.logp, 50.0), pad(full.ref_logp, -7.0), pad(full.lengths, 1.0),
                         pad(full.mask, False), **{kind: pad(getattr(full, kind), 9 if kind == "ranks" else 1.0)})
    objective = objectives.resolve(name)
    torch.testing.assert_close(objective(padded, BETA), objective(full, BETA), rtol=0, atol=1e-12)
    logp = padded.logp.clone().requires_grad_(True)
    objective(GroupScores(logp, padded.ref_logp, padded.lengths, padded.mask, **{kind: getattr(padded, kind)}),
              BETA).sum().backward()
    assert torch.isfinite(logp.grad).all() and torch.all(logp.grad[:, 3] == 0)


@pytest.mark.parametrize("name", [n for n in objectives.builtin_names("group")
                                  if not objectives.resolve(n).stop_gradient])
def test_gradients_match_finite_differences(name):
    objective = objectives.resolve(name)
    kind = objective.reads[0]
    probe = probe_group(kind)

    def total(logp):
        return objective(GroupScores(logp, probe.ref_logp, probe.lengths, probe.mask, **{kind: getattr(probe, kind)}),
                         BETA)

    assert torch.autograd.gradcheck(total, (probe.logp.clone().requires_grad_(True),), eps=1e-6, atol=1e-7)


@pytest.mark.parametrize("dtype", [torch.float32, torch.bfloat16])
@pytest.mark.parametrize("name", objectives.builtin_names("group"))
def test_finite_values_and_gradients_at_extremes(name, dtype):
    objective = objectives.resolve(name)
    kind = objective.reads[0]
    probe = probe_group(kind, dtype=dtype)
    for shift in (-200.0, 200.0):
        logp = (probe.ref_logp + shift * torch.tensor([1.0, -1.0, 0.5], dtype=dtype)).requires_grad_(True)
        values = objective(GroupScores(logp, probe.ref_logp, probe.lengths, probe.mask,
                                       **{kind: getattr(probe, kind)}), BETA)
        values.sum().backward()
        assert torch.isfinite(values).all() and torch.isfinite(logp.grad).all()


def test_group_objectives_by_dotted_path_and_their_parameters():
    objective = objectives.resolve("user_group_objectives:best_of_group_logistic", margin=0.3)
    assert isinstance(objective, GroupObjective) and objective.params == {"margin": 0.3}
    with pytest.raises(ValueError, match=r"loss 'score_cross_entropy' got unknown parameter\(s\) alpha; it takes: "
                                         r"temperature"):
        objectives.resolve("score_cross_entropy", alpha=1.0)
    assert objectives.resolve("flip_corrected_logistic", flip_rate=0.25).params == {"flip_rate": 0.25}
    with pytest.raises(ValueError, match=r"loss.flip_rate must lie in \[0, 0.5\)"):
        objectives.resolve("flip_corrected_logistic", flip_rate=0.5)


def test_one_line_errors_for_wrong_signature_shape_and_feedback():
    with pytest.raises(TypeError, match=r"takes \(group, beta, extra\): a loss takes one tensor.* or f\(group, beta\)"):
        objectives.resolve("user_group_objectives:three_arguments")
    with pytest.raises(ValueError, match=r"returned shape \(4, 3\) for a batch of 4 groups; a group objective must "
                                         r"return one loss per group, shape \(4,\)"):
        objectives.resolve("user_group_objectives:one_loss_per_member")

    def reads_nothing(group, beta):
        return group.weights.sum(1)  # a misspelt field

    with pytest.raises(ValueError, match=r"loss 'reads_nothing' failed on probe groups of every feedback kind "
                                         r"\(with labels: AttributeError"):
        validate_group(GroupObjective("reads_nothing", reads_nothing))


def test_ranked_pairs_never_multiplies_an_infinite_dropped_pair_by_zero():
    group = group_of((0.1, -0.2), ranks=(0, 1))

    def infinite_when_reversed(pair, beta):
        return torch.where(pair.winner < pair.loser - 0.5, math.inf, 0.0) + pair.winner * 0.0

    value = ranked_pairs(infinite_when_reversed, group, BETA)
    assert torch.isfinite(value).all()
    assert np.isclose(float(value[0]), 0.0)
