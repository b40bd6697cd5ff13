"""``polopt reward task=pairs model=local_lm``: a Bradley–Terry head on a local causal LM's last hidden state
(polopt/pairfile/reward_lm.py, polopt/methods/lm_reward.py), and ``polopt evaluate`` scoring with it.

Tiny Llama-shaped models with a word tokenizer are built in the test (tests/helpers_local_lm.py). Checked
against things outside the code: the hidden state read by transformers' own call
(``output_hidden_states=True``, the last entry, at the row's last token, one unpadded row), the
Bradley–Terry log-likelihood ``log sigmoid(r_w - r_l)`` by scipy's ``log_expit`` and its gradient by the
closed form ``-(1 - sigmoid(m)) (h_w - h_l)`` (Bradley & Terry, Rank analysis of incomplete block designs,
1952), and pairs invented so that the winner is decidable (its last word).
"""

from __future__ import annotations

import json
import os
import random

import pytest
import torch

os.environ["HF_HUB_OFFLINE"] = "1"
transformers = pytest.importorskip("transformers")
scipy_special = pytest.importorskip("scipy.special")

from helpers_local_lm import WORDS, save_llama, write_pairs  # noqa: E402

from polopt.commands.main import main  # noqa: E402
from polopt.methods.lm_reward import load_lm_reward, new_head, pair_loss, text_scores  # noqa: E402

FILLER = [w for w in WORDS if w not in ("glows", "hums", "?", ".")]


def separable_rows(n: int, seed: int = 0) -> list[dict]:
    """Invented pairs whose winner always ends with "glows" and loser with "hums" (the rest random words)."""
    rng = random.Random(seed)
    words = lambda k: " ".join(rng.choice(FILLER) for _ in range(k))  # noqa: E731
    rows = [{"prompt": words(3), "winner": f"{words(2)} glows", "loser": f"{words(2)} hums"} for _ in range(n)]
    rows[0] = {"prompt": [{"role": "user", "content": words(3)}], "winner": f"{words(2)} glows",
               "loser": f"{words(2)} hums"}  # a chat row, rendered by the tokenizer's chat template
    return rows


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    folder = tmp_path_factory.mktemp("lmreward")
    model = save_llama(folder / "model", seed=1)
    pairs = write_pairs(folder / "pairs.jsonl", separable_rows(60))
    out = folder / "rm"
    assert main(["reward", "task=pairs", f"task.path={pairs}", "model=local_lm", f"model.path={model}",
                 "reward.heldout=0.25", "reward.steps=300", "reward.lr=0.05", f"hydra.run.dir={out}"]) == 0
    return {"model": model, "pairs": pairs, "out": out, "summary": json.loads((out / "summary.json").read_text())}


def test_the_head_separates_pairs_whose_winner_is_decidable(fitted):
    summary = fitted["summary"]
    assert (summary["kind"], summary["body"], summary["fitted_pairs"], summary["heldout_pairs"]) == \
        ("local_lm", "frozen", 45, 15)
    assert summary["head_parameters"] == 32 + 1  # hidden width 32, one bias
    assert summary["heldout_accuracy"] >= 0.9
    assert summary["fit_loss_last"] < summary["fit_loss_first"]
    assert summary["rows_in"] == summary["rows_accepted"] + summary["rows_rejected"] == 60


def direct_score(model, tokenizer, weight, bias, prompt, response) -> float:
    """``w . h + b`` with h the last entry of transformers' ``hidden_states`` at the row's last token, by the
    token convention written out (plain: ``tokenizer(prompt)``, response ids and the end token; chat: the
    template's prompt text with the generation prompt, then what the full text adds)."""
    if isinstance(prompt, str):
        ids = tokenizer(prompt).input_ids + tokenizer(response, add_special_tokens=False).input_ids + \
            [tokenizer.eos_token_id]
    else:
        head = tokenizer.apply_chat_template(prompt, add_generation_prompt=True, tokenize=False)
        full = tokenizer.apply_chat_template(prompt + [{"role": "assistant", "content": response}], tokenize=False)
        ids = tokenizer(head, add_special_tokens=False).input_ids + \
            tokenizer(full[len(head):], add_special_tokens=False).input_ids
    with torch.no_grad():
        hidden = model(torch.tensor([ids]), output_hidden_states=True).hidden_states[-1][0, -1]  # (H,)
    return float(hidden @ weight + bias)


def test_the_saved_file_reloads_and_scores_as_transformers_computes(fitted):
    rows = [json.loads(line) for line in fitted["pairs"].read_text().splitlines()[:6]]
    reward, tokenizer, context = load_lm_reward(fitted["out"] / "reward.pt")
    assert context == 64  # the model's own maximum of positions (save_llama)
    prompts = [r["prompt"] for r in rows] * 2
    responses = [r["winner"] for r in rows] + [r["loser"] for r in rows]
    scores, cut = text_scores(reward, tokenizer, context, prompts, responses)
    data = torch.load(fitted["out"] / "reward.pt", weights_only=True)
    weight, bias = data["state"]["head"]["weight"][0], data["state"]["head"]["bias"][0]
    model = transformers.AutoModelForCausalLM.from_pretrained(fitted["model"]).eval()
    plain = transformers.AutoTokenizer.from_pretrained(fitted["model"])
    want = [direct_score(model, plain, weight, bias, x, y) for x, y in zip(prompts, responses, strict=True)]
    assert scores == pytest.approx(want, abs=1e-4)
    assert cut == []
    assert all(w > lo for w, lo in zip(scores[:6], scores[6:], strict=True))  # the fitted rows' winners score higher
    again, _ = text_scores(load_lm_reward(fitted["out"] / "reward.pt")[0], tokenizer, context, prompts, responses)
    assert again == scores


def test_the_bradley_terry_gradient_is_the_closed_form():
    """d/dw of -mean log sigmoid(w . (h_w - h_l)) = -mean (1 - sigmoid(m)) (h_w - h_l) (Bradley & Terry 1952);
    the value by scipy's log_expit."""
    generator = torch.Generator().manual_seed(0)
    winner, loser = torch.randn(7, 5, generator=generator, dtype=torch.float64), \
        torch.randn(7, 5, generator=generator, dtype=torch.float64)
    head = new_head(5, seed=3).double()
    for l2 in (0.0, 0.3):
        head.zero_grad()
        loss = pair_loss(head, winner, loser, l2=l2)
        loss.backward()
        diff = (winner - loser).numpy()  # (7, 5)
        w = head.weight.detach()[0].numpy()
        margin = diff @ w  # (7,): the bias cancels
        assert float(loss.detach()) == pytest.approx(-scipy_special.log_expit(margin).mean() + 0.5 * l2 * (w**2).sum(),
                                            rel=1e-12)
        want = -((1 - scipy_special.expit(margin))[:, None] * diff).mean(axis=0) + l2 * w
        assert head.weight.grad[0].numpy() == pytest.approx(want, rel=1e-10, abs=1e-12)
        assert float(head.bias.grad[0]) == pytest.approx(0.0, abs=1e-12)


def test_evaluate_scores_with_it(fitted, tmp_path):
    run = tmp_path / "run"
    run.mkdir()
    (run / "config.yaml").write_text(f"model:\n  kind: local_lm\n  path: {fitted['model']}\ntrain:\n  seed: 2\n")
    transformers.AutoModelForCausalLM.from_pretrained(fitted["model"]).save_pretrained(run / "policy")
    prompts = tmp_path / "prompts.jsonl"
    prompts.write_text('{"prompt": "where is the kettle"}\n{"prompt": [{"role": "user", "content": "the river"}]}\n')
    assert main(["evaluate", str(run), f"evaluate.prompts={prompts}", f"evaluate.reward={fitted['out'] / 'reward.pt'}",
                 "evaluate.max_new_tokens=3", f"hydra.run.dir={tmp_path / 'ev'}"]) == 0
    rows = [json.loads(line) for line in (tmp_path / "ev" / "evaluations.jsonl").read_text().splitlines()]
    reward, tokenizer, context = load_lm_reward(fitted["out"] / "reward.pt")
    for which in ("policy", "reference"):
        want, _ = text_scores(reward, tokenizer, context, [r["prompt"] for r in rows], [r[which] for r in rows])
        assert [r[f"{which}_score"] for r in rows] == pytest.approx(want, abs=1e-6)


def one_line(capsys, args) -> str:
    code = main(args)
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and "Traceback" not in err, err
    return err


def test_bad_input_is_one_line(fitted, tmp_path, capsys):
    base = ["reward", "task=pairs", f"task.path={fitted['pairs']}", "model=local_lm", f"model.path={fitted['model']}",
            f"hydra.run.dir={tmp_path / 'r'}"]
    assert "model.adapter and model.lora.* are not read; got model.adapter='lora'" in \
        one_line(capsys, [*base, "model.adapter=lora"])
    assert "task.reference_checkpoint is not read by polopt reward" in \
        one_line(capsys, [*base, f"task.reference_checkpoint={fitted['model']}"])
    assert "no config.json" in one_line(capsys, [*base[:4], f"model.path={tmp_path}", base[-1]])
    # the same folder with other weights: the head was fitted on the old ones
    moved = save_llama(tmp_path / "moved", seed=9)
    stale = tmp_path / "stale.pt"
    data = torch.load(fitted["out"] / "reward.pt", weights_only=True)
    torch.save({**data, "identity": {**data["identity"], "model": str(moved)}}, stale)
    with pytest.raises(ValueError, match=r"evaluate.reward: .*stale.pt was fitted for weights '[0-9a-f]+', but this "
                                         r"run has '[0-9a-f]+'"):
        load_lm_reward(stale)
    with pytest.raises(ValueError, match=r"task=pairs fits a scalar head on the tiny transformer or on model=local_lm; "
                                         r"model=tabular cannot"):
        from polopt.pairfile.task import pair_task

        pair_task(str(fitted["pairs"])).fit_reward(mode="sampled", n_pairs=None, seed=0, model={"kind": "tabular"})
