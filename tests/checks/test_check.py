"""Tests of polopt.checks.margin (the battery of ``polopt check``) and of the ``check`` command.

Expected values come from published formulas (named beside each check), from
scipy's reference functions, or are derived by hand (said so). Broken losses are
written here on purpose, one defect each, and must be flagged with the right reason.
"""

from __future__ import annotations

import json
import sys
import textwrap

import numpy as np
import pytest
import scipy.optimize
import scipy.special
import torch
import torch.nn.functional as F

from polopt import losses
from polopt.checks import margin as check
from polopt.commands.main import main
from polopt.losses.margin import MarginLoss
from toy_tasks import families

STEPS = 500  # exact mode reaches TV < 1e-3 for every built-in in 500 Adam steps (measured: hinge 3e-4, others < 1e-7)


@pytest.fixture(scope="module")
def tasks():
    return [families.bradley_terry(), families.noisy_labels(), families.nontransitive(), families.deterministic()]


# ---------------------------------------------------------------- deliberately broken losses


def sign_error(x):  # logistic of the wrong margin: log(1 + e^{x})
    return F.softplus(x)


def sign_error_squared(x):  # (x + 1)^2: the IPO target on the wrong side
    return (x + 1.0) ** 2


def no_signal(x):  # symmetric: f'(0) = 0
    return x**2


def wrong_scale(x):  # log(1 + e^{-2x}): logistic with beta doubled
    return F.softplus(-2.0 * x)


def wrong_target(x):  # squared loss centred at 2 instead of 1
    return (x - 2.0) ** 2


def wrong_value_scale(x):
    return 3.0 * F.softplus(-x)


def non_convex(x):  # the savage loss written by a user (no convexity declared)
    return torch.sigmoid(-x) ** 2


def batch_coupled(x):  # centres the margins by their batch mean: not elementwise
    return F.softplus(-(x - x.mean()))


def reduced(x):  # returns one number for the whole batch
    return F.softplus(-x).mean()


def naive_logistic(x):  # log(1 + e^{-x}) without softplus: overflows at large negative x
    return torch.log(1.0 + torch.exp(-x))


def saturating(x):  # bounded and flat at both ends: the optimum is infinite for every p != 1/2
    return torch.sigmoid(-x)


def softsquare(x):  # a new convex loss with a finite optimum: not a rescaled built-in
    return F.softplus(1.0 - x) ** 2


def _static(fn, beta=0.5):
    return check.run_checks(fn, beta=beta)


# ---------------------------------------------------------------- every built-in passes


# the registry's own members (users' registrations, e.g. from other test modules, are not built-ins)
BUILTINS = losses.builtin_names("margin")


def test_the_registry_holds_the_published_members():
    assert set(BUILTINS) == {"logistic", "squared", "hinge", "huber", "exponential", "truncated_quadratic", "savage"}


@pytest.mark.parametrize("name", BUILTINS)
def test_every_builtin_passes_the_static_checks(name):
    report = _static(name)
    assert report.failures == [], [f"{r.name}: {r.reason}" for r in report.failures]
    warned = {r.name for r in report.results if r.status == "warn"}
    # savage is the one non-convex member (Tang et al. 2024); nothing else may warn
    assert warned == ({"convexity"} if name == "savage" else set())


@pytest.mark.parametrize("name", BUILTINS)
def test_every_builtin_reaches_the_exact_population_optimum(name, tasks):
    report = check.run_checks(name, beta=0.5, tasks=tasks, steps=STEPS)
    population = [r for r in report.results if r.name.startswith("population:")]
    assert len(population) == 4
    assert all(r.status == "pass" for r in population), [f"{r.name}: {r.reason}" for r in population]
    for r in population:
        if r.facts["optimum_finite"] and r.facts["optimum_unique"]:
            assert r.facts["tv_to_optimum"] <= 1e-3
    # deterministic labels: logistic, exponential and savage have no finite optimum (Azar et al. 2023, 4.2)
    det = report.result("population:deterministic")
    assert det.facts["optimum_finite"] is (name not in ("logistic", "exponential", "savage"))


# ---------------------------------------------------------------- broken losses, each with its reason


def test_sign_error_is_flagged_as_rewarding_the_loser(tasks):
    report = check.run_checks(sign_error, beta=0.5, tasks=tasks[:1], steps=300)
    assert report.result("signal").status == "fail"
    assert "sign error" in report.result("signal").reason and "rewards the loser" in report.result("signal").reason
    assert report.result("pair_optimum").status == "fail"
    assert "negative for p > 1/2" in report.result("pair_optimum").reason
    scale = report.result("scale")
    assert scale.status == "fail" and "logistic loss with the sign of the margin flipped" in scale.reason
    population = report.result("population:bradley_terry")  # it reaches its own (wrong-way) optimum: a warning
    assert population.status == "warn" and "prefers the losers" in population.reason


def test_sign_error_in_a_squared_loss():
    report = _static(sign_error_squared)
    assert "sign error: f'(0) = 2 > 0" in report.result("signal").reason  # d/dx (x+1)^2 at 0 = 2, by hand
    assert "squared loss with the sign of the margin flipped" in report.result("scale").reason
    assert report.result("certainty").facts["optimum_at_1"] == pytest.approx(-1.0, abs=1e-6)


def test_no_signal_is_flagged(tasks):
    report = check.run_checks(no_signal, beta=0.5, tasks=tasks[:1], steps=100)
    assert report.result("signal").status == "fail"
    assert "no preference signal: f'(0) = 0" in report.result("signal").reason
    assert "0 for every p" in report.result("pair_optimum").reason
    assert "did not move from the reference" in report.result("population:bradley_terry").reason


def test_wrong_scale_of_the_margin_is_a_warning_naming_the_equivalent_beta():
    report = _static(wrong_scale, beta=0.5)
    scale = report.result("scale")
    assert scale.status == "warn" and report.failures == []
    assert "the input is scaled by 2" in scale.reason and "logistic at beta 1" in scale.reason
    match = next(m for m in scale.facts["matches"] if m["builtin"] == "logistic")
    assert match["a"] == pytest.approx(2.0, rel=1e-6) and match["c"] == pytest.approx(1.0, rel=1e-6)
    # per-pair optimum logit(p) / 2: the logistic one at twice the beta (Rafailov et al. 2023)
    curve = np.asarray(report.curve["optimum"])
    assert curve == pytest.approx(scipy.special.logit(check.CURVE_P) / 2, abs=1e-5)


def test_wrong_target_of_a_squared_loss_is_a_warning():
    scale = _static(wrong_target).result("scale")
    # (x - 2)^2 = 4 (x/2 - 1)^2: squared at half the beta (derived by hand)
    assert scale.status == "warn" and "4 * squared(0.5 x)" in scale.reason
    assert "squared at beta 0.25" in scale.reason


def test_wrong_value_scale_is_a_warning_about_gradients():
    scale = _static(wrong_value_scale).result("scale")
    assert scale.status == "warn" and "the value is scaled by 3" in scale.reason


def test_non_convex_loss_warns_and_does_not_fail(tasks):
    report = check.run_checks(non_convex, beta=0.5, tasks=tasks[:2], steps=STEPS)
    convexity = report.result("convexity")
    assert convexity.status == "warn" and convexity.reason.startswith("not convex")
    assert "several stationary points" in convexity.reason
    assert report.failures == []


def test_declared_convex_but_not_convex_fails():
    liar = MarginLoss("liar", losses.margin.savage, {}, True, "test", None)
    result = check.check_convexity(liar)
    assert result.status == "fail" and result.reason.startswith("declared convex, but not convex")


@pytest.mark.parametrize("fn, text", [(batch_coupled, "not elementwise"), (reduced, "returned shape ()")])
def test_non_elementwise_losses_fail_and_skip_the_rest(fn, text, tasks):
    report = check.run_checks(fn, beta=0.5, tasks=tasks[:1], steps=10)
    assert report.result("elementwise").status == "fail" and text in report.result("elementwise").reason
    assert all(r.status == "skip" for r in report.results[1:])


def test_overflow_at_extreme_margins_fails_with_the_margin_and_dtype():
    result = check.check_finite(losses.resolve(naive_logistic))
    assert result.status == "fail" and "not finite at extreme margins" in result.reason
    # e^{100} > 3.4e38, the float32 maximum (IEEE 754), so x = -100 overflows in float32
    assert "at x = -100 (float32)" in result.reason


def test_bounded_loss_with_infinite_pair_optimum_fails():
    result = check.check_pair_optimum(losses.resolve(saturating))
    assert result.status == "fail" and "infinite already at p = 0.52" in result.reason


def test_a_wrong_declared_closed_form_fails():
    wrong = MarginLoss("wrong_form", losses.margin.logistic, {}, True, "test", lambda p: 2.0 * p - 1.0)
    result = check.check_pair_optimum(wrong)
    assert result.status == "fail" and "declared closed form" in result.reason


def test_a_new_sound_loss_passes_and_is_not_called_a_rescaled_builtin(tasks):
    report = check.run_checks(softsquare, beta=0.5, tasks=tasks, steps=STEPS)
    assert report.status == "pass", [f"{r.name}: {r.reason}" for r in report.results if r.status != "pass"]
    assert report.result("scale").facts["matches"] == []


# ---------------------------------------------------------------- the maths the checks rest on


@pytest.mark.parametrize("name, formula", [
    ("logistic", lambda p: scipy.special.logit(p)),  # DPO: Rafailov et al. 2023
    ("savage", lambda p: scipy.special.logit(p)),  # Tang et al. 2024
    ("squared", lambda p: 2 * p - 1),  # IPO: Azar et al. 2023
    ("truncated_quadratic", lambda p: 2 * p - 1),  # Tang et al. 2024
    ("exponential", lambda p: scipy.special.logit(p) / 2),  # Tang et al. 2024
])
def test_closed_form_pair_optima_match_the_numerical_minimiser(name, formula):
    loss = losses.resolve_margin(name)
    for p in (0.1, 0.3, 0.6, 0.75, 0.9):
        numeric = scipy.optimize.minimize_scalar(lambda x, p=p: float(loss.expected_pair_loss(x, p)),
                                                 bounds=(-20, 20), method="bounded", options={"xatol": 1e-10}).x
        assert numeric == pytest.approx(formula(p), abs=1e-5)
        assert loss.pair_optimum(p) == pytest.approx(formula(p), abs=1e-5)


def test_taylor_coefficients_and_gpo_ratio():
    # logistic: f'(0) = -sigmoid(0) = -1/2, f''(0) = sigmoid(0)^2 = 1/4 (derived by hand)
    result = check.check_taylor(losses.resolve_margin("logistic"), beta=0.5)
    assert result.facts["f1"] == pytest.approx(-0.5) and result.facts["f2"] == pytest.approx(0.25)
    assert result.facts["ratio"] == pytest.approx(0.5)
    # squared: f' = 2(x - 1), f'' = 2, ratio 1; so logistic at beta regularises like squared at
    # beta / 2 (Tang et al. 2024, the Taylor argument)
    assert result.facts["equivalent_beta"]["squared"] == pytest.approx(0.25)
    assert result.facts["equivalent_beta"]["hinge"] is None  # f''(0) = 0: no ratio


def test_fit_rescaled_recovers_a_known_rescaling():
    a, c, k, residual = check.fit_rescaled(losses.resolve(lambda x: 3.0 * F.softplus(-2.0 * x) + 1.0),
                                           losses.resolve_margin("logistic"))
    assert (a, c, k) == pytest.approx((2.0, 3.0, 1.0), rel=1e-6) and residual < 1e-9


def test_report_is_strict_json_after_json_ready():
    from polopt.training.run_folder import json_ready

    data = json.loads(json.dumps(json_ready(_static("logistic").to_dict()), allow_nan=False))
    assert data["status"] == "pass"
    # logistic has no finite optimum at p = 1 (Azar et al. 2023): +inf becomes null in JSON
    certainty = next(c for c in data["checks"] if c["name"] == "certainty")
    assert certainty["facts"]["optimum_at_1"] is None and certainty["facts"]["finite"] is False


# ---------------------------------------------------------------- the command


def _loss_module(tmp_path, monkeypatch, body: str) -> str:
    (tmp_path / "user_losses_for_check.py").write_text(textwrap.dedent(body), encoding="utf-8")
    monkeypatch.syspath_prepend(str(tmp_path))
    sys.modules.pop("user_losses_for_check", None)
    return "user_losses_for_check"


def test_cli_json_is_valid_and_carries_the_same_facts(capsys):
    rc = main(["check", "logistic", "--quick", "--json", "--no-plot"])
    out = capsys.readouterr().out
    data = json.loads(out)  # strict JSON: inf / nan are written as null
    assert rc == 0 and data["status"] == "pass" and data["loss"] == "logistic"
    direct = _static("logistic").to_dict()
    assert [c["name"] for c in data["checks"]] == [c["name"] for c in direct["checks"]]
    assert [c["reason"] for c in data["checks"]] == [c["reason"] for c in direct["checks"]]
    assert data["curve"]["optimum"][0] == pytest.approx(scipy.special.logit(0.02), abs=1e-9)


def test_cli_exit_code_and_reason_for_a_broken_user_loss(tmp_path, monkeypatch, capsys):
    module = _loss_module(tmp_path, monkeypatch, """
        import torch.nn.functional as F
        def flipped(x):
            return F.softplus(x)
    """)
    rc = main(["check", f"{module}:flipped", "--quick", "--no-plot"])
    out = capsys.readouterr().out
    assert rc == 1
    assert "signal" in out and "FAIL" in out and "rewards the loser" in out


def test_cli_population_and_plot(tmp_path, capsys):
    png = tmp_path / "report.png"
    rc = main(["check", "huber", "loss.delta=0.5", "--tasks", "noisy_labels", "train.steps=600",
               "--plot", str(png)])
    out = capsys.readouterr().out
    assert rc == 0 and "population:noisy_labels" in out and "PASS" in out
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, 5.2)


def test_cli_builds_tasks_from_the_task_configs():
    from omegaconf import OmegaConf

    from polopt.commands.check import check_tasks as _check_tasks
    from polopt.commands.train import CONFIG_DIR

    (name, task), = _check_tasks(["bradley_terry"])
    expected = OmegaConf.load(CONFIG_DIR / "task" / "bradley_terry.yaml")
    assert name == "bradley_terry" and task.n_responses == expected.n_responses


@pytest.mark.parametrize("argv, message", [
    (["check", "no_such_loss"], "polopt check: error: unknown loss 'no_such_loss'"),
    (["check", "logistic", "loss.delta=1"], "polopt check: error: loss=logistic has no key 'delta' (its keys: name, "
                                              "smoothing); delta belongs to loss=huber: choose it first"),
    (["check", "huber", "loss.width=3"], "polopt check: error: unknown key 'loss.width'; the keys under loss are: "
                                         "loss.delta, loss.name, loss.smoothing"),
    (["check", "huber", "+loss.width=3"], "polopt check: error: loss 'huber' got unknown parameter"),
    (["check", "logistic", "--tasks", "atlas"], "polopt check: error: --tasks: unknown task 'atlas'"),
    (["check", "logistic", "beta=-1"], "polopt check: error: beta must be a number > 0 (e.g. beta=0.1), got -1.0"),
    (["check", "logistic", "beta=0.1,0.3"], "polopt check: error: 'beta=0.1,0.3' is a list of values: polopt check "
                                            "takes one value a key"),
    (["check", "logistic", "train.steps=0"], "polopt check: error: train.steps must be a positive integer, got 0"),
    (["check", "logistic", "task=nontransitive"], "polopt check: error: polopt check reads loss, loss.KEY, beta, "
                                                  "train.steps, optim, optim.KEY only; 'task=nontransitive' would "
                                                  "change nothing here"),
])
def test_cli_user_errors_are_one_line_with_exit_code_2(argv, message, capsys):
    rc = main(argv)
    err = capsys.readouterr().err
    assert rc == 2 and err.startswith(message) and err.count("\n") == 1


def test_a_double_well_loss_manufactures_a_margin_at_p_one_half():
    # (x^2 - 1)^2 - x/2: at p = 1/2 the pair objective is (x^2 - 1)^2, minimised at +-1 (by hand)
    result = check.check_pair_optimum(losses.resolve(lambda x: (x**2 - 1) ** 2 - 0.5 * x))
    assert result.status == "fail" and "!= 0: a pair with no preference still gets a non-zero margin" in result.reason
    assert abs(result.facts["x_half"]) == pytest.approx(1.0, abs=1e-4)


def test_a_curve_that_decreases_in_p_fails():
    bent = MarginLoss("bent", losses.margin.logistic, {}, True, "test",
                lambda p: float(scipy.special.logit(p)) if p < 0.8 else 0.1 * float(scipy.special.logit(p)))
    result = check.check_pair_optimum(bent)
    assert result.status == "fail" and "x*(p) decreases in p (x*(0.78)" in result.reason


def test_a_constant_loss_has_no_signal_and_a_flat_pair_objective():
    report = _static(lambda x: 0.0 * x + 1.0)
    assert "no preference signal" in report.result("signal").reason
    assert "flat in the margin" in report.result("pair_optimum").reason
    assert report.result("scale").facts["matches"] == []  # c = 0 is no rescaled built-in
