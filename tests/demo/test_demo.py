"""``polopt demo`` in its reduced configuration (seconds): every step runs, the summary carries the
design's fields with consistent values, the plots are PNGs, the accounting balances. The full default
run is too slow for the suite; its figures are measured by hand (see the report)."""

from __future__ import annotations

import json

import pytest

from polopt.commands.main import main
from polopt.demo.pipeline import run_demo
from polopt.demo.settings import QUICK, DemoConfig

PNG = b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, section 5.2)


@pytest.fixture(scope="module")
def quick(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    cfg = DemoConfig(**{**QUICK, "loss": "squared"})
    return out, run_demo(cfg, out, progress=False, log=lambda *_: None)


def test_summary_fields_of_the_design(quick):
    out, summary = quick
    assert json.loads((out / "summary.json").read_text()) == json.loads(json.dumps(summary))
    lo, hi = summary["win_rate_ci"]
    assert 0.0 <= lo <= summary["win_rate"] <= hi <= 1.0
    assert 0.0 <= summary["judge_win_rate_policy_first"] <= 1.0 and 0.0 <= summary["judge_win_rate_both_orders"] <= 1.0
    assert summary["wins"] + summary["defeats"] + summary["ties"] == summary["comparisons"] == QUICK["eval_samples"]
    assert isinstance(summary["kl_to_reference"], float) and summary["loss_name"] == "squared"
    assert [e["beta"] for e in summary["frontier"]] == sorted(QUICK["betas"])


def test_pairs_go_through_the_data_layer(quick):
    out, summary = quick
    assert summary["rows_in"] == summary["rows_accepted"] + summary["rows_rejected"] == QUICK["n_pairs"]
    rejects = (out / "rejects.jsonl").read_text(encoding="utf-8").splitlines()
    assert len(rejects) == summary["rows_rejected"]
    assert all(json.loads(r)["reason"] in ("identical",) for r in rejects)  # the only reason sampled pairs can have
    pairs = [json.loads(x) for x in (out / "pairs.jsonl").read_text(encoding="utf-8").splitlines()]
    assert len(pairs) == QUICK["n_pairs"] and all(p["shown_first"] in ("winner", "loser") for p in pairs)


def test_run_folder(quick):
    out, _ = quick
    for name in ("training_curves.png", "frontier.png"):
        assert (out / name).read_bytes()[:8] == PNG
    assert (out / "reference.pt").is_file()
    for beta in QUICK["betas"]:
        lines = (out / f"beta-{beta:g}" / "metrics.jsonl").read_text().splitlines()
        assert json.loads(lines[-1])["step"] == QUICK["steps"]


@pytest.mark.parametrize(("args", "message"), [
    (["loss=nope"], r"^polopt demo: error: unknown loss 'nope'"),
    (["--betas", "0.1,x"], r"^polopt demo: error: --betas must be comma-separated numbers"),
    (["beta=-1"], r"^polopt demo: error: beta must be a number > 0"),
    (["beta=0.1,0.3"], r"^polopt demo: error: 'beta=0.1,0.3' is a list of values: polopt demo takes one value a key"),
    (["train.stepz=3"], r"^polopt demo: error: unknown key 'train.stepz'; did you mean train.steps"),
    (["loss=huber", "loss.delta=3"], r"^polopt demo: error: polopt demo reads loss, beta, train.steps, .* only; "
                                     r"'loss.delta=3' would change nothing here$"),
    (["--bias", "1.5"], r"^polopt demo: error: --bias must lie in \[0, 1\)"),
])
def test_errors_are_one_line(args, message, capsys, tmp_path):
    assert main(["demo", f"hydra.run.dir={tmp_path}", *args]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1
    import re

    assert re.search(message, err)
