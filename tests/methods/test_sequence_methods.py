"""Realignment and the methods beyond the offline losses on the enumerable sequence task.

Checks against: the chain rule of probability (a distribution over a complete
prefix tree is the product of its next-token conditionals; per-token
distributions sum to 1); the identities lambda = 0 -> the reference and
lambda = 1 -> the trained policy (Liu et al., Decoding-time Realignment of
Language Models, 2024); the invariance of log-softmax to a per-row constant
(torch's log_softmax); the optimum re-solved at beta / lambda by toy_tasks.exact.margin
(closed forms of Rafailov et al. 2023 and Azar et al. 2023), with
h*(beta / lambda) = lambda h*(beta) derived from the population loss depending
on h only through beta h; hand-derived per-token mixtures on a three-response
tree; and each method's exact target (pi_ref e^{r / beta}; the Nash equilibrium
of toy_tasks.methods.equilibrium; the exact best-of-n distribution of toy_tasks.methods.best_of_n).
"""

import json

import numpy as np
import pytest
import torch
from hydra import compose, initialize_config_dir

from polopt import losses
from polopt.commands.main import main
from polopt.commands.train import CONFIG_DIR, run
from polopt.methods.realign import equivalent_beta, realign, realigned_sequence_logprobs
from polopt.models.logprobs import sequence_logprobs
from polopt.models.transformer import TinyTransformer
from toy_tasks.exact.margin import solve
from toy_tasks.measures import total_variation
from toy_tasks.sequence.methods import per_token_mixture, tree_conditionals
from toy_tasks.sequence.task import enumerate_responses, sequence_task

TINY = dict(n_symbols=2, max_length=3, n_prompts=2, reference_width=16, reference_layers=1, reference_heads=2,
            reference_sharpness=10.0, seed=0)  # 15 responses per prompt
MODEL = dict(width=16, layers=1, heads=2, context=4)
TINY_OVERRIDES = ["+experiment=sequence", *[f"task.{k}={v}" for k, v in TINY.items()],
                  *[f"model.{k}={v}" for k, v in MODEL.items()], "train.progress=false", "train.log_every=50",
                  "optim.lr=0.01", "optim.warmup_steps=10"]


@pytest.fixture(scope="module")
def task():
    return sequence_task(**TINY)


def other_model(task, seed=3):
    """A policy model of the reference's shape with other weights (scaled, so it differs clearly)."""
    model = TinyTransformer(task.vocab.size, output_size=task.vocab.output_size, context=4, width=16, layers=1,
                            heads=2, seed=seed).double()
    with torch.no_grad():
        model.head.weight.mul_(20.0)
    return model


def optimum_policy(finite, loss, beta):
    opt = solve(loss, finite.win_weights(), beta=beta, rewards=finite.rewards, sampling=finite.sampling,
                preference=finite.preference, population=True)
    return finite.policy_from_logratios(opt.logratios)


# ---------------------------------------------------------------- per-token mixing of two models


def test_per_token_mixing_at_zero_and_one_is_reference_and_policy(task):
    prompt, response = task.all_rows()
    model, pad = other_model(task), task.vocab.pad_id
    with torch.no_grad():
        ref = sequence_logprobs(task.reference_model, prompt, response, pad_id=pad)
        pol = sequence_logprobs(model, prompt, response, pad_id=pad)
        at0 = realigned_sequence_logprobs(task.reference_model, model, prompt, response, 0.0, pad_id=pad)
        at1 = realigned_sequence_logprobs(task.reference_model, model, prompt, response, 1.0, pad_id=pad)
    assert float((ref - pol).abs().max()) > 0.5  # the two models really differ
    torch.testing.assert_close(at0, ref, atol=1e-12, rtol=0)
    torch.testing.assert_close(at1, pol, atol=1e-12, rtol=0)


@pytest.mark.parametrize("lam", [0.25, 0.5, 2.0, 4.0])
def test_per_token_mixture_is_normalised(task, lam):
    # every token's mixture sums to 1 over the output vocabulary, hence (chain rule over a
    # complete prefix tree) the sequences of each prompt sum to 1
    generator = torch.Generator().manual_seed(1)
    ref, pol = torch.randn(2, 6, 4, 3, generator=generator, dtype=torch.float64)
    torch.testing.assert_close(realign(ref, pol, lam).exp().sum(-1), torch.ones(6, 4, dtype=torch.float64))
    prompt, response = task.all_rows()
    with torch.no_grad():
        logp = realigned_sequence_logprobs(task.reference_model, other_model(task), prompt, response, lam,
                                           pad_id=task.vocab.pad_id)
    np.testing.assert_allclose(logp.exp().reshape(2, -1).sum(1).numpy(), 1.0, atol=1e-12)


def test_logits_or_logprobs_mix_alike():
    # log_softmax removes a per-row constant, so raw logits and log-probabilities give one mixture
    generator = torch.Generator().manual_seed(2)
    ref, pol = torch.randn(2, 5, 7, generator=generator, dtype=torch.float64)
    torch.testing.assert_close(realign(ref, pol, 2.5), realign(torch.log_softmax(ref, -1),
                                                               torch.log_softmax(pol, -1), 2.5))


def test_tree_conditionals_of_a_model_are_its_next_token_distributions(task):
    # per-token mixing from the two sequence-level distributions (chain rule read backwards)
    # equals mixing the models' logits directly: two independent computations
    prompt, response = task.all_rows()
    model, pad = other_model(task), task.vocab.pad_id
    with torch.no_grad():
        ref = sequence_logprobs(task.reference_model, prompt, response, pad_id=pad).reshape(2, -1).numpy()
        pol = sequence_logprobs(model, prompt, response, pad_id=pad).reshape(2, -1).numpy()
        direct = realigned_sequence_logprobs(task.reference_model, model, prompt, response, 3.0, pad_id=pad)
    via_tree = per_token_mixture(ref, pol, task.responses, task.vocab.output_size, 3.0)
    np.testing.assert_allclose(via_tree, direct.reshape(2, -1).numpy(), atol=1e-10)


def test_hand_derived_three_response_tree():
    # one symbol a (id 0), end token (id 1), at most 2 symbols: responses <end>, a <end>, a a.
    # Derived by hand: first token mixes [p(<end>), p(a ...)]; after a, [p(a <end>|a), p(a a|a)].
    responses = enumerate_responses(1, 2)
    assert responses == [(1,), (0, 1), (0, 0)]
    ref = np.array([[0.5, 0.25, 0.25]])
    pol = np.array([[0.2, 0.2, 0.6]])
    lam = 2.0
    first = np.array([0.5 ** (1 - lam) * 0.2**lam, 0.5 ** (1 - lam) * 0.8**lam])
    first /= first.sum()
    second = np.array([0.5 ** (1 - lam) * 0.25**lam, 0.5 ** (1 - lam) * 0.75**lam])
    second /= second.sum()
    expected = np.array([first[0], first[1] * second[0], first[1] * second[1]])
    got = np.exp(per_token_mixture(np.log(ref), np.log(pol), responses, 2, lam))[0]
    np.testing.assert_allclose(got, expected, atol=1e-14)
    geometric = ref[0] ** (1 - lam) * pol[0] ** lam
    geometric /= geometric.sum()
    assert np.abs(got - geometric).sum() > 0.01  # 0.0224 by the same hand formulas: not the sequence-level mixture
    conditionals, index = tree_conditionals(np.log(ref), responses, 2)
    np.testing.assert_allclose(np.exp(conditionals[index[(0,)], 0]), [0.5, 0.5], atol=1e-15)


# ---------------------------------------------------------------- against the optimum at beta / lambda


@pytest.mark.parametrize(("loss", "preference"), [("logistic", "bradley_terry"), ("squared", "nontransitive")])
@pytest.mark.parametrize("lam", [0.25, 0.5, 2.0, 4.0])
def test_geometric_mixture_of_the_optimum_is_the_optimum_at_beta_over_lambda(loss, preference, lam):
    finite = sequence_task(**{**TINY, "preference": preference}).finite_task()
    beta, f = 0.5, losses.resolve_margin(loss)
    trained = torch.as_tensor(np.log(optimum_policy(finite, f, beta)))
    pi = realign(torch.as_tensor(np.log(finite.reference)), trained, lam).exp().numpy()
    target = optimum_policy(finite, f, equivalent_beta(beta, lam))
    assert total_variation(pi, target, finite.prompt_weights) < 1e-8


def test_per_token_mixing_of_the_optimum_is_not_the_optimum_at_beta_over_lambda(task):
    # exact at lambda = 1 only: the per-token normalisers differ from the sequence-level one
    finite, f, beta = task.finite_task(), losses.resolve_margin("logistic"), 0.5
    exact = np.log(optimum_policy(finite, f, beta))
    errors = {}
    for lam in (0.5, 1.0, 2.0):
        pi = np.exp(per_token_mixture(np.log(finite.reference), exact, task.responses, task.vocab.output_size, lam))
        errors[lam] = total_variation(pi, optimum_policy(finite, f, beta / lam), finite.prompt_weights)
    assert errors[1.0] < 1e-12
    assert errors[0.5] > 1e-4 and errors[2.0] > 1e-4


# ---------------------------------------------------------------- runs


def _run(tmp_path, *overrides):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        cfg = compose("config", overrides=[*TINY_OVERRIDES, *overrides])
    return run(cfg, tmp_path)


def test_offline_run_reports_per_token_realignment(tmp_path):
    summary = _run(tmp_path, "loss=logistic", "train.steps=150", "method.realign=[0,0.5,1,2]")
    entries = {e["lambda"]: e for e in summary["realigned"]}
    np.testing.assert_allclose(entries[0.0]["per_token_policy"], summary["reference"], atol=1e-6)
    np.testing.assert_allclose(entries[1.0]["per_token_policy"], summary["policy"], atol=1e-6)
    for e in entries.values():
        np.testing.assert_allclose(e["per_token_mass"], 1.0, atol=1e-6)
    assert entries[1.0]["per_token_exact_tv_to_optimum"] < 1e-12
    assert entries[2.0]["per_token_exact_tv_to_optimum"] > 1e-4
    assert entries[1.0]["tv_to_optimum"] == pytest.approx(summary["tv_to_optimum"], abs=1e-9)


@pytest.mark.parametrize(("method", "steps", "bound"), [("rl", 200, 0.03), ("best_of_n", 200, 0.03),
                                                         ("selfplay", 200, 0.05)])
def test_each_method_trains_the_transformer_towards_its_target(tmp_path, method, steps, bound):
    overrides = [f"method={method}", f"train.steps={steps}"]
    if method == "selfplay":
        overrides.append("task.preference=nontransitive")
    summary = _run(tmp_path, *overrides)
    history = [json.loads(line) for line in (tmp_path / "metrics.jsonl").read_text().splitlines()]
    assert history[0]["tv_to_optimum"] > 2 * summary["tv_to_optimum"]  # it moved towards the target
    assert summary["tv_to_optimum"] < bound
    assert summary["task"] == "sequence" and summary["method"] == method
    assert len(summary["policy"][0]) == 15
    np.testing.assert_allclose(np.sum(summary["optimum"], axis=1), 1.0, atol=1e-9)


def test_realign_command_writes_table_and_plot(tmp_path, capsys):
    out = tmp_path / "sweep"
    code = main(["realign", *TINY_OVERRIDES, "loss=logistic", "train.steps=100", "--lambdas", "0.5,1,2",
                 f"hydra.run.dir={out}", "--quiet"])
    assert code == 0
    result = json.loads((out / "realign.json").read_text())
    rows = {r["lambda"]: r for r in result["rows"]}
    assert set(rows) == {0.5, 1.0, 2.0}
    assert rows[1.0]["tv_per_token_to_retrained"] < 1e-5  # lambda = 1 is the trained policy itself
    assert rows[2.0]["beta_equivalent"] == pytest.approx(0.25)
    assert all(rows[lam]["tv_retrained"] is not None for lam in rows)
    assert (out / "realign.png").stat().st_size > 0 and (out / "beta_over_2").is_dir()
    assert "per_token" in capsys.readouterr().out


def test_realign_command_refuses_bad_lambdas(capsys):
    assert main(["realign", "--lambdas", "0.5,-1"]) == 2
    assert "polopt realign: error: --lambdas must be a comma list of finite numbers >= 0" in capsys.readouterr().err


def test_compare_runs_methods_on_the_sequence_task(tmp_path):
    out = tmp_path / "cmp"
    assert main(["compare", *TINY_OVERRIDES, "train.steps=30", "method=offline,rl,best_of_n", f"hydra.run.dir={out}",
                 "--quiet"]) == 0
    result = json.loads((out / "comparison.json").read_text())
    assert [r["method"] for r in result["rows"]] == ["offline", "rl", "best_of_n"]
    assert result["task"] == "sequence"
    assert all(r["tv_to_optimum"] is not None and r["kl_to_reference"] is not None for r in result["rows"])
    assert "is a distribution over 15 responses per prompt" in result["notes"][0]  # not 30 numbers in a note


def test_realign_command_on_a_finite_task_has_no_per_token_rows(tmp_path):
    # finite tasks: the sequence-level mixture is exact (Liu et al. 2024), per-token mixing does not apply
    out = tmp_path / "finite"
    assert main(["realign", "task=contextual", "train.steps=600", "train.progress=false", "--lambdas", "0.5,2",
                 f"hydra.run.dir={out}", "--quiet"]) == 0
    rows = json.loads((out / "realign.json").read_text())["rows"]
    assert all(r["tv_geometric"] < 1e-3 and r["tv_per_token"] is None for r in rows)
    assert all(r["tv_retrained"] < 1e-3 and r["tv_geometric_to_retrained"] < 2e-3 for r in rows)
