"""The row checks one by one, on tiny files written here: truncation and its counting,
duplicates, weights, the traps of type-guessing readers, and the pinned error messages.

Expected values are derived by hand from the rows written in each test; byte lengths come
from Python's own UTF-8 encoder (RFC 3629).
"""

from __future__ import annotations

import json

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from polopt.data import Columns, load_pairs, load_pairs_from_config
from polopt.data.tokenizer import ByteTokenizer


def _jsonl(path, rows):
    path.write_text("".join(json.dumps(r, ensure_ascii=False) + "\n" for r in rows), encoding="utf-8")
    return path


def _pair(prompt="Where is the map room?", winner="Second floor, past the clocks.", loser="Upstairs.", **extra):
    return {"prompt": prompt, "winner": winner, "loser": loser, **extra}


# ------------------------------------------------------------------ truncation


def test_truncate_response_cuts_both_responses_to_the_room_left_and_counts_it(tmp_path):
    prompt, winner, loser = "Hours?", "We open at nine and close at five on weekdays.", "Nine to five."
    path = _jsonl(tmp_path / "p.jsonl", [_pair(prompt, winner, loser), _pair("Short?", "Yes.", "No.")])
    data = load_pairs(path, max_length=20, truncation="truncate_response")
    budget = 20 - len(prompt.encode())  # 14 bytes for each response
    assert data.winner[0] == winner.encode()[:budget].decode() and data.loser[0] == loser  # 13 bytes: fits
    assert data.length == [20, len("Short?") + len("Yes.")]
    a = data.accounting
    assert (a["rows_truncated"], a["truncated_fields"], a["tokens_removed"]) == (1, {"winner": 1},
                                                                                len(winner) - budget)
    assert a["rows_accepted"] == 2 and a["rows_rejected"] == 0


def test_truncation_never_splits_a_character(tmp_path):
    # "é" is 2 bytes and "☂" 3 in UTF-8: a cut at 8 bytes falls inside the umbrella
    winner = "aé☂☂☂"  # bytes: 1 + 2 + 3 + 3 + 3
    path = _jsonl(tmp_path / "p.jsonl", [_pair("Q", winner, "b")])
    data = load_pairs(path, max_length=1 + 8, truncation="truncate_response")
    assert data.winner == ["aé☂"]  # 6 bytes: the longest whole-character prefix within 8
    assert data.accounting["tokens_removed"] == len(winner.encode()) - 6


def test_truncate_prompt_keeps_the_end_of_the_prompt(tmp_path):
    prompt = "Earlier chat about the garden. Now: when do you open?"
    path = _jsonl(tmp_path / "p.jsonl", [_pair(prompt, "At nine.", "Later.")])
    data = load_pairs(path, max_length=30, truncation="truncate_prompt")
    assert data.prompt == [prompt[-(30 - len("At nine.")):]]
    assert data.accounting["truncated_fields"] == {"prompt": 1}


def test_reject_policy_and_the_cases_truncation_cannot_save(tmp_path):
    rows = [_pair("Q" * 30, "yes", "no"),              # line 1: prompt alone is over the limit
            _pair("Q", "same start then A", "same start then B"),  # line 2: equal once cut
            _pair("Q", "ok", "no")]                    # line 3: fits
    path = _jsonl(tmp_path / "p.jsonl", rows)
    rejected = load_pairs(path, max_length=12)
    assert [(r.location, r.reason) for r in rejected.rejects] == [(1, "too_long"), (2, "too_long")]
    assert "33 bytes (prompt 30 + longer response 3) > max_length 12" in rejected.rejects[0].detail
    cut = load_pairs(path, max_length=12, truncation="truncate_response")
    assert [(r.location, r.field, r.reason) for r in cut.rejects] == [(1, "prompt", "too_long"),
                                                                       (2, "loser", "identical")]
    assert cut.prompt == ["Q"] and cut.accounting["rows_truncated"] == 0


# ------------------------------------------------------------------ duplicates, identical, weights


def test_duplicates_keep_the_first_and_swapped_pairs_are_not_duplicates(tmp_path):
    a, swapped = _pair(weight=1), _pair(winner="Upstairs.", loser="Second floor, past the clocks.", weight=1)
    path = _jsonl(tmp_path / "p.jsonl", [a, swapped, a, dict(a, weight=2.0)])
    data = load_pairs(path)
    assert [(r.location, r.reason) for r in data.rejects] == [(3, "duplicate")]
    assert "as line 1" in data.rejects[0].detail
    assert data.location == [1, 2, 4]  # a different weight is a different row
    kept = load_pairs(path, duplicates="keep")
    assert kept.location == [1, 2, 3, 4] and kept.accounting["duplicate_rows"] == 1


def test_weights_must_be_finite_and_positive(tmp_path):
    rows = [_pair(weight=w) for w in (0.5, 2, 0, -1, "2", True, None)] + [_pair()]
    lines = [json.dumps(r) for r in rows]
    # Python's json reads NaN (an extension of RFC 8259), 2e999 as inf, and integers of any size
    lines += [json.dumps(_pair(prompt=p)).replace("}", f', "weight": {w}}}') for p, w in
              (("nan?", "NaN"), ("inf?", "2e999"), ("huge?", "1" + "0" * 400))]
    path = tmp_path / "p.jsonl"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    data = load_pairs(path, duplicates="keep")
    assert data.weight == [0.5, 2.0]
    got = [(r.location, r.field, r.reason, r.detail) for r in data.rejects]
    assert got == [(3, "weight", "bad_weight", "weight 0 is not > 0"),
                   (4, "weight", "bad_weight", "weight -1 is not > 0"),
                   (5, "weight", "bad_weight", "weight is a str ('2'), not a number"),
                   (6, "weight", "bad_weight", "weight is a bool (True), not a number"),
                   (7, "weight", "bad_weight", "weight is null"), (8, "weight", "bad_weight", "weight is absent"),
                   (9, "weight", "bad_weight", "weight nan is not finite"),
                   (10, "weight", "bad_weight", "weight inf is not finite"),
                   (11, "weight", "bad_weight", f"weight {'1' + '0' * 36}... is not finite")]


def test_a_row_with_several_problems_lists_them_all(tmp_path):
    path = _jsonl(tmp_path / "p.jsonl", [{"prompt": "", "winner": 7, "weight": -1}, _pair(weight=1)])
    (reject,) = load_pairs(path).rejects
    assert (reject.field, reject.reason) == ("prompt", "empty")
    assert [(p["field"], p["reason"]) for p in reject.other_problems] == [
        ("winner", "not_a_string"), ("loser", "missing"), ("weight", "bad_weight")]


def test_identical_winner_and_loser(tmp_path):
    path = _jsonl(tmp_path / "p.jsonl", [_pair(winner="Same.", loser="Same."), _pair(winner="Same.", loser="Same. ")])
    data = load_pairs(path)
    assert [(r.location, r.field, r.reason) for r in data.rejects] == [(1, "loser", "identical")]
    assert data.loser == ["Same. "]  # exact comparison: a trailing space makes a different text


# ------------------------------------------------------------------ what type-guessing readers would change


def test_jsonl_text_that_looks_like_a_date_or_number_is_kept_exactly(tmp_path):
    """pyarrow's JSON reader (behind datasets' json builder) would turn "2024-01-01" into a
    timestamp; this loader keeps the text and rejects a real number."""
    path = _jsonl(tmp_path / "p.jsonl", [_pair(prompt="2024-01-01"), _pair(prompt="007"), _pair(prompt=5)])
    data = load_pairs(path)
    assert data.prompt == ["2024-01-01", "007"]
    assert [(r.location, r.reason) for r in data.rejects] == [(3, "not_a_string")]


def test_csv_values_stay_text_exactly(tmp_path):
    """pandas would read "007" as 7 and "NA" or an empty field as missing."""
    path = tmp_path / "p.csv"
    path.write_text('prompt,winner,loser\n007,NA,null\n"a, b","line one\nline two", "  spaced "\n2024-01-01,,x\n',
                    encoding="utf-8")
    data = load_pairs(path)
    assert data.rows() == [{"prompt": "007", "winner": "NA", "loser": "null", "weight": 1.0},
                           {"prompt": "a, b", "winner": "line one\nline two", "loser": ' "  spaced "', "weight": 1.0}]
    assert [(r.location, r.field, r.reason) for r in data.rejects] == [(5, "winner", "empty")]
    assert data.accounting["reader"].startswith("datasets csv")


def test_parquet_text_column_of_numbers_rejects_every_row(tmp_path):
    table = pa.table({"prompt": [1, 2], "winner": ["a", "b"], "loser": ["c", "d"]})
    pq.write_table(table, tmp_path / "p.parquet")
    data = load_pairs(tmp_path / "p.parquet")
    assert [(r.location, r.field, r.reason) for r in data.rejects] == [(0, "prompt", "not_a_string")] + [
        (1, "prompt", "not_a_string")]
    assert data.accounting["row_unit"] == "index"


# ------------------------------------------------------------------ file shapes


def test_bom_crlf_blank_lines_and_no_final_newline(tmp_path):
    body = "\r\n".join(json.dumps(r) for r in (_pair(), _pair(prompt="Two?"))) + "\r\n\r\n" + json.dumps(
        _pair(prompt="Three?"))
    path = tmp_path / "p.jsonl"
    path.write_bytes(b"\xef\xbb\xbf" + body.encode())
    data = load_pairs(path)
    assert data.location == [1, 2, 4] and data.prompt[1] == "Two?"
    assert data.accounting["blank_lines"] == 1 and data.accounting["rows_in"] == 3


def test_json_array_file_uses_indices(tmp_path):
    path = tmp_path / "p.json"
    path.write_text(json.dumps([_pair(), "not an object", _pair(winner="")]), encoding="utf-8")
    data = load_pairs(path)
    assert [(r.unit, r.location, r.reason) for r in data.rejects] == [("index", 1, "not_an_object"),
                                                                      ("index", 2, "empty")]


def test_json_array_with_a_bad_byte_rejects_only_that_row(tmp_path):
    path = tmp_path / "p.json"
    path.write_bytes(b'[{"prompt": "caf\xe9?", "winner": "b", "loser": "c"},\n'
                     b' {"prompt": "ok", "winner": "b", "loser": "c"}]')
    data = load_pairs(path)
    assert data.prompt == ["ok"]
    (reject,) = data.rejects
    assert (reject.location, reject.field, reject.reason) == (0, "prompt", "invalid_utf8")
    assert reject.detail == "prompt: byte 4 (0xe9) is not valid UTF-8"
    assert reject.row["prompt"] == "caf\\xe9?"  # the byte, shown escaped in the rejects file


def test_an_unbalanced_csv_quote_loses_only_its_own_line(tmp_path):
    path = tmp_path / "p.csv"
    path.write_text('prompt,winner,loser\na,b,c\n"d,e,f\ng,h,i\nj,k,l\n', encoding="utf-8")
    data = load_pairs(path)
    assert data.prompt == ["a", "g", "j"] and data.location == [2, 4, 5]
    assert [(r.location, r.reason) for r in data.rejects] == [(3, "wrong_field_count")]
    assert "only line 3 is rejected" in data.rejects[0].detail


def test_saved_dataset_dict_picks_the_split(tmp_path):
    import datasets

    datasets.disable_progress_bars()
    dd = datasets.DatasetDict({"train": datasets.Dataset.from_list([_pair()]),
                               "test": datasets.Dataset.from_list([_pair(), _pair(prompt="Other?")])})
    dd.save_to_disk(str(tmp_path / "dd"))
    assert len(load_pairs(tmp_path / "dd")) == 1
    assert len(load_pairs(tmp_path / "dd", split="test")) == 2
    with pytest.raises(ValueError, match=r"split 'dev' not found; the folder has: train, test"):
        load_pairs(tmp_path / "dd", split="dev")


def test_empty_files_have_zero_rows(tmp_path):
    for name in ("e.jsonl", "e.csv"):
        (tmp_path / name).write_text("", encoding="utf-8")
        a = load_pairs(tmp_path / name).accounting
        assert (a["rows_in"], a["rows_accepted"], a["rows_rejected"]) == (0, 0, 0)


def test_to_dataset_and_config_entry(tmp_path):
    from omegaconf import OmegaConf

    path = _jsonl(tmp_path / "p.jsonl", [{"q": "Hi?", "good": "Hello, welcome.", "bad": "What.", "w": 3}])
    cfg = OmegaConf.create({"path": str(path), "columns": {"prompt": "q", "winner": "good", "loser": "bad",
                                                           "weight": "w"}, "mode": "sampled"})
    data = load_pairs_from_config(cfg)
    ds = data.to_dataset()
    assert ds.column_names == ["prompt", "winner", "loser", "weight", "line"]
    assert ds[0] == {"prompt": "Hi?", "winner": "Hello, welcome.", "loser": "What.", "weight": 3.0, "line": 1}


# ------------------------------------------------------------------ pinned messages


def test_file_level_errors(tmp_path):
    with pytest.raises(ValueError, match=r"pair file not found: '.*nope.jsonl' \(a data set name on the hub is read "
                                         r"only with hub=true"):
        load_pairs(tmp_path / "nope.jsonl")
    (tmp_path / "p.txt").write_text("x", encoding="utf-8")
    with pytest.raises(ValueError, match=r"cannot tell the format of .*p.txt.* from its suffix '.txt'"):
        load_pairs(tmp_path / "p.txt")
    (tmp_path / "d.csv").write_text("prompt,prompt,winner,loser\n", encoding="utf-8")
    with pytest.raises(ValueError, match=r"the CSV header names column\(s\) 'prompt' more than once"):
        load_pairs(tmp_path / "d.csv")
    (tmp_path / "bad.parquet").write_bytes(b"not parquet")
    with pytest.raises(ValueError, match=r"datasets cannot read it as parquet"):
        load_pairs(tmp_path / "bad.parquet")
    with pytest.raises(ValueError, match=r"format hub reads a data set from the hub; it must be asked for with "
                                         r"hub=true"):
        load_pairs("someone/pairs", format="hub")


@pytest.mark.parametrize(("kwargs", "message"), [
    ({"truncation": "cut"}, r"truncation must be one of reject, truncate_response, truncate_prompt, got 'cut'"),
    ({"duplicates": "drop"}, r"duplicates must be one of reject, keep, got 'drop'"),
    ({"max_length": 1}, r"max_length must be an integer >= 2 \(tokens\) or null \(no limit\), got 1"),
    ({"format": "xml"}, r"format must be one of auto, jsonl, csv, parquet, folder, hub, got 'xml'"),
])
def test_policy_errors(tmp_path, kwargs, message):
    path = _jsonl(tmp_path / "p.jsonl", [_pair()])
    with pytest.raises(ValueError, match=message):
        load_pairs(path, **kwargs)


@pytest.mark.parametrize(("mapping", "error", "message"), [
    ({"answer": "x"}, ValueError, r"columns: unknown key 'answer'; the keys are prompt, winner, loser, "
                                r"response, label, responses, ranking, scores, weight"),
    ({"prompt": ""}, ValueError, r"columns.prompt must be a column name \(a non-empty string\), got ''"),
    ({"winner": "prompt"}, ValueError, r"prompt, winner and loser must be three different columns"),
    ("prompt:q", ValueError, r"columns must look like prompt=NAME,winner=NAME"),
    (["prompt"], TypeError, r"columns must be a mapping of prompt, winner, loser, response, label, responses, ranking, "
                      r"scores, weight to column names, got list"),
])
def test_column_mapping_errors(mapping, error, message):
    with pytest.raises(error, match=message):
        Columns.parse(mapping)


def test_column_mapping_from_the_command_line_form():
    cols = Columns.parse("prompt=question, winner=good_reply,loser=other_reply,weight=w")
    assert cols.mapping() == {"prompt": "question", "winner": "good_reply", "loser": "other_reply", "weight": "w"}
    assert cols.weight_required and not Columns.parse({"prompt": "q"}).weight_required


def test_lengths_are_bytes_of_utf8_with_the_byte_tokenizer(tmp_path):
    path = _jsonl(tmp_path / "p.jsonl", [_pair("Ça?", "Oui ☂", "Non")])
    data = load_pairs(path, tokenizer=ByteTokenizer())
    assert data.length == [len("Ça?".encode()) + len("Oui ☂".encode())]  # 4 + 7


def test_lines_the_json_module_refuses_are_rejects_not_crashes(tmp_path):
    deep = "[" * 100_000 + "]" * 100_000  # deeper than the json module's recursion allows
    long_int = "1" * 5000  # beyond Python's 4300-digit limit for int conversion (a ValueError)
    lines = [json.dumps(_pair()), f'{{"prompt": {deep}}}', f'{{"prompt": "a", "winner": "b", "loser": "c", '
             f'"weight": {long_int}}}', "{'prompt': 'single quotes'}"]
    path = tmp_path / "p.jsonl"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    data = load_pairs(path)
    assert [(r.location, r.reason) for r in data.rejects] == [(2, "invalid_json"), (3, "invalid_json"),
                                                               (4, "invalid_json")]
    assert data.accounting["balance"] == "rows_in 4 = rows_accepted 1 + rows_rejected 3"
