"""``polopt evaluate RUN``: a model=local_lm run's policy against its reference on held-out prompts
(polopt/commands/evaluate.py, polopt/models/run_policy.py, polopt/models/generation.py,
polopt/methods/scorers.py).

Run folders are faked as a finished run leaves them: ``config.yaml`` and ``policy/`` written by
``save_pretrained`` (a whole model, or a peft LoRA adapter over the run's ``model.path``), with a tiny
Llama-shaped model and a word-level tokenizer with a chat template built in the test
(tests/helpers_chat_lm.py). Checked against things outside the command: the win-rate and its
Wilson interval recomputed from evaluations.jsonl by Wilson's formula (Wilson, Probable inference,
the law of succession, and statistical inference, JASA 22, 1927), a hand-worked interval, the
responses reproduced by transformers' and peft's own loading and ``generate``, and models built so
that the outcome is certain.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import pytest
import torch

os.environ["HF_HUB_OFFLINE"] = "1"
transformers = pytest.importorskip("transformers")
peft = pytest.importorskip("peft")

import helpers_chat_lm as chat  # noqa: E402

from polopt.commands.main import main  # noqa: E402
from polopt.demo.winrates import win_rate_interval  # noqa: E402
from polopt.models.generation import generation_settings, prompt_ids  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
PROMPTS = ["the amber brook ?", "a cedar by the dune", [{"role": "user", "content": "the fern is north ?"}],
           "kestrel", [{"role": "system", "content": "loom"}, {"role": "user", "content": "the grove ?"}],
           "harbor isle", "the meadow is", "ember juniper ."]


def wilson(wins: int, n: int, z: float = 1.959963984540054) -> tuple[float, float]:
    """Wilson's score interval written out (Wilson 1927); z: the 97.5% normal quantile."""
    p = wins / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z / (1 + z * z / n) * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return centre - half, centre + half


def write_prompts(path: Path, prompts=PROMPTS) -> Path:
    path.write_text("".join(json.dumps({"prompt": p}) + "\n" for p in prompts))
    return path


def fake_run(run: Path, base: Path, policy, *, seed: int = 3, with_tokenizer: bool = True) -> Path:
    """A finished local_lm run: config.yaml (as polopt train writes it) and policy/ by save_pretrained."""
    run.mkdir(parents=True)
    (run / "config.yaml").write_text(f"model:\n  kind: local_lm\n  path: {base}\ntrain:\n  seed: {seed}\n")
    policy.save_pretrained(run / "policy")
    if with_tokenizer:
        chat.tokenizer().save_pretrained(run / "policy")
    return run


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> Path:
    return chat.save(chat.llama(0), tmp_path_factory.mktemp("base"))


@pytest.fixture(scope="module")
def full_run(tmp_path_factory, base) -> Path:
    policy = chat.llama(0)
    with torch.no_grad():
        for p in policy.parameters():
            p.add_(0.5 * torch.randn_like(p))  # a policy that moved away from its reference
    return fake_run(tmp_path_factory.mktemp("full") / "run", base, policy)


@pytest.fixture(scope="module")
def lora_run(tmp_path_factory, base) -> Path:
    torch.manual_seed(1)
    config = peft.LoraConfig(r=4, lora_alpha=8, target_modules=["q_proj", "v_proj"], init_lora_weights=False)
    adapted = peft.get_peft_model(transformers.AutoModelForCausalLM.from_pretrained(base), config)
    return fake_run(tmp_path_factory.mktemp("lora") / "run", base, adapted)  # the tokenizer beside the adapter


def read_rows(folder: Path) -> list[dict]:
    return [json.loads(line) for line in (folder / "evaluations.jsonl").read_text().splitlines()]


def one_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    return err[0]


# ---------------------------------------------------------------- the figures


def test_the_win_rate_is_the_share_of_wins_in_the_table(full_run, tmp_path, capsys):
    prompts = write_prompts(tmp_path / "prompts.jsonl")
    out = tmp_path / "out"
    assert main(["evaluate", str(full_run), f"evaluate.prompts={prompts}", "evaluate.scorer=user_scorers:hashed",
                 "evaluate.max_new_tokens=6", f"hydra.run.dir={out}"]) == 0
    figures = json.loads((out / "evaluation.json").read_text())
    rows = read_rows(out)
    assert len(rows) == figures["comparisons"] == len(PROMPTS)
    assert [r["row"] for r in rows] == list(range(1, 9))  # JSON Lines: line numbers
    wins = sum(r["policy_score"] > r["reference_score"] for r in rows)
    defeats = sum(r["policy_score"] < r["reference_score"] for r in rows)
    assert (figures["wins"], figures["defeats"], figures["ties"]) == (wins, defeats, len(rows) - wins - defeats)
    assert wins + defeats > 0
    assert figures["win_rate"] == pytest.approx(wins / (wins + defeats))
    assert figures["win_rate_ci"] == pytest.approx(wilson(wins, wins + defeats), abs=1e-9)
    for which in ("policy", "reference"):
        assert figures[f"mean_length_{which}"] == pytest.approx(sum(r[f"{which}_tokens"] for r in rows) / len(rows))
        assert all(1 <= r[f"{which}_tokens"] <= 6 for r in rows)
    assert [r["outcome"] for r in rows] == ["win" if r["policy_score"] > r["reference_score"] else "defeat"
                                           if r["policy_score"] < r["reference_score"] else "tie" for r in rows]
    assert figures["seed"] == 3  # the run's train.seed
    assert not (full_run / "evaluations.jsonl").exists()  # hydra.run.dir chosen: the run folder is left alone
    assert "win-rate over the reference" in capsys.readouterr().out


def test_wilson_interval_worked_by_hand():
    # 7 wins of 10, 95%: p = 0.7, z^2 = 3.8415; centre (0.7 + 0.19207) / 1.38415 = 0.64449,
    # half-width 1.95996 / 1.38415 * sqrt(0.021 + 0.0096036) = 0.24772 -> [0.3968, 0.8922]
    assert win_rate_interval(7, 10) == pytest.approx((0.3968, 0.8922), abs=1e-4)


def test_a_scorer_that_prefers_longer_text_gives_the_expected_sign(tmp_path, base):
    # hidden states made constant, so the next-token distribution is the same at every step: the
    # reference puts nearly all mass on the end token (every response is just it, length 1), the policy
    # none on it or on any special token (every response runs to max_new_tokens words); the reference's own
    # generation settings, which ask for at least 4 new tokens, are not what sampling from it means
    reference, policy = chat.llama(2), chat.llama(2)
    for model, end in ((reference, 8.0), (policy, -8.0)):
        state = chat.constant_state(model)
        chat.set_logits(model, state, [0, 1, 2, 3] if end < 0 else [3], end)
    reference.generation_config.min_new_tokens = 4  # saved in generation_config.json: evaluate sets it aside
    folder = chat.save(reference, tmp_path / "reference")
    run = fake_run(tmp_path / "run", folder, policy, with_tokenizer=False)  # the base model's tokenizer then
    prompts = write_prompts(tmp_path / "prompts.jsonl")
    for scorer, rate in (("longer", 1.0), ("shorter", 0.0)):
        out = tmp_path / scorer
        assert main(["evaluate", str(run), f"evaluate.prompts={prompts}", f"evaluate.scorer=user_scorers:{scorer}",
                     "evaluate.max_new_tokens=5", "evaluate.n=6", f"hydra.run.dir={out}"]) == 0
        figures = json.loads((out / "evaluation.json").read_text())
        assert figures["win_rate"] == rate and figures["ties"] == 0 and figures["comparisons"] == 6
        assert figures["mean_length_policy"] == 5 and figures["mean_length_reference"] == 1
        assert figures["ended_share_policy"] == 0 and figures["ended_share_reference"] == 1


def test_a_lora_run_samples_what_peft_and_transformers_give(lora_run, base, tmp_path):
    # the policy: peft.PeftModel.from_pretrained(base, RUN/policy); the reference: the base model; both
    # through transformers' generate from torch.manual_seed(seed), as the module docstring states
    prompts = write_prompts(tmp_path / "prompts.jsonl")
    assert main(["evaluate", str(lora_run), f"evaluate.prompts={prompts}", "evaluate.scorer=user_scorers:longer",
                 "evaluate.max_new_tokens=7", "train.seed=11"]) == 0
    rows = read_rows(lora_run)  # no hydra.run.dir: beside the run's files
    assert json.loads((lora_run / "evaluation.json").read_text())["adapter"] is True
    tok = transformers.AutoTokenizer.from_pretrained(base)
    batch = tok.pad({"input_ids": [prompt_ids(tok, p) for p in PROMPTS]}, padding_side="left", return_tensors="pt")
    settings = generation_settings(tok, 7)
    plain = transformers.AutoModelForCausalLM.from_pretrained(base).eval()
    adapted = peft.PeftModel.from_pretrained(transformers.AutoModelForCausalLM.from_pretrained(base),
                                             str(lora_run / "policy")).eval()
    for which, model in (("policy", adapted), ("reference", plain)):
        torch.manual_seed(11)
        drawn = model.generate(**batch, generation_config=settings)[:, batch["input_ids"].shape[1]:]
        for row, ids in zip(rows, drawn.tolist(), strict=True):
            ids = ids[: ids.index(3) + 1] if 3 in ids else ids  # up to the end token (id 3)
            assert row[which] == tok.decode(ids, skip_special_tokens=True)
            assert row[f"{which}_tokens"] == len(ids)
    assert any(r["policy"] != r["reference"] for r in rows)  # the adapter changes what is drawn


def test_chat_prompts_are_rendered_with_the_generation_prompt():
    tok = chat.tokenizer()
    messages = [{"role": "user", "content": "the fern ?"}]
    want = tok("<user> the fern ? <eos> <assistant>", add_special_tokens=False)["input_ids"]  # by the template
    assert prompt_ids(tok, messages) == want
    assert prompt_ids(tok, "the fern ?") == [2, *tok("the fern ?", add_special_tokens=False)["input_ids"]]  # <bos>


# ---------------------------------------------------------------- bad input: one line, exit 2


def test_a_run_without_policy_is_one_line(tmp_path, capsys):
    run = tmp_path / "run"
    run.mkdir()
    (run / "config.yaml").write_text("model:\n  kind: local_lm\n  path: nowhere\n")
    prompts = write_prompts(tmp_path / "prompts.jsonl")
    assert main(["evaluate", str(run), f"evaluate.prompts={prompts}", "evaluate.scorer=user_scorers:longer"]) == 2
    assert one_line(capsys) == (f"polopt evaluate: error: '{run}' has no policy/ folder: a model=local_lm run writes "
                                "its trained policy there with save_pretrained when training ends; was the run "
                                "interrupted?")


def test_a_base_model_that_is_not_there_is_one_line(full_run, tmp_path, capsys):
    run = tmp_path / "run"
    run.mkdir()
    (run / "policy").symlink_to(full_run / "policy")
    (run / "config.yaml").write_text("model:\n  kind: local_lm\n  path: elsewhere/model\n")
    prompts = write_prompts(tmp_path / "prompts.jsonl")
    assert main(["evaluate", str(run), f"evaluate.prompts={prompts}", "evaluate.scorer=user_scorers:longer"]) == 2
    assert one_line(capsys) == (f"polopt evaluate: error: '{run / 'config.yaml'}' names model.path 'elsewhere/model', "
                                "which is not a folder here (a relative path is read from the folder polopt evaluate "
                                "runs in): run it from the folder the run was trained in")


@pytest.mark.parametrize("args, message", [
    (["evaluate.nn=3"], "unknown key 'evaluate.nn'; did you mean evaluate.n?"),
    (["train.steps=5"], "polopt evaluate reads train.seed, evaluate.KEY only; 'train.steps=5' would change nothing "
                        "here"),
    (["evaluate.n=0"], "evaluate.n must be an integer >= 1 or null (all), got 0"),
    (["evaluate.scorer=user_scorers:one_argument"],
     "evaluate.scorer 'user_scorers:one_argument' must be a function of (prompt, response) -> float; it takes "
     "(response)"),
    (["evaluate.scorer=user_scorers:nothing"],
     "evaluate.scorer 'user_scorers:nothing': module 'user_scorers' has no attribute 'nothing'"),
    (["evaluate.reward=r.pt"], "polopt evaluate needs exactly one of evaluate.scorer=pkg.module:fn (a function of "
                               "(prompt, response) -> float) and evaluate.reward=PATH (a reward.pt of polopt reward "
                               "task=pairs); both was given"),
])
def test_bad_keys_are_one_line(args, message, full_run, tmp_path, capsys):
    prompts = write_prompts(tmp_path / "prompts.jsonl")
    scorer = [] if any(a.startswith("evaluate.scorer") for a in args) else ["evaluate.scorer=user_scorers:longer"]
    assert main(["evaluate", str(full_run), f"evaluate.prompts={prompts}", *scorer, *args]) == 2
    assert one_line(capsys) == f"polopt evaluate: error: {message}"


def test_a_score_that_is_not_a_number_is_one_line(full_run, tmp_path, capsys):
    prompts = write_prompts(tmp_path / "prompts.jsonl")
    argv = ["evaluate", str(full_run), f"evaluate.prompts={prompts}", "evaluate.scorer=user_scorers:not_a_number",
            "evaluate.n=1", "evaluate.max_new_tokens=2", f"hydra.run.dir={tmp_path / 'out'}"]
    assert main(argv) == 2
    assert one_line(capsys) == ("polopt evaluate: error: evaluate.scorer 'user_scorers:not_a_number' must return a "
                                "real number; for prompt 0 it returned str 'high'")
    assert not (tmp_path / "out").exists()


def test_bad_prompt_files_are_one_line(full_run, tmp_path, capsys):
    argv = ["evaluate", str(full_run), "evaluate.scorer=user_scorers:longer"]
    assert main([*argv, f"evaluate.prompts={write_prompts(tmp_path / 'a.jsonl', ['kestrel', 5])}"]) == 2
    assert one_line(capsys).endswith("line 2: a prompt must be non-empty text or a list of {role, content} messages, "
                                     "got 5")
    (tmp_path / "b.jsonl").write_text(json.dumps({"question": "x"}) + "\n")
    assert main([*argv, f"evaluate.prompts={tmp_path / 'b.jsonl'}"]) == 2
    assert "missing column(s) prompt" in one_line(capsys)
    assert main([*argv]) == 2
    assert one_line(capsys) == ("polopt evaluate: error: polopt evaluate needs evaluate.prompts=FILE, held-out prompts "
                                "(JSONL, CSV or Parquet with a prompt column)")


def test_a_run_of_another_model_is_one_line(tmp_path, capsys):
    run = tmp_path / "run"
    run.mkdir()
    (run / "config.yaml").write_text("model:\n  kind: transformer\n")
    prompts = write_prompts(tmp_path / "prompts.jsonl")
    assert main(["evaluate", str(run), f"evaluate.prompts={prompts}", "evaluate.scorer=user_scorers:longer"]) == 2
    assert "was trained with model=transformer; polopt evaluate samples from the policy/ folder of a model=local_lm " \
           "run" in one_line(capsys)


def test_help_imports_no_torch():
    script = ("import contextlib, io, sys\nfrom polopt.commands.main import main\n"
              "with contextlib.redirect_stdout(io.StringIO()):\n    try:\n        main(['evaluate', '--help'])\n"
              "    except SystemExit:\n        pass\nprint('torch' in sys.modules)\n")
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, cwd=ROOT, timeout=120,
                         env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip().splitlines()[-1] == "False"


def test_a_target_outside_the_task_packages_is_refused_and_nothing_made(full_run, tmp_path, capsys):
    marker = tmp_path / "made_by_target"
    out = tmp_path / "out"
    assert main(["evaluate", str(full_run), "evaluate.prompts=p.jsonl", "evaluate.scorer=user_scorers:longer",
                 "task._target_=os.makedirs", f"+task.name={marker}", f"hydra.run.dir={out}"]) == 2
    assert one_line(capsys).startswith("polopt evaluate: error: task._target_ must name a task builder")
    assert not marker.exists() and not out.exists()


# ---------------------------------------------------------------- a reward model of polopt reward as the scorer


@pytest.fixture(scope="module")
def pair_reward(tmp_path_factory) -> Path:
    """``polopt reward task=pairs`` on an invented pair file: a scalar head over the byte tokenizer."""
    folder = tmp_path_factory.mktemp("reward")
    rows = [{"prompt": f"the amber brook {i} ?", "winner": "cedar grove" * (1 + i % 2), "loser": "dune"}
            for i in range(12)]
    (folder / "pairs.jsonl").write_text("".join(json.dumps(r) + "\n" for r in rows))
    assert main(["reward", "task=pairs", f"task.path={folder / 'pairs.jsonl'}", "reward.steps=5",
                 f"hydra.run.dir={folder / 'rm'}"]) == 0
    return folder / "rm" / "reward.pt"


def test_a_pair_file_reward_model_scores_the_responses(pair_reward, full_run, tmp_path):
    from polopt.data.encoding import SequenceIds, encode_prompts, encode_responses
    from polopt.data.tokenizer import load_tokenizer
    from polopt.methods.reward_model import ScalarRewardModel

    prompts = write_prompts(tmp_path / "prompts.jsonl", [p for p in PROMPTS if isinstance(p, str)])
    out = tmp_path / "out"
    assert main(["evaluate", str(full_run), f"evaluate.prompts={prompts}", f"evaluate.reward={pair_reward}",
                 "evaluate.max_new_tokens=4", f"hydra.run.dir={out}"]) == 0
    rows = read_rows(out)
    # the head rebuilt from the file by hand, the text encoded as its pair file was (bos + prompt, response + eos)
    data = torch.load(pair_reward, weights_only=True)
    shape = {k: data["identity"][k] for k in ("context", "width", "layers", "heads")}
    head = ScalarRewardModel(data["identity"]["vocab_size"], pad_id=data["identity"]["pad"], **shape)
    head.load_state_dict(data["state"]["model"])
    byte = load_tokenizer("byte")
    ids = SequenceIds.for_tokenizer(byte)
    for which in ("policy", "reference"):
        with torch.no_grad():
            want = head.eval()(encode_prompts(byte, [r["prompt"] for r in rows], ids),
                               encode_responses(byte, [r[which] for r in rows], ids))
        assert [r[f"{which}_score"] for r in rows] == pytest.approx(want.tolist(), abs=1e-6)
    figures = json.loads((out / "evaluation.json").read_text())
    assert figures["scorer"] == f"reward model {pair_reward}"
    assert figures["responses_cut_for_the_reward_model"] == {"policy": [], "reference": []}


def test_responses_too_long_for_the_reward_model_are_cut_to_its_context(pair_reward, full_run, tmp_path):
    from polopt.data.tokenizer import load_tokenizer

    prompts = write_prompts(tmp_path / "prompts.jsonl", [p for p in PROMPTS if isinstance(p, str)])
    out = tmp_path / "out"
    assert main(["evaluate", str(full_run), f"evaluate.prompts={prompts}", f"evaluate.reward={pair_reward}",
                 "evaluate.max_new_tokens=24", f"hydra.run.dir={out}"]) == 0
    context = torch.load(pair_reward, weights_only=True)["identity"]["context"]
    byte = load_tokenizer("byte")
    cut = json.loads((out / "evaluation.json").read_text())["responses_cut_for_the_reward_model"]
    for which in ("policy", "reference"):
        # bos + prompt + response + eos must fit: exactly the responses longer than that are listed
        over = [i for i, r in enumerate(read_rows(out))
                if 2 + len(byte.encode(r["prompt"])) + len(byte.encode(r[which])) > context]
        assert cut[which] == over
    assert cut["policy"] or cut["reference"]  # 24 words of bytes overflow the head's context


def test_a_reward_model_refuses_what_it_cannot_score(pair_reward, full_run, tmp_path, capsys):
    prompts = write_prompts(tmp_path / "prompts.jsonl")  # the third prompt is a list of messages
    assert main(["evaluate", str(full_run), f"evaluate.prompts={prompts}", f"evaluate.reward={pair_reward}",
                 "evaluate.max_new_tokens=2", f"hydra.run.dir={tmp_path / 'out'}"]) == 2
    assert one_line(capsys) == ("polopt evaluate: error: evaluate.reward scores plain-text prompts (a pair-file reward "
                                "model reads text); prompt 2 is a list of messages: give evaluate.scorer=pkg.module:fn "
                                "instead")
    table = tmp_path / "table"
    assert main(["reward", "task=bradley_terry", f"hydra.run.dir={table}"]) == 0
    capsys.readouterr()
    argv = ["evaluate", str(full_run), f"evaluate.prompts={prompts}", f"evaluate.reward={table / 'reward.pt'}"]
    assert main(argv) == 2
    assert "which scores that task's responses, not text" in one_line(capsys)


def test_prompts_from_csv_and_parquet(tmp_path):
    import datasets

    from polopt.commands.evaluate import read_prompts

    (tmp_path / "p.csv").write_text("prompt,other\nthe amber brook ?,x\nkestrel,y\n")
    assert read_prompts(str(tmp_path / "p.csv"), None) == (["the amber brook ?", "kestrel"], [2, 3], "line")
    messages = [{"role": "user", "content": "fern"}]
    datasets.Dataset.from_list([{"prompt": messages}, {"prompt": messages}]).to_parquet(tmp_path / "m.parquet")
    assert read_prompts(str(tmp_path / "m.parquet"), 1) == ([messages], [0], "index")
