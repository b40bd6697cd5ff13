"""Mixed files of good and bad rows in every format: each bad row reported where it is, no good
row lost, the row accounting exact.

The files come from examples/library_desk.py, which writes the bad rows itself and records,
independently of the loader, the line (JSONL, CSV: counted as it writes, quoted newlines
included) or index (Parquet, saved folder) and the field and reason of each one, and the good
pairs in order. UTF-8 validity is Python's codec (RFC 3629); JSON is RFC 8259; CSV quoting is
RFC 4180 as Python's csv module writes it.
"""

from __future__ import annotations

import json

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from examples.library_desk import MAX_LENGTH, write_all
from polopt.data import load_pairs, write_rejects

FILES = {"jsonl": "pairs.jsonl", "csv": "pairs.csv", "parquet": "pairs.parquet", "folder": "pairs_folder"}
MAPPED = {"prompt": "question", "winner": "good_reply", "loser": "other_reply", "weight": "w"}


@pytest.fixture(scope="module")
def weighted(tmp_path_factory):
    out = tmp_path_factory.mktemp("weighted")
    return out, write_all(out, 60, seed=1, bad=True, weights=True)


@pytest.fixture(scope="module")
def mapped(tmp_path_factory):
    out = tmp_path_factory.mktemp("mapped")
    return out, write_all(out, 45, seed=2, bad=True, weights=False, names=MAPPED)


def _found(data):
    return [{r.unit: r.location, "field": r.field, "reason": r.reason} for r in data.rejects]


@pytest.mark.parametrize("fmt", FILES)
def test_every_bad_row_reported_and_no_good_row_lost(weighted, fmt):
    out, manifest = weighted
    data = load_pairs(out / FILES[fmt], max_length=MAX_LENGTH)
    assert _found(data) == manifest["expected"][fmt]
    assert data.rows() == manifest["good"]  # the same pairs, weights and order as written
    a = data.accounting
    assert a["rows_in"] == len(manifest["good"]) + len(manifest["expected"][fmt])
    assert a["rows_in"] == a["rows_accepted"] + a["rows_rejected"]
    assert a["balance"] == f"rows_in {a['rows_in']} = rows_accepted {a['rows_accepted']} + rows_rejected " \
                           f"{a['rows_rejected']}"
    assert a["weighted"] is True
    assert sum(a["rejected_by_reason"].values()) == a["rows_rejected"]


@pytest.mark.parametrize("fmt", FILES)
def test_column_mapping_reads_other_names(mapped, fmt):
    out, manifest = mapped
    names = {k: v for k, v in MAPPED.items() if k != "weight"}  # the file has no w column
    data = load_pairs(out / FILES[fmt], columns=names, max_length=MAX_LENGTH)
    assert _found(data) == manifest["expected"][fmt]
    assert [{k: r[k] for k in ("prompt", "winner", "loser")} for r in data.rows()] == manifest["good"]
    assert data.weight == [1.0] * len(manifest["good"])  # no weight column: weight 1
    assert data.accounting["columns"] == {"prompt": "question", "winner": "good_reply", "loser": "other_reply",
                                          "weight": None}


@pytest.mark.parametrize("fmt", FILES)
def test_default_names_on_a_mapped_file_is_one_file_level_error(mapped, fmt):
    out, _ = mapped
    with pytest.raises(ValueError, match=r"missing column\(s\) prompt, winner, loser; the file has: .*question.*"
                                         r"Map your names with task.columns"):
        load_pairs(out / FILES[fmt])


def test_every_reason_of_each_format_occurs(weighted):
    """The mixed files hold every kind of bad row the format can hold."""
    _, manifest = weighted
    reasons = {fmt: {e["reason"] for e in exp} for fmt, exp in manifest["expected"].items()}
    common = {"missing", "empty", "identical", "invalid_utf8", "too_long", "duplicate", "bad_weight"}
    assert reasons["jsonl"] == common | {"not_a_string", "invalid_json", "not_an_object"}
    assert reasons["csv"] == (common - {"missing"}) | {"wrong_field_count"}  # CSV has no null
    assert reasons["parquet"] == common


@pytest.mark.parametrize("fmt", FILES)
def test_rejects_file_holds_each_reject_with_its_row(weighted, tmp_path, fmt):
    out, manifest = weighted
    data = load_pairs(out / FILES[fmt], max_length=MAX_LENGTH)
    path = write_rejects(data.rejects, tmp_path / "rejects.jsonl")
    records = [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]
    unit = "index" if fmt in ("parquet", "folder") else "line"
    assert [{unit: r[unit], "field": r["field"], "reason": r["reason"]} for r in records] == manifest["expected"][fmt]
    assert all(r["detail"] and r["row"] is not None for r in records)
    # the original content is kept: a too-long row's winner is there in full
    long_row = next(r for r in records if r["reason"] == "too_long")
    assert len(long_row["row"]["winner"].encode()) > MAX_LENGTH


def test_invalid_utf8_is_located_to_the_field_and_byte(weighted):
    out, _ = weighted
    data = load_pairs(out / "pairs.jsonl", max_length=MAX_LENGTH)
    raw = next(r for r in data.rejects if r.reason == "invalid_utf8" and r.field == "winner")
    line = (out / "pairs.jsonl").read_bytes().split(b"\n")[raw.location - 1]
    # the generator appended b" caf\xe9 \xff": 0xe9 is where Python's strict decoder stops
    assert b"caf\xe9" in line
    assert "(0xe9) is not valid UTF-8" in raw.detail
    surrogate = next(r for r in data.rejects if r.reason == "invalid_utf8" and r.field == "prompt")
    assert "lone surrogate" in surrogate.detail


def test_a_weight_column_named_explicitly_must_exist(mapped):
    out, _ = mapped
    message = r"missing column\(s\) w; the file has: 'question', 'good_reply', 'other_reply'"
    with pytest.raises(ValueError, match=message):
        load_pairs(out / "pairs.jsonl", columns=MAPPED)


_PIECES = [b'{"prompt": "a", "winner": "b", "loser": "c"}', b'"', b",", b"\n", b"\r", b"\xff", b"\xe9", b"{", b"}",
           b"[", b"]", b'"prompt"', b'"winner"', b'"loser"', b'"weight"', b":", b"1", b"-0", b"null", b"NaN", b" ",
           b"prompt,winner,loser\n", b"prompt,winner,loser,weight\n", b"\xef\xbb\xbf", b"\x00", b"\\", b"\\ud800"]


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.sampled_from(_PIECES), max_size=40).map(b"".join) | st.binary(max_size=200),
       st.sampled_from([".jsonl", ".csv", ".json", ".tsv"]))
def test_any_bytes_give_a_file_error_or_exact_accounting(tmp_path, data, suffix):
    """Whatever the bytes, the loader either raises one ValueError for the file or accounts for
    every row (common practice for loaders: no other exception escapes)."""
    path = tmp_path / f"fuzz{suffix}"
    path.write_bytes(data)
    try:
        loaded = load_pairs(path, max_length=8, truncation="truncate_response")
    except ValueError as err:
        assert str(err) and "\n" not in str(err).strip()
        return
    a = loaded.accounting
    assert a["rows_in"] == a["rows_accepted"] + a["rows_rejected"] == len(loaded) + len(loaded.rejects)
    json.dumps([r.record() for r in loaded.rejects], allow_nan=False)  # every reject can be written


_VALUES = st.one_of(st.none(), st.booleans(), st.integers(), st.floats(), st.text(max_size=6),
                    st.sampled_from(["", " ", "\t\n", "a\ud800", "x"]), st.lists(st.text(max_size=2), max_size=2))


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.fixed_dictionaries({}, optional={"prompt": _VALUES, "winner": _VALUES, "loser": _VALUES}),
                min_size=1, max_size=12))
def test_jsonl_rows_accepted_exactly_when_their_fields_are_valid(tmp_path, rows):
    """An oracle written from the rules alone: text fields are strings with a UTF-8 form that are
    not blank, and winner differs from loser."""
    rows = [{"prompt": "p", "winner": "w", "loser": "l"}] + rows  # the columns exist in the file
    path = tmp_path / "f.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")

    def valid(text):
        try:
            text.encode("utf-8")
        except (UnicodeEncodeError, AttributeError):
            return False
        return isinstance(text, str) and bool(text.strip())

    expected = [i + 1 for i, r in enumerate(rows)
                if all(valid(r.get(f)) for f in ("prompt", "winner", "loser")) and r["winner"] != r["loser"]]
    data = load_pairs(path, duplicates="keep")
    assert data.location == expected
    assert data.rows() == [dict(rows[i - 1], weight=1.0) for i in expected]
