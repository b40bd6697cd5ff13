"""The pair objectives (polopt/losses/pair.py, polopt/losses/registry.py): every registered member
against an independent float64 formula, gradients, extremes in fp32 and bf16; margin losses through
the adapter bit for bit; the signature rule and its one-line errors.

Every expected value comes from the formulas below, written here with numpy/scipy from the
papers' definitions (u = pi / pi_ref, the link f'(u) of each divergence, lengths n), not from
polopt's code; one pair per member is also worked out by hand from the paper's equation
(HAND_COMPUTED), with numbers that tell the paper's form from its near misses.
"""

import math

import numpy as np
import pytest
import torch
from helpers_losses import per_pair_of_margins
from scipy.special import log_expit

from polopt import losses
from polopt.losses.pair import PairScores
from polopt.losses.reduce import margins, per_pair_losses


def nls(z):
    """-log sigma(z), float64 (scipy)."""
    return -log_expit(z)


def _u(logp, ref):
    return np.exp(logp - ref)  # u = pi / pi_ref


# name -> (params, float64 formula of (w, lo, rw, rl, nw, nl, beta)); each names its paper
REFERENCE = {
    # Rafailov et al. 2023, DPO eq. 7 (= f-DPO with the reverse KL, Wang et al. 2023)
    "divergence_reverse_kl": ({}, lambda w, lo, rw, rl, nw, nl, b: nls(b * ((w - rw) - (lo - rl)))),
    # Wang et al. 2023: forward KL f(u) = -log u, f'(u) = -1/u
    "divergence_forward_kl": ({}, lambda w, lo, rw, rl, nw, nl, b: nls(b * (-1 / _u(w, rw) + 1 / _u(lo, rl)))),
    # Wang et al. 2023: Jensen-Shannon, f'(u) = log(2u / (1 + u))
    "divergence_jensen_shannon": ({}, lambda w, lo, rw, rl, nw, nl, b: nls(b * (
        np.log(2 * _u(w, rw) / (1 + _u(w, rw))) - np.log(2 * _u(lo, rl) / (1 + _u(lo, rl)))))),
    # Wang et al. 2023: alpha-divergence, f'(u) = (1 - u^-a) / a, a = 0.3
    "divergence_alpha": ({"alpha": 0.3}, lambda w, lo, rw, rl, nw, nl, b: nls(b * (
        (1 - _u(w, rw) ** -0.3) / 0.3 - (1 - _u(lo, rl) ** -0.3) / 0.3))),
    # Huang et al. 2024 (chi-PO): phi(u) = u + log u, clipped to [-2, 2]
    "chi_squared_link": ({"clip": 2.0}, lambda w, lo, rw, rl, nw, nl, b: nls(np.clip(b * (
        _u(w, rw) + np.log(_u(w, rw)) - _u(lo, rl) - np.log(_u(lo, rl))), -2.0, 2.0))),
    # Meng et al. 2024 (SimPO): beta / |y| log pi, margin gamma = 0.7
    "length_normalised_free": ({"gamma": 0.7}, lambda w, lo, rw, rl, nw, nl, b: nls(b * w / nw - b * lo / nl - 0.7)),
    # Park et al. 2024 (R-DPO): + alpha (|y_w| - |y_l|), alpha = 0.2
    "length_regularised": ({"alpha": 0.2}, lambda w, lo, rw, rl, nw, nl, b: nls(
        b * ((w - rw) - (lo - rl)) + 0.2 * (nw - nl))),
    # Pal et al. 2024 (DPO-Positive): - lambda max(0, log pi_ref(y_w) / pi(y_w)), lambda = 5
    "winner_anchored": ({"penalty": 5.0}, lambda w, lo, rw, rl, nw, nl, b: nls(
        b * ((w - rw) - (lo - rl) - 5.0 * np.maximum(0.0, rw - w)))),
    # Xu et al. 2024 (CPO), preference term
    "reference_free_logistic": ({}, lambda w, lo, rw, rl, nw, nl, b: nls(b * (w - lo))),
    # Xu et al. 2024 (CPO): preference term + NLL of the winner, weight 0.5, per token
    "plus_winner_nll": ({"weight": 0.5, "per_token": True}, lambda w, lo, rw, rl, nw, nl, b: nls(b * (w - lo))
                        - 0.5 * w / nw),
    # Hong et al. 2024 (ORPO): -log pi(y_w)/n_w - lambda log sigma(log odds_w - log odds_l), P = exp(log pi / n)
    "odds_ratio_with_nll": ({"weight": 0.25}, lambda w, lo, rw, rl, nw, nl, b: -w / nw + 0.25 * nls(
        np.log((np.exp(w / nw) / (1 - np.exp(w / nw))) / (np.exp(lo / nl) / (1 - np.exp(lo / nl)))))),
}


def test_every_builtin_has_a_reference_formula_and_a_config():
    from pathlib import Path

    assert set(losses.builtin_names("pair")) == set(REFERENCE)
    conf = Path(__file__).resolve().parents[2] / "conf" / "loss"
    for name in losses.builtin_names("pair"):
        assert (conf / f"{name}.yaml").is_file(), name


def random_pairs(n=64, seed=0, dtype=torch.float64):
    rng = np.random.default_rng(seed)
    logp = -rng.uniform(0.05, 6.0, size=(4, n))  # log-probabilities of probabilities 0.0025..0.95
    length = rng.integers(1, 7, size=(2, n)).astype(float)
    return [torch.tensor(v, dtype=dtype) for v in (*logp, *length)]


@pytest.mark.parametrize("name", sorted(REFERENCE))
def test_values_match_the_independent_float64_formula(name):
    params, formula = REFERENCE[name]
    w, lo, rw, rl, nw, nl = random_pairs()
    beta = 0.7
    got = losses.resolve(name, **params)(PairScores(w, lo, rw, rl, nw, nl), beta)
    want = formula(*(t.numpy() for t in (w, lo, rw, rl, nw, nl)), beta)
    np.testing.assert_allclose(got.numpy(), want, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("name", sorted(REFERENCE))
def test_gradients_match_finite_differences(name):
    """torch.autograd.gradcheck (central differences, float64) in the four log-probabilities."""
    params, _ = REFERENCE[name]
    objective = losses.resolve(name, **params)
    w, lo, rw, rl, nw, nl = random_pairs(n=12, seed=1)
    inputs = tuple(t.clone().requires_grad_(True) for t in (w, lo, rw, rl))
    assert torch.autograd.gradcheck(lambda *x: objective(PairScores(*x, nw, nl), 0.7), inputs, eps=1e-6, atol=1e-6)


EXTREME_LOGP = (-1e4, -1e3, -50.0, -5.0, -1e-3, 0.0)  # log-probabilities are <= 0


@pytest.mark.parametrize("dtype", [torch.float32, torch.bfloat16])
@pytest.mark.parametrize("name", sorted(REFERENCE))
def test_finite_values_and_gradients_at_extremes(name, dtype):
    params, _ = REFERENCE[name]
    objective = losses.resolve(name, **params)
    grid = torch.tensor(np.array(np.meshgrid(*[EXTREME_LOGP] * 4)).reshape(4, -1), dtype=dtype)  # (4, 1296)
    for n in (1.0, 1000.0):
        inputs = [g.clone().requires_grad_(True) for g in grid]
        length = torch.full_like(grid[0], n)
        values = objective(PairScores(*inputs, length, torch.full_like(length, 7.0)), 0.5)
        assert torch.isfinite(values).all(), f"{name} {dtype} n={n}: non-finite values"
        values.sum().backward()
        for g in inputs:  # no gradient at all: an input the objective does not read (the reference)
            assert g.grad is None or torch.isfinite(g.grad).all(), f"{name} {dtype} n={n}: non-finite gradients"


# ---------------------------------------------------------------- each paper's equation, by hand
#
# One pair per member, with numbers chosen so that the paper's equation can be worked out by hand
# (u = pi / pi_ref a small integer or fraction, log-probabilities multiples of log 2 or log 3). Each
# expected value below is that hand computation, written as a closed form; the comment names the
# paper, the equation and why the numbers tell the paper's form from a near miss (sign, or a constant
# inside or outside beta). Sources of each equation: the member's docstring in polopt/losses/pair.py.

LN2, LN3 = math.log(2.0), math.log(3.0)


def _one_pair(log_w, log_l, ref_w=0.0, ref_l=0.0, n_w=1.0, n_l=1.0):
    return PairScores(*(torch.tensor([v], dtype=torch.float64) for v in (log_w, log_l, ref_w, ref_l, n_w, n_l)))


HAND_COMPUTED = [
    # Wang et al. 2023 (f-DPO), forward KL f'(u) = -1/u: u_w = 1, u_l = 2, beta = 1:
    # -log sigma(-1 - (-1/2)) = log(1 + e^{1/2})
    ("divergence_forward_kl", {}, 1.0, _one_pair(-LN2, -LN2, ref_w=-LN2, ref_l=-2 * LN2),
     math.log(1.0 + math.exp(0.5))),
    # Wang et al. 2023 (f-DPO), Jensen-Shannon f'(u) = log(2u / (1 + u)): u_w = 1 (f' = 0), u_l = 3
    # (f' = log 3/2), beta = 2: -log sigma(-2 log 3/2) = log(1 + 9/4) = log(13/4)
    ("divergence_jensen_shannon", {}, 2.0, _one_pair(-LN3, -LN3, ref_w=-LN3, ref_l=-2 * LN3),
     math.log(13.0 / 4.0)),
    # Wang et al. 2023 (f-DPO), alpha-divergence f'(u) = (1 - u^{-a}) / a, a = 1/2: u_w = 4 (f' = 1),
    # u_l = 1 (f' = 0), beta = log 3: -log sigma(log 3) = log(1 + 1/3) = log(4/3)
    ("divergence_alpha", {"alpha": 0.5}, LN3, _one_pair(-LN2, -LN2, ref_w=-3 * LN2, ref_l=-LN2),
     math.log(4.0 / 3.0)),
    # Huang et al. 2024 (chi-PO), Algorithm 1, phi(z) = z + log z: u_w = 1 (phi = 1), u_l = 1/2
    # (phi = 1/2 - log 2), beta = 1: -log sigma(1/2 + log 2) = log(1 + e^{-1/2} / 2)
    ("chi_squared_link", {}, 1.0, _one_pair(-LN2, -2 * LN2, ref_w=-LN2, ref_l=-LN2),
     math.log(1.0 + math.exp(-0.5) / 2.0)),
    # the same pair clipped at 2 R_max = 1 (clip applied to beta (phi_w - phi_l) = 1.19): log(1 + e^{-1})
    ("chi_squared_link", {"clip": 1.0}, 1.0, _one_pair(-LN2, -2 * LN2, ref_w=-LN2, ref_l=-LN2),
     math.log(1.0 + math.exp(-1.0))),
    # Meng et al. 2024 (SimPO): -log sigma(beta/|y_w| log pi_w - beta/|y_l| log pi_l - gamma) with log pi_w
    # = -6 over 3 tokens, log pi_l = -12 over 4, beta = 2, gamma = 1: -4 + 6 - 1 = 1 -> log(1 + e^{-1})
    # (gamma inside beta would give 2 (2 - 1) = 2 instead)
    ("length_normalised_free", {"gamma": 1.0}, 2.0, _one_pair(-6.0, -12.0, n_w=3.0, n_l=4.0),
     math.log(1.0 + math.exp(-1.0))),
    # Park et al. 2024 (R-DPO): + (alpha |y_w| - alpha |y_l|) in the logit: equal log-ratios (0),
    # |y_w| = 10, |y_l| = 4, alpha = 0.1: -log sigma(0.6) = log(1 + e^{-0.6}) (the - sign: log(1 + e^{0.6}))
    ("length_regularised", {"alpha": 0.1}, 0.5, _one_pair(-3.0, -5.0, ref_w=-3.0, ref_l=-5.0, n_w=10.0, n_l=4.0),
     math.log(1.0 + math.exp(-0.6))),
    # Pal et al. 2024 (DPO-Positive): -log sigma(beta (h_w - h_l - lambda max(0, log pi_ref(y_w)/pi(y_w))))
    # with h_w = -0.1 (winner below its reference), h_l = -1.1, lambda = 5, beta = 2:
    # 2 (1 - 0.5) = 1 -> log(1 + e^{-1}) (the penalty outside beta would give 2 - 0.5 = 1.5 instead)
    ("winner_anchored", {"penalty": 5.0}, 2.0, _one_pair(-1.1, -2.1, ref_w=-1.0, ref_l=-1.0),
     math.log(1.0 + math.exp(-1.0))),
    # ... and with the winner above its reference (h_w = +0.1) the penalty is 0: DPO, 2 (0.1 + 1.1) = 2.4
    ("winner_anchored", {"penalty": 5.0}, 2.0, _one_pair(-0.9, -2.1, ref_w=-1.0, ref_l=-1.0),
     math.log(1.0 + math.exp(-2.4))),
    # Xu et al. 2024 (CPO), Eq. 3 (L_prefer): log pi_w = -2, log pi_l = -2 - log 3, beta = 1:
    # -log sigma(log 3) = log(4/3)
    ("reference_free_logistic", {}, 1.0, _one_pair(-2.0, -2.0 - LN3), math.log(4.0 / 3.0)),
    # Xu et al. 2024 (CPO): L_prefer + L_NLL, the whole-sequence NLL with weight 1: log(4/3) + 2
    ("plus_winner_nll", {}, 1.0, _one_pair(-2.0, -2.0 - LN3), math.log(4.0 / 3.0) + 2.0),
    # Hong et al. 2024 (ORPO), Eq. 6: L_SFT + lambda L_OR with P = exp(log pi / |y|): P_w = 1/2 (odds 1;
    # log pi_w = -2 log 2 over 2 tokens, so L_SFT = log 2), P_l = 1/5 (odds 1/4), lambda = 0.1:
    # L_OR = -log sigma(log 4) = log(5/4); total log 2 + 0.1 log(5/4). beta is not used.
    ("odds_ratio_with_nll", {"weight": 0.1}, 7.0, _one_pair(-2 * LN2, -math.log(5.0), n_w=2.0, n_l=1.0),
     LN2 + 0.1 * math.log(5.0 / 4.0)),
]


@pytest.mark.parametrize(("name", "params", "beta", "pair", "want"), HAND_COMPUTED,
                         ids=[f"{c[0]}-{i}" for i, c in enumerate(HAND_COMPUTED)])
def test_each_paper_equation_on_a_hand_computed_pair(name, params, beta, pair, want):
    got = losses.resolve(name, **params)(pair, beta)
    assert got.shape == (1,)
    assert float(got) == pytest.approx(want, rel=1e-12, abs=1e-12)


# ---------------------------------------------------------------- relations between members


def test_reverse_kl_member_is_the_logistic_margin_loss():
    """f-DPO with the reverse KL is DPO (Wang et al. 2023, section on the reverse KL)."""
    pair = PairScores(*random_pairs())
    dpo = per_pair_losses(losses.resolve_margin("logistic"), pair, beta=0.4)
    np.testing.assert_allclose(losses.resolve("divergence_reverse_kl")(pair, 0.4).numpy(), dpo.numpy(),
                               rtol=1e-14)


def test_alpha_divergence_tends_to_reverse_and_forward_kl():
    """(1 - u^-a) / a -> log u as a -> 0 and -> 1 - 1/u at a = 1 (derived: the limits of the link)."""
    pair = PairScores(*random_pairs())
    near_zero = losses.resolve("divergence_alpha", alpha=1e-7)(pair, 0.5)
    near_one = losses.resolve("divergence_alpha", alpha=1 - 1e-9)(pair, 0.5)
    np.testing.assert_allclose(near_zero.numpy(), losses.resolve("divergence_reverse_kl")(pair, 0.5).numpy(),
                               rtol=1e-5)
    np.testing.assert_allclose(near_one.numpy(), losses.resolve("divergence_forward_kl")(pair, 0.5).numpy(),
                               rtol=1e-6)


def test_plus_winner_nll_adds_the_nll_to_any_base():
    pair = PairScores(*random_pairs())
    base = per_pair_losses(losses.resolve_margin("squared"), pair, beta=0.5)
    got = losses.resolve("plus_winner_nll", base="squared", weight=2.0)(pair, 0.5)
    np.testing.assert_allclose(got.numpy(), (base - 2.0 * pair.winner).numpy(), rtol=1e-14)


def test_length_terms_vanish_at_equal_lengths():
    """R-DPO with |y_w| = |y_l| is DPO (Park et al. 2024: the term is alpha (|y_w| - |y_l|))."""
    w, lo, rw, rl, _, _ = random_pairs()
    same = torch.full_like(w, 3.0)
    pair = PairScores(w, lo, rw, rl, same, same)
    np.testing.assert_allclose(losses.resolve("length_regularised", alpha=0.5)(pair, 0.5).numpy(),
                               losses.resolve("divergence_reverse_kl")(pair, 0.5).numpy(), rtol=1e-14)


# ---------------------------------------------------------------- the adapter: one objective path


@pytest.mark.parametrize("smoothing", [0.0, 0.1])
@pytest.mark.parametrize("name", losses.names("margin"))
def test_every_margin_loss_through_the_adapter_equals_the_margin_path_bit_for_bit(name, smoothing):
    w, lo, rw, rl, nw, nl = random_pairs(dtype=torch.float32)
    loss = losses.resolve_margin(name)
    old = per_pair_of_margins(loss, margins(w, lo, rw, rl), beta=0.3, smoothing=smoothing)
    new = per_pair_losses(loss, PairScores(w, lo, rw, rl, nw, nl), beta=0.3, smoothing=smoothing)
    assert torch.equal(old, new)


def test_smoothing_of_a_pair_objective_swaps_winner_and_loser_lengths_included():
    pair = PairScores(*random_pairs())
    ell = losses.resolve("length_normalised_free")
    swapped = PairScores(pair.loser, pair.winner, pair.ref_loser, pair.ref_winner, pair.len_loser, pair.len_winner)
    got = per_pair_losses(ell, pair, beta=0.5, smoothing=0.2)
    np.testing.assert_allclose(got.numpy(), (0.8 * ell(pair, 0.5) + 0.2 * ell(swapped, 0.5)).numpy(), rtol=1e-14)


# ---------------------------------------------------------------- naming: the signature rule


def test_a_dotted_path_is_a_margin_loss_or_a_pair_objective_by_its_signature():
    assert isinstance(losses.resolve("user_losses:sqrt_abs"), losses.MarginLoss)
    objective = losses.resolve("user_losses:anchored_squared", weight=3.0)
    assert isinstance(objective, losses.PairLoss) and objective.params == {"weight": 3.0}
    assert objective.source == "user-supplied"


def test_loss_parameters_reach_a_builtin_and_unknown_ones_are_named():
    assert losses.resolve("divergence_alpha", alpha=0.2).params == {"alpha": 0.2}
    with pytest.raises(ValueError, match=r"loss 'divergence_alpha' got unknown parameter\(s\) delta; it takes: alpha"):
        losses.resolve("divergence_alpha", delta=1.0)
    with pytest.raises(ValueError, match=r"loss.alpha must lie in \(0, 1\)"):
        losses.resolve("divergence_alpha", alpha=1.5)


def test_unknown_name_lists_margin_losses_and_pair_objectives():
    with pytest.raises(ValueError, match=r"unknown loss 'nope'; known losses: logistic, .*divergence_alpha"):
        losses.resolve("nope")


def test_one_line_errors_for_wrong_signature_shape_and_non_finite_values():
    with pytest.raises(TypeError, match=r"loss 'user_losses:three_arguments' takes \(pair, beta, gamma\): a loss "
                                        r"takes one tensor"):
        losses.resolve("user_losses:three_arguments")
    with pytest.raises(ValueError, match=r"returned shape \(\) for a batch of 4 pairs; a pair objective must "
                                         r"return one loss per pair"):
        losses.resolve("user_losses:batch_mean")
    with pytest.raises(ValueError, match=r"returned non-finite values \[nan"):
        losses.resolve("user_losses:log_of_logratio")


def test_registering_a_pair_objective_under_a_name():
    @losses.register("test_only_anchored", source="ours")
    def anchored(pair, beta, *, weight=1.0):
        return torch.relu(-pair.logratio_winner) * weight - beta * (pair.winner - pair.loser)

    try:
        assert losses.resolve("test_only_anchored", weight=2.0).params == {"weight": 2.0}
        assert "test_only_anchored" in losses.names("pair") and "test_only_anchored" not in losses.names("margin")
        with pytest.raises(TypeError, match=r"takes \(pair, beta, gamma\): a loss takes one tensor"):
            losses.register("test_only_bad")(lambda pair, beta, gamma: pair.winner)
        with pytest.raises(ValueError, match="'logistic' is already a margin loss; choose another name"):
            losses.register("logistic")(anchored)
    finally:
        losses.unregister("test_only_anchored")
    assert "test_only_anchored" not in losses.names()


def test_probe_batch_is_ordinary():
    """The probe's log-probabilities are of probabilities in (0, 1) and its lengths positive, so a
    sound objective has no excuse there."""
    pair = losses.registry.probe_pair()
    for t in (pair.winner, pair.loser, pair.ref_winner, pair.ref_loser):
        assert (t < 0).all() and (t > math.log(0.1)).all()
    assert (pair.len_winner >= 1).all() and (pair.len_loser >= 1).all()
