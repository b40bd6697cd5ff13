"""task.stream=true: one streaming pass over a generated pair file, rows into a memory-mapped Arrow file,
reference log-probs per batch.

References outside the streaming code: the generated file's own construction (how many rows of each
kind of fault were written: the expected counts follow from it), the in-memory path of polopt.data on
the same file (the same row checks, so the same accepted rows, rejects and accounting), and the same
training maths on the same batches (rows are independent, so reference log-probs computed per batch
equal those computed for the whole set up to float32 rounding: SGD keeps such differences at rounding
size, 1e-5 relative stated; Adam's normalised first steps can amplify a rounding difference to the
step size where a gradient is near 0, so the comparison uses SGD).
"""

from __future__ import annotations

import json
import random
from pathlib import Path

import pytest
import torch
from hydra import compose, initialize_config_dir

from polopt.commands.train import CONFIG_DIR, run
from polopt.data import load_pairs
from polopt.data import stream_pass as stream_pass_module
from polopt.data.encoding import SequenceIds
from polopt.data.stream_pass import StreamPass
from polopt.data.tokenizer import load_tokenizer
from polopt.models import logprobs, reference_cache
from polopt.pairfile.mapped import StreamedPairs
from polopt.pairfile.task import pair_task

WORDS = ["red", "blue", "cat", "dog", "sun", "rain", "tea", "map"]
# what the generator writes besides the good rows: reason -> how many rows
FAULTS = {"invalid_json": 6, "not_an_object": 2, "missing": 5, "identical": 4, "duplicate": 7, "invalid_utf8": 3,
          "empty": 2}


def generate(path: Path, n_good: int = 150, seed: int = 0) -> int:
    """A JSON Lines pair file of ``n_good`` distinct good rows with the faults of :data:`FAULTS` spread over
    it, and 2 blank lines; returns the number of rows (non-blank lines)."""
    rng = random.Random(seed)
    good, seen = [], set()
    while len(good) < n_good:
        p, w, lo = (" ".join(rng.choice(WORDS) for _ in range(rng.randint(1, 3))) for _ in range(3))
        if w != lo and (p, w, lo) not in seen:
            seen.add((p, w, lo))
            good.append(json.dumps({"prompt": p, "winner": w, "loser": lo}).encode())
    bad = ([b"{not json"] * FAULTS["invalid_json"] + [b"[1, 2]"] * FAULTS["not_an_object"]
           + [json.dumps({"prompt": "a", "winner": "b"}).encode()] * FAULTS["missing"]
           + [json.dumps({"prompt": f"p{i}", "winner": "same", "loser": "same"}).encode()
              for i in range(FAULTS["identical"])]
           + [good[3 * i] for i in range(FAULTS["duplicate"])]  # copies of earlier good rows
           + [b'{"prompt": "\xff\xfe", "winner": "a", "loser": "b"}'] * FAULTS["invalid_utf8"]
           + [json.dumps({"prompt": "x", "winner": " ", "loser": "b"}).encode()] * FAULTS["empty"])
    lines = list(good)
    for k, row in enumerate(bad):  # after the first 30 good rows, so every duplicate comes after its original
        lines.insert(30 + 5 * k, row)
    lines[40:40] = [b"", b"  "]
    path.write_bytes(b"\n".join(lines) + b"\n")
    return len(lines) - 2


def _pass(path: Path, tmp: Path, **file) -> tuple[StreamPass, list]:
    keys = {"path": str(path), "format": "auto", "columns": None, "max_length": None, "truncation": "reject",
            "duplicates": "reject", **file}
    tokenizer = load_tokenizer("byte")
    stream = StreamPass(keys, tokenizer, SequenceIds.for_tokenizer(tokenizer), rejects_path=tmp / "rejects.jsonl",
                        work_dir=tmp)
    chunks = list(stream.chunks())
    return stream, chunks


@pytest.mark.parametrize("chunk", [7, 4096])  # duplicates across chunk boundaries, and one chunk
def test_one_pass_counts_every_row_like_the_in_memory_path(tmp_path, monkeypatch, chunk):
    monkeypatch.setattr(stream_pass_module, "CHUNK", chunk)
    path = tmp_path / "pairs.jsonl"
    rows = generate(path)
    stream, chunks = _pass(path, tmp_path)
    a = stream.accounting()
    assert a["rows_in"] == rows == a["rows_accepted"] + a["rows_rejected"]
    assert a["rejected_by_reason"] == {k: FAULTS[k] for k in stream_pass_module.REASONS if k in FAULTS}
    assert a["rows_accepted"] == 150 and a["blank_lines"] == 2 and a["duplicate_rows"] == FAULTS["duplicate"]
    memory = load_pairs(path, tokenizer="byte")
    for key in ("rows_in", "rows_accepted", "rows_rejected", "rejected_by_reason", "blank_lines", "duplicate_rows"):
        assert a[key] == memory.accounting[key], key
    written = [json.loads(x) for x in (tmp_path / "rejects.jsonl").read_text().splitlines()]
    assert written == [r.record() for r in memory.rejects]  # the same records, in file order
    tokens = [p for c in chunks for p in c["prompt"]]
    ids = SequenceIds.for_tokenizer(load_tokenizer("byte"))
    assert tokens == [[ids.bos, *t.encode()] for t in memory.prompt]
    assert not list(tmp_path.glob("*.sqlite"))  # the digest table is removed after the pass


def test_a_parquet_file_streams_by_record_batches(tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    rows = {"prompt": ["a", "b", "a", "c"], "winner": ["x", "y", "x", "z"], "loser": ["y", "y", "y", None]}
    pq.write_table(pa.table(rows), tmp_path / "pairs.parquet")
    stream, chunks = _pass(tmp_path / "pairs.parquet", tmp_path)
    a = stream.accounting()
    assert (a["rows_in"], a["rows_accepted"]) == (4, 1)
    assert a["rejected_by_reason"] == {"missing": 1, "identical": 1, "duplicate": 1}
    assert len(chunks) == 1 and len(chunks[0]["prompt"]) == 1


def test_formats_that_cannot_stream_are_one_line(tmp_path):
    (tmp_path / "pairs.csv").write_text("prompt,winner,loser\na,b,c\n")
    with pytest.raises(ValueError, match=r"^task.stream=true reads JSON Lines \(.jsonl, .ndjson\) or Parquet files, "
                                         r"got '.*pairs.csv' \(format csv\); convert it with polopt data, or set "
                                         r"task.stream=false$"):
        _pass(tmp_path / "pairs.csv", tmp_path)
    with pytest.raises(ValueError, match=r"task.stream must be true or false, got 'yes'"):
        pair_task(path="x.jsonl", stream="yes")


BASE = ["task=pairs", "model=transformer", "model.width=16", "model.layers=1", "model.context=32",
        "train.batch_size=16", "train.steps=8", "train.bucketing=false", "train.progress=false", "optim=sgd",
        "optim.lr=0.5", "optim.schedule=constant"]


def _cfg(*overrides):
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return compose("config", overrides=[*BASE, *overrides])


def test_streamed_training_equals_the_in_memory_run_and_scores_per_batch(tmp_path, monkeypatch):
    path = tmp_path / "pairs.jsonl"
    generate(path)
    memory = run(_cfg(f"task.path={path}"), tmp_path / "memory")
    sizes = []
    original = logprobs.batched_logprobs

    def recording(model, prompt, response, **kwargs):
        sizes.append(len(prompt))
        return original(model, prompt, response, **kwargs)

    def whole_file(*args, **kwargs):
        raise AssertionError("the whole file's reference log-probs were computed")

    monkeypatch.setattr("polopt.pairfile.streamed.batched_logprobs", recording)
    monkeypatch.setattr("polopt.models.logprobs.batched_logprobs", recording)
    monkeypatch.setattr(reference_cache, "reference_logprobs", whole_file)
    monkeypatch.setattr(reference_cache, "reference_pair_logprobs", whole_file)
    monkeypatch.setattr("polopt.pairfile.streamed.STATISTICS_CHUNK", 40)
    monkeypatch.setattr("polopt.pairfile.session.reference_pair_logprobs", whole_file)
    streamed = run(_cfg(f"task.path={path}", "task.stream=true"), tmp_path / "streamed")
    assert sizes and max(sizes) <= 2 * 40  # a batch (winners and losers) or a statistics chunk, never all 150 pairs
    for key in ("rows_in", "rows_accepted", "rows_rejected", "n_pairs"):
        assert streamed[key] == memory[key]
    for key in ("loss", "margin_mean", "logratio_winner", "logratio_loser"):
        assert streamed[key] == pytest.approx(memory[key], rel=1e-5, abs=1e-6), key
    assert streamed["data"]["streamed"] and (tmp_path / "streamed" / "pairs.arrow").is_file()
    assert (tmp_path / "streamed" / "rejects.jsonl").read_text() == (tmp_path / "memory" / "rejects.jsonl").read_text()
    # the same command again resumes from its checkpoint (the pass's digest pins the data)
    again = run(_cfg(f"task.path={path}", "task.stream=true", "train.steps=10"), tmp_path / "streamed")
    assert again["steps"] == 10


def test_a_streamed_file_of_bad_rows_only_is_one_line(tmp_path):
    path = tmp_path / "bad.jsonl"
    path.write_text("{oops\n[1]\n" + json.dumps({"prompt": "a", "winner": "b", "loser": "b"}) + "\n")
    with pytest.raises(ValueError, match=r"^task.path '.*bad.jsonl': no pair was accepted \(3 rejected; see "
                                         r".*rejects.jsonl\)$"):
        run(_cfg(f"task.path={path}", "task.stream=true"), tmp_path / "run")
    assert len((tmp_path / "run" / "rejects.jsonl").read_text().splitlines()) == 3
    assert not list((tmp_path / "run").glob("pairs.arrow*"))


def test_full_batch_training_of_a_streamed_file_is_refused(tmp_path):
    path = tmp_path / "pairs.jsonl"
    generate(path, n_good=20)
    with pytest.raises(ValueError, match=r"these 20 pairs stream from disk and are read one batch at a time: set "
                                         r"train.batch_size below 20"):
        run(_cfg(f"task.path={path}", "task.stream=true", "train.batch_size=null"), tmp_path / "run")


def test_streamed_pairs_read_a_batch_with_its_reference(tmp_path):
    from polopt.models.transformer import TinyTransformer
    from polopt.pairfile.mapped import write_arrow

    write_arrow(tmp_path / "p.arrow", [{"prompt": [[1, 2], [1]], "winner": [[3, 4, 0], [5, 0]],
                                        "loser": [[6, 0], [3, 3, 3, 0]]}])
    pairs = StreamedPairs(tmp_path / "p.arrow", pad_id=9, digest=b"x")
    model = TinyTransformer(10, context=8, width=8, layers=1, heads=2, seed=0)
    pairs.attach_reference(model)
    batch = pairs.select(torch.tensor([1, 0]))
    assert batch.prompt.tolist() == [[1, 9], [1, 2]] and batch.winner.shape == batch.loser.shape == (2, 4)
    want = logprobs.sequence_logprobs(model, batch.prompt, batch.winner, pad_id=9)  # torch's own forward, one pass
    torch.testing.assert_close(batch.reference_winner, want)
