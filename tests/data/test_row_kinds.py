"""Unpaired, ranking and scored rows in pair files: read from every format, checked, rejected with a reason
each, truncated and accounted like pairs (rows_in = accepted + rejected); the kind inferred, a file mixing
kinds refused in one line.

The good files come from examples/library_desk.py (``write_kind``), written by the standard library
(``json``, RFC 8259; ``csv``, RFC 4180 as Python writes it) and pyarrow (Parquet list columns); the rows
the reader must return are the generator's own. The bad rows are written here, each with the reason and
field it must get.
"""

from __future__ import annotations

import csv
import json

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from helpers_fuzz import FUZZ, assert_loads_or_one_line_error, json_values
from hypothesis import given
from hypothesis import strategies as st

from examples.library_desk import feedback_rows, write_kind
from polopt.commands.main import main
from polopt.data import load_pairs, write_rejects

KINDS = ("ranking", "scored", "unpaired")


def _jsonl(path, rows):
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def desk(tmp_path_factory):
    out = tmp_path_factory.mktemp("desk")
    return out, {kind: write_kind(out, kind, 12, seed=4) for kind in KINDS}


@pytest.mark.parametrize("fmt", ["jsonl", "csv", "parquet"])
@pytest.mark.parametrize("kind", KINDS)
def test_every_format_reads_the_rows_written(desk, kind, fmt):
    out, written = desk
    data = load_pairs(out / f"{kind}.{fmt}")
    assert data.kind == kind
    want = [dict(r, label=float(r["label"])) if kind == "unpaired" else r for r in written[kind]]
    assert [{k: v for k, v in r.items() if k != "weight"} for r in data.rows()] == want
    a = data.accounting
    assert a["row_kind"] == kind and a["rows_in"] == a["rows_accepted"] == len(written[kind])
    assert a["columns"] == {"prompt": "prompt", **{f: f for f in data.rows()[0] if f not in ("prompt", "weight")},
                            "weight": None}
    if kind != "unpaired":
        assert a["group_sizes"] == {3: len(written[kind])}


@pytest.fixture(scope="module")
def mixed(tmp_path_factory):
    out = tmp_path_factory.mktemp("mixed")
    for kind in KINDS:
        write_kind(out, kind, 30, seed=6, bad=True)
    return out


@pytest.mark.parametrize("fmt", ["jsonl", "csv", "parquet"])
@pytest.mark.parametrize("kind", KINDS)
def test_mixed_files_report_every_bad_row_and_lose_no_good_one(mixed, kind, fmt):
    """examples/library_desk.py's record of where it put each bad row (counted as it writes, quoted newlines
    included) against the loader's rejects; the good rows back in order."""
    manifest = json.loads((mixed / f"{kind}-expected.json").read_text(encoding="utf-8"))
    data = load_pairs(mixed / f"{kind}.{fmt}")
    unit = "line" if fmt != "parquet" else "index"
    assert [{unit: r.location, "field": r.field, "reason": r.reason} for r in data.rejects] == \
        manifest["expected"][fmt]
    good = [dict(r, label=float(r["label"])) if kind == "unpaired" else r for r in manifest["good"]]
    assert [{k: v for k, v in r.items() if k != "weight"} for r in data.rows()] == good
    a = data.accounting
    assert a["rows_in"] == len(good) + len(manifest["expected"][fmt]) == a["rows_accepted"] + a["rows_rejected"]


# (row, field, reason): each bad row of a ranking file and what it must be rejected for
BAD_RANKING = [
    ({"prompt": "q1", "responses": ["a", "b"], "ranking": [0, 0]}, "ranking", "not_a_permutation"),
    ({"prompt": "q2", "responses": ["a", "b"], "ranking": [1, 2]}, "ranking", "not_a_permutation"),
    ({"prompt": "q3", "responses": ["a", "b"], "ranking": [0.0, 1]}, "ranking", "not_a_permutation"),
    ({"prompt": "q4", "responses": ["a", "b", "c"], "ranking": [0, 1]}, "ranking", "length_mismatch"),
    ({"prompt": "q5", "responses": ["a"], "ranking": [0]}, "responses", "too_few_responses"),
    ({"prompt": "q6", "responses": "a", "ranking": [0]}, "responses", "not_a_list"),
    ({"prompt": "q7", "responses": ["a", "b"], "ranking": "0,1"}, "ranking", "not_a_list"),
    ({"prompt": "q8", "responses": ["a", "a"], "ranking": [0, 1]}, "responses[1]", "repeated_response"),
    ({"prompt": "q9", "responses": ["a", 5], "ranking": [0, 1]}, "responses[1]", "not_a_string"),
    ({"prompt": "q10", "responses": ["a", " "], "ranking": [0, 1]}, "responses[1]", "empty"),
    ({"prompt": "q11", "responses": ["a", "b"]}, "ranking", "missing"),
    ({"prompt": "", "responses": ["a", "b"], "ranking": [1, 0]}, "prompt", "empty"),
]
BAD_SCORED = [
    ({"prompt": "q1", "responses": ["a", "b"], "scores": [1.0, "high"]}, "scores", "bad_score"),
    ({"prompt": "q2", "responses": ["a", "b"], "scores": [1.0, True]}, "scores", "bad_score"),
    ({"prompt": "q3", "responses": ["a", "b"], "scores": [1.0]}, "scores", "length_mismatch"),
    ({"prompt": "q4", "responses": ["a", "b"], "scores": None}, "scores", "missing"),
]
BAD_UNPAIRED = [
    ({"prompt": "q1", "response": "a", "label": 2}, "label", "bad_label"),
    ({"prompt": "q2", "response": "a", "label": "yes"}, "label", "bad_label"),
    ({"prompt": "q3", "response": "a", "label": None}, "label", "missing"),
    ({"prompt": "q4", "response": ["a"], "label": 1}, "response", "not_a_string"),
]


@pytest.mark.parametrize("kind,bad", [("ranking", BAD_RANKING), ("scored", BAD_SCORED), ("unpaired", BAD_UNPAIRED)])
def test_each_bad_row_is_a_reject_with_its_reason(kind, bad, tmp_path):
    """Good rows interleaved with bad ones: every bad row rejected at its line with its field and reason, every
    good row kept in order, rows_in = accepted + rejected, the rejects file one line per reject."""
    good = feedback_rows(kind, len(bad) + (kind == "ranking"), seed=5)
    if kind == "ranking":  # a duplicate of the first good row, after it: rejected, the first kept
        bad = [*bad, (good[0], None, "duplicate")]
    lines = [r for pair in zip(good, [row for row, _, _ in bad], strict=True) for r in pair]
    data = load_pairs(_jsonl(tmp_path / "rows.jsonl", lines))
    assert [(r.location, r.field, r.reason) for r in data.rejects] == [(2 * k + 2, f, why)
                                                                       for k, (_, f, why) in enumerate(bad)]
    assert len(data) == len(good)
    a = data.accounting
    assert a["rows_in"] == a["rows_accepted"] + a["rows_rejected"] == len(lines)
    written = write_rejects(data.rejects, tmp_path / "rejects.jsonl").read_text(encoding="utf-8").splitlines()
    assert [json.loads(line)["reason"] for line in written] == [why for _, _, why in bad]


def test_csv_lists_are_json_arrays_and_labels_text(tmp_path):
    """CSV cells hold lists as JSON arrays and labels as the text 1, 0, true, false (any case); a cell that is
    not a JSON array is not_a_list, a label text of another word bad_label."""
    path = tmp_path / "rows.csv"
    with path.open("w", newline="", encoding="utf-8") as f:
        csv.writer(f).writerows([["prompt", "response", "label"], ["q", "a", "TRUE"], ["q", "b", "0"],
                                 ["q", "c", "maybe"]])
    data = load_pairs(path)
    assert data.rows() == [{"prompt": "q", "response": "a", "label": 1.0, "weight": 1.0},
                           {"prompt": "q", "response": "b", "label": 0.0, "weight": 1.0}]
    assert [(r.location, r.reason) for r in data.rejects] == [(4, "bad_label")]
    with path.open("w", newline="", encoding="utf-8") as f:
        csv.writer(f).writerows([["prompt", "responses", "scores"], ["q", '["a", "b"]', "[1, NaN]"],
                                 ["q", "a; b", "[1, 2]"], ["q", '["a", "b"]', "[1, 2.5]"]])
    data = load_pairs(path)  # json reads NaN (Python's extension of RFC 8259): a score that is not finite
    assert [(r.location, r.field, r.reason) for r in data.rejects] == [(2, "scores", "bad_score"),
                                                                       (3, "responses", "not_a_list")]
    assert data.rows() == [{"prompt": "q", "responses": ["a", "b"], "scores": [1.0, 2.5], "weight": 1.0}]


def test_parquet_list_columns_with_nulls(tmp_path):
    table = pa.table({"prompt": ["q", "q", "r"], "responses": [["a", "b"], None, ["a", "b", "c"]],
                      "ranking": [[1, 0], [0, 1], [2, 0, 1]]})
    pq.write_table(table, tmp_path / "rows.parquet")
    data = load_pairs(tmp_path / "rows.parquet")
    assert [(r.location, r.field, r.reason) for r in data.rejects] == [(1, "responses", "missing")]
    assert data.responses == [["a", "b"], ["a", "b", "c"]] and data.feedback == [[1, 0], [2, 0, 1]]


def test_truncation_cuts_every_response_and_a_cut_that_repeats_is_rejected(tmp_path):
    """Lengths in bytes (the built-in tokenizer): prompt + longest response against max_length."""
    rows = [{"prompt": "abcd", "responses": ["xxxxxx1", "yy", "zzz"], "ranking": [0, 1, 2]},
            {"prompt": "abcd", "responses": ["wwwww1", "wwwww2"], "ranking": [1, 0]}]
    path = _jsonl(tmp_path / "rows.jsonl", rows)
    data = load_pairs(path, max_length=8, truncation="truncate_response")
    assert data.responses == [["xxxx", "yy", "zzz"]] and data.length == [8]
    assert [(r.location, r.field, r.reason) for r in data.rejects] == [(2, "responses", "repeated_response")]
    a = data.accounting
    assert a["rows_truncated"] == 1 and a["truncated_fields"] == {"responses": 1} and a["tokens_removed"] == 3
    data = load_pairs(path, max_length=9, truncation="truncate_prompt")
    assert data.prompt == ["cd", "bcd"] and data.accounting["truncated_fields"] == {"prompt": 2}
    data = load_pairs(path, max_length=9)
    assert [r.reason for r in data.rejects] == ["too_long", "too_long"]


def test_column_mapping_names_the_new_fields(tmp_path):
    path = _jsonl(tmp_path / "rows.jsonl", [{"question": "q", "replies": ["a", "b"], "order": [1, 0]}])
    data = load_pairs(path, columns={"prompt": "question", "responses": "replies", "ranking": "order"})
    assert data.kind == "ranking" and data.rows() == [{"prompt": "q", "responses": ["a", "b"], "ranking": [1, 0],
                                                       "weight": 1.0}]
    with pytest.raises(ValueError, match=r"columns: prompt, responses, ranking \(rows of kind ranking\) must be "
                                         r"different columns"):
        load_pairs(path, columns={"prompt": "question", "responses": "question"})


def test_a_pair_file_with_an_extra_label_column_stays_a_pair_file(tmp_path):
    path = _jsonl(tmp_path / "pairs.jsonl", [{"prompt": "q", "winner": "a", "loser": "b", "label": "x"}])
    assert load_pairs(path).kind == "pairs"


@pytest.mark.parametrize("rows,message", [
    ([{"prompt": "q", "winner": "a", "loser": "b"}, {"prompt": "q", "responses": ["a", "b"], "ranking": [0, 1]}],
     r"rows\.jsonl: line 2 is a ranking \(responses \+ ranking\) row but line 1 is a pairs \(winner \+ loser\) row; "
     r"a file holds one kind of row: split it into one file per kind$"),
    ([{"prompt": "q", "responses": ["a", "b"], "ranking": [0, 1], "scores": [1, 2]}],
     r"line 1 fills the fields of two kinds of row, ranking \(responses \+ ranking\) and scored \(responses \+ "
     r"scores\)"),
])
def test_a_file_mixing_kinds_is_refused_in_one_line(rows, message, tmp_path):
    with pytest.raises(ValueError, match=message):
        load_pairs(_jsonl(tmp_path / "rows.jsonl", rows))


def test_polopt_data_reports_the_kind_and_refuses_a_mixed_file(desk, tmp_path, capsys):
    out, written = desk
    assert main(["data", str(out / "scored.jsonl"), f"hydra.run.dir={tmp_path / 'report'}"]) == 0
    text = capsys.readouterr().out
    assert "row kind       scored (responses + scores); responses per row (accepted) 3: 12" in text
    assert "row length (bytes: prompt + longest response)" in text
    assert json.loads((tmp_path / "report" / "report.json").read_text())["row_kind"] == "scored"
    mixed = _jsonl(tmp_path / "mixed.jsonl", [*written["unpaired"][:2], *written["ranking"][:1]])
    assert main(["data", str(mixed), f"hydra.run.dir={tmp_path / 'mixed'}"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("polopt data: error: ")
    assert "line 3 is a ranking (responses + ranking) row but line 1 is a unpaired (response + label) row" in err


def test_a_file_of_no_kind_names_the_pair_columns_and_the_other_kinds(tmp_path):
    path = _jsonl(tmp_path / "rows.jsonl", [{"prompt": "q", "responses": ["a", "b"]}])
    with pytest.raises(ValueError, match=r"missing column\(s\) winner, loser; .* A file of another kind of row has "
                                         r"prompt with response \+ label \(unpaired\), responses \+ ranking, or "
                                         r"responses \+ scores\."):
        load_pairs(path)


anything = st.one_of(json_values, st.text(max_size=6))
texts = st.lists(st.one_of(st.text(max_size=5), json_values), max_size=4)
group_rows = st.one_of(
    st.fixed_dictionaries({"prompt": anything, "responses": st.one_of(texts, anything),
                           "ranking": st.one_of(st.permutations(range(3)).map(list), anything)}),
    st.fixed_dictionaries({"prompt": anything, "responses": st.one_of(texts, anything),
                           "scores": st.one_of(st.lists(st.floats(), max_size=4), anything)}),
    st.fixed_dictionaries({"prompt": anything, "response": anything, "label": anything}),
)


@FUZZ
@given(rows=st.lists(group_rows, max_size=8), limit=st.sampled_from([None, 4, 12]),
       truncation=st.sampled_from(["reject", "truncate_response", "truncate_prompt"]))
def test_any_rows_load_and_balance_or_refuse_in_one_line(tmp_path, rows, limit, truncation):
    """Rows of every kind with values of any JSON type (tests/helpers_fuzz.py): the file loads with every row
    accepted or rejected once, or is refused in one line (a file mixing kinds)."""
    path = tmp_path / "rows.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    data = assert_loads_or_one_line_error(lambda p: load_pairs(p, max_length=limit, truncation=truncation), path)
    if data is not None:
        a = data.accounting
        assert a["rows_in"] == len(rows) == a["rows_accepted"] + a["rows_rejected"]
        assert len(data.rejects) == a["rows_rejected"] and len(data) == a["rows_accepted"]
