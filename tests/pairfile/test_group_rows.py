"""Unpaired, ranking and scored rows of a pair file trained by group objectives on the tiny transformer.

Every expected value is computed here independently of polopt's batching, packing and masking: each
member's log-probability is one unpadded row ``[bos, prompt bytes, response bytes, eos]`` through the
model's forward pass, ``log_softmax`` gathered at the response tokens (torch), and the objectives are
written out with numpy/scipy from their papers:

- the Plackett–Luce negative log-likelihood of a ranking, ``sum_k [log sum_{j >= k} e^{s_(j)} - s_(k)]``
  with the members in rank order (Plackett, The Analysis of Permutations, 1975; Luce, Individual Choice
  Behavior, 1959), with ``s = beta (log pi - log pi_ref)`` as listwise DPO uses it (Rafailov et al., Direct
  Preference Optimization, 2023, appendix A.3); with equal scores every order is equally likely and the
  value is ``log G!``;
- DPO's pair loss ``-log sigma(beta (h_w - h_l))`` (Rafailov et al. 2023, eq. 7), averaged over the pairs
  a ranking orders;
- InfoNCA's ``-sum_i softmax(scores)_i log softmax(beta h)_i`` (Chen et al., Noise Contrastive Alignment
  of Language Models with Explicit Rewards, 2024), the softmaxes by scipy.special.
"""

from __future__ import annotations

import json
import math
import re

import numpy as np
import pytest
import torch
from hydra import compose, initialize_config_dir
from omegaconf import OmegaConf
from scipy.special import log_softmax, logsumexp, softmax

from polopt.commands.main import main
from polopt.commands.train import CONFIG_DIR, prepare_session, run
from polopt.parallel import distributed

BETA = 0.5
RANKING_ROWS = [  # ragged groups: absent members are masked
    {"prompt": "tea?", "responses": ["green, hot", "no", "ask later"], "ranking": [0, 2, 1]},
    {"prompt": "rain", "responses": ["wet", "dry"], "ranking": [1, 0]},
    {"prompt": "moss on stones", "responses": ["soft", "green and soft", "grey", "none"], "ranking": [2, 0, 3, 1]},
    {"prompt": "lantern", "responses": ["glows", "hums"], "ranking": [0, 1]},
]
SCORED_ROWS = [  # weighted rows: the loss is the weighted mean over rows
    {"prompt": "tea?", "responses": ["green, hot", "no", "ask later"], "scores": [1.5, -0.5, 0.2], "weight": 1.0},
    {"prompt": "moss", "responses": ["soft", "grey"], "scores": [0.3, 0.9], "weight": 3.0},
]
UNPAIRED_ROWS = [
    {"prompt": "tea?", "response": "green, hot", "label": 1},
    {"prompt": "tea?", "response": "no", "label": False},
    {"prompt": "rain", "response": "wet", "label": True},
    {"prompt": "rain", "response": "a", "label": 3},  # bad_label
]


def write(path, rows):
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    return path


def overrides(path, *extra):
    return ["task=pairs", f"task.path={path}", "model.width=16", "model.layers=1", "model.heads=2",
            f"beta={BETA}", "train.progress=false", *extra]


def config(args):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose("config", overrides=args)


def session_and_policy(args, run_dir, *, moved: bool = True):
    """The session and policy of ``polopt train ARGS`` (the command's calls); ``moved``: the policy's weights
    perturbed by seeded noise, so that its log-ratios are not all 0."""
    cfg = config(args)
    _, session = prepare_session(cfg, run_dir, distributed.SINGLE)
    policy = session.build_policy(**OmegaConf.to_container(cfg.model, resolve=True))
    if moved:
        generator = torch.Generator().manual_seed(7)
        with torch.no_grad():
            for p in policy.parameters():
                p.add_(0.3 * torch.randn(p.shape, generator=generator))
    return session, policy


@torch.no_grad()
def direct_logprob(model, session, prompt: str, response: str) -> float:
    """log pi(response | prompt): one unpadded row through the model, log-softmax gathered (torch)."""
    enc, ids = session.tokenizer.encode, session.ids
    p, r = [ids.bos, *enc(prompt)], [*enc(response), ids.eos]
    logits = model(torch.tensor([(p + r)[:-1]]))[0].double()  # (T - 1, V): the last token is only scored
    logp = torch.log_softmax(logits, dim=-1)
    return float(logp[torch.arange(len(p) - 1, len(p) + len(r) - 1), torch.tensor(r)].sum())


def logratios(session, policy, row) -> np.ndarray:
    members = row["responses"] if "responses" in row else [row["response"]]
    return np.array([direct_logprob(policy.model, session, row["prompt"], m)
                     - direct_logprob(session.reference_model, session, row["prompt"], m) for m in members])


def plackett_luce_nll(s: np.ndarray, ranking: list[int]) -> float:
    order = s[np.argsort(ranking)]  # best first
    return float(sum(logsumexp(order[k:]) - order[k] for k in range(len(order))))


def test_ranking_rows_give_the_plackett_luce_likelihood(tmp_path):
    """listwise DPO over ragged ranking rows equals the Plackett–Luce likelihood written out here; the
    reference log-probs equal the direct computation member by member; absent members are masked."""
    path = write(tmp_path / "ranking.jsonl", RANKING_ROWS)
    session, policy = session_and_policy(overrides(path, "loss=ranking_likelihood"), tmp_path / "run")
    g = session.groups
    assert g.members.shape[:2] == (4, 4) and g.mask.sum(1).tolist() == [3, 2, 4, 2]
    for i, row in enumerate(RANKING_ROWS):
        ref = [direct_logprob(session.reference_model, session, row["prompt"], m) for m in row["responses"]]
        np.testing.assert_allclose(g.reference[i, :len(ref)].double().numpy(), ref, rtol=1e-5, atol=1e-4)
        assert g.ranks[i, :len(ref)].tolist() == row["ranking"]
    want = np.mean([plackett_luce_nll(BETA * logratios(session, policy, r), r["ranking"]) for r in RANKING_ROWS])
    assert session.full_statistics(policy)["loss"] == pytest.approx(want, rel=1e-5)
    at_reference, _ = session_and_policy(overrides(path, "loss=ranking_likelihood"), tmp_path / "run0", moved=False)
    start = at_reference.full_statistics(_)["loss"]
    assert start == pytest.approx(np.mean([math.log(math.factorial(len(r["responses"]))) for r in RANKING_ROWS]),
                                  abs=1e-6)  # every log-ratio 0: each order equally likely, log G!


def test_a_ranking_file_feeds_a_pair_objective_through_its_ordered_pairs(tmp_path):
    """loss=logistic on ranking rows: each row's loss is DPO's mean over the G (G - 1) / 2 pairs its ranking
    orders (not G (G - 1) / 2 rows of their own)."""
    path = write(tmp_path / "ranking.jsonl", RANKING_ROWS)
    session, policy = session_and_policy(overrides(path, "loss=logistic"), tmp_path / "run")
    per_row = []
    for row in RANKING_ROWS:
        h, rank = logratios(session, policy, row), row["ranking"]
        pairs = [(i, j) for i in range(len(h)) for j in range(len(h)) if rank[i] < rank[j]]
        per_row.append(np.mean([np.logaddexp(0.0, -BETA * (h[i] - h[j])) for i, j in pairs]))
    assert session.full_statistics(policy)["loss"] == pytest.approx(np.mean(per_row), rel=1e-5)


def test_scored_rows_give_infonca(tmp_path):
    path = write(tmp_path / "scored.jsonl", SCORED_ROWS)
    session, policy = session_and_policy(overrides(path, "loss=score_cross_entropy"), tmp_path / "run")
    want = np.average([-(softmax(r["scores"]) * log_softmax(BETA * logratios(session, policy, r))).sum()
                       for r in SCORED_ROWS], weights=[r["weight"] for r in SCORED_ROWS])
    assert session.full_statistics(policy)["loss"] == pytest.approx(want, rel=1e-5)


def test_a_ranking_of_two_trains_as_the_pair_it_is(tmp_path):
    """The same data as pairs (winner, loser) and as ranking rows of two, trained by DPO with the same seed:
    the same final loss and log-ratios (the pair path scores each pair over one prompt pass, the group path
    member by member: equal up to float32 rounding)."""
    pairs = [{"prompt": r["prompt"], "winner": r["responses"][r["ranking"].index(0)],
              "loser": r["responses"][r["ranking"].index(1)]} for r in RANKING_ROWS]
    two = [{"prompt": p["prompt"], "responses": [p["loser"], p["winner"]], "ranking": [1, 0]} for p in pairs]
    extra = ("loss=logistic", "train.steps=6", "optim.lr=0.01", "optim.warmup_steps=0")
    a = run(config(overrides(write(tmp_path / "pairs.jsonl", pairs), *extra)), tmp_path / "a")
    b = run(config(overrides(write(tmp_path / "two.jsonl", two), *extra)), tmp_path / "b")
    assert b["row_kind"] == "ranking" and b["group_size"] == 2 and b["feedback"] == "ranks"
    assert b["loss"] == pytest.approx(a["loss"], rel=1e-4) and a["loss"] < math.log(2)  # it trained
    mean_logratio = (a["logratio_winner"] + a["logratio_loser"]) / 2
    assert b["logratio_mean"] == pytest.approx(mean_logratio, abs=1e-4)


def test_an_unpaired_run_accounts_every_row(tmp_path, capsys):
    path = write(tmp_path / "unpaired.jsonl", UNPAIRED_ROWS)
    folder = tmp_path / "run"
    code = main(["train", *overrides(path, "loss=unpaired_prospect", "train.steps=3", f"hydra.run.dir={folder}")])
    assert code == 0, capsys.readouterr().err
    summary = json.loads((folder / "summary.json").read_text())
    assert (summary["rows_in"], summary["rows_accepted"], summary["rows_rejected"]) == (4, 3, 1)
    assert summary["row_kind"] == "unpaired" and summary["feedback"] == "labels" and summary["group_size"] == 1
    reject = json.loads((folder / "rejects.jsonl").read_text())
    assert (reject["line"], reject["field"], reject["reason"]) == (4, "label", "bad_label")


@pytest.mark.parametrize("rows,extra,message", [
    (UNPAIRED_ROWS, ["loss=logistic"],
     r"^polopt train: error: loss 'logistic' cannot read this file's unpaired \(response \+ label\) rows: it is a "
     r"pair objective \(it reads pairs, and ranking rows through their ordered pairs\); give a loss that reads "
     r"group\.labels, e\.g\. loss=unpaired_prospect \(built-ins that do: unpaired_prospect, unpaired_classifier\)$"),
    (RANKING_ROWS, ["loss=unpaired_prospect"],
     r"^polopt train: error: loss 'unpaired_prospect' cannot read this file's ranking \(responses \+ ranking\) rows: "
     r"it is a group objective that reads group\.labels; give a loss that reads group\.ranks, e\.g\. "
     r"loss=ranking_likelihood"),
    (SCORED_ROWS, ["loss=ranking_likelihood"],
     r"cannot read this file's scored \(responses \+ scores\) rows: .* e\.g\. loss=score_cross_entropy"),
    (RANKING_ROWS, ["loss=ranking_likelihood", "task.stream=true", "train.batch_size=2"],
     r"^polopt train: error: task\.stream=true trains margin losses and pair objectives on pair rows; loss "
     r"'ranking_likelihood' is a group objective: set task\.stream=false \(read in memory\)$"),
    (RANKING_ROWS, ["loss=logistic", "task.stream=true", "train.batch_size=2"],
     r"^polopt train: error: task\.stream=true streams pair rows \(prompt, winner, loser\); this file holds "
     r"ranking \(responses \+ ranking\) rows: set task\.stream=false \(read in memory\)$"),
])
def test_a_loss_that_cannot_read_the_rows_is_refused_in_one_line(rows, extra, message, tmp_path, capsys):
    path = write(tmp_path / "rows.jsonl", rows)
    code = main(["train", *overrides(path, *extra, f"hydra.run.dir={tmp_path / 'run'}")])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1, err
    assert re.search(message, err.strip())


def test_a_reward_model_refuses_rows_beyond_pairs(tmp_path, capsys):
    path = write(tmp_path / "ranking.jsonl", RANKING_ROWS)
    code = main(["reward", "task=pairs", f"task.path={path}", "model=transformer",
                 f"hydra.run.dir={tmp_path / 'run'}"])
    err = capsys.readouterr().err
    assert code == 2 and err == ("polopt reward: error: polopt reward (a reward or preference head fitted to pairs) "
                                 "reads pair rows (prompt, winner, loser); this file holds ranking (responses + "
                                 "ranking) rows\n")


def test_a_group_run_resumed_ends_where_one_run_does(tmp_path, capsys):
    """Two steps, then the same run raised to four steps (it resumes from its checkpoint), against four steps
    in one go (constant schedule): the same final loss, bit for bit (DEVELOPERS.md: resume is bit-identical)."""
    path = write(tmp_path / "ranking.jsonl", RANKING_ROWS)
    extra = ("loss=ranking_likelihood", "optim.schedule=constant", "optim.warmup_steps=0", "train.batch_size=2",
             "train.checkpoint_every=1")
    whole = run(config(overrides(path, *extra, "train.steps=4")), tmp_path / "whole")
    run(config(overrides(path, *extra, "train.steps=2")), tmp_path / "parts")
    capsys.readouterr()
    resumed = run(config(overrides(path, *extra, "train.steps=4", "train.resume=true")), tmp_path / "parts")
    told = capsys.readouterr()
    assert re.search(r"resuming from .* \(step 2 of", told.out + told.err)
    assert resumed["steps"] == 4 and resumed["loss"] == whole["loss"]


def test_a_parquet_file_of_rows_beyond_pairs_is_refused_by_the_stream(tmp_path, capsys):
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.Table.from_pylist(SCORED_ROWS), tmp_path / "scored.parquet")
    code = main(["train", *overrides(tmp_path / "scored.parquet", "task.stream=true", "train.batch_size=2",
                                     f"hydra.run.dir={tmp_path / 'run'}")])
    assert code == 2 and capsys.readouterr().err == (
        "polopt train: error: task.stream=true streams pair rows (prompt, winner, loser); this file holds scored "
        "(responses + scores) rows: set task.stream=false (read in memory)\n")


def test_a_reference_checkpoint_scores_the_members(tmp_path):
    """With task.reference_checkpoint (written by polopt sft) the members' reference log-probs are that model's,
    computed directly member by member."""
    from polopt.training.sft import load_reference

    sft = write(tmp_path / "sft.jsonl", [{"prompt": r["prompt"], "response": r["responses"][0]} for r in RANKING_ROWS])
    assert main(["sft", str(sft), "train.steps=2", "model.width=16", "model.layers=1", "model.heads=2",
                 "train.progress=false", f"hydra.run.dir={tmp_path / 'ref'}"]) == 0
    path = write(tmp_path / "ranking.jsonl", RANKING_ROWS)
    session, _ = session_and_policy(overrides(path, "loss=ranking_likelihood",
                                              f"task.reference_checkpoint={tmp_path / 'ref' / 'reference.pt'}"),
                                    tmp_path / "run", moved=False)
    reference, _ = load_reference(str(tmp_path / "ref" / "reference.pt"))
    for i, row in enumerate(RANKING_ROWS):
        want = [direct_logprob(reference, session, row["prompt"], m) for m in row["responses"]]
        np.testing.assert_allclose(session.groups.reference[i, :len(want)].double().numpy(), want, rtol=1e-5,
                                   atol=1e-4)


def test_a_file_whose_rankings_are_all_bad_is_one_line_naming_the_reasons(tmp_path, capsys):
    """Rows are rejected one by one (the accounting); a file of which no row survives stops the run in one line,
    exit 2, with the reasons counted."""
    rows = [{"prompt": "a", "responses": ["x", "y"], "ranking": [1, 1]},
            {"prompt": "b", "responses": ["x", "y"], "ranking": [0, 2]},
            {"prompt": "c", "responses": ["x", "y", "z"], "ranking": [0, 1]}]
    path = write(tmp_path / "bad.jsonl", rows)
    folder = tmp_path / "run"
    code = main(["train", *overrides(path, "loss=ranking_likelihood", f"hydra.run.dir={folder}")])
    assert code == 2 and capsys.readouterr().err == (
        f"polopt train: error: task.path '{path}': no row was accepted (3 rejected; see {folder / 'rejects.jsonl'}): "
        "length_mismatch 1, not_a_permutation 2\n")
