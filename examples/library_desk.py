"""Invented preference pairs from the help desk of a fictional library, with bad rows on request.

The Quillbury Lending Library (it does not exist) answers its patrons' questions
by chat; for each question there is a more helpful reply (the winner: specific,
polite, gives the next step) and a less helpful one (the loser: vague or curt).
Every name, place and number here is made up by this script.

    python examples/library_desk.py OUT_DIR [--pairs 200] [--bad] [--weights] [--seed 0]

writes ``pairs.jsonl``, ``pairs.csv``, ``pairs.parquet`` and a saved dataset
folder ``pairs_folder/`` (with ``--bad``: the same good pairs, with bad rows of
every kind the format can hold mixed in), and ``expected.json``: the good pairs
in order and, for each file, every bad row's location, field and reason. The
tests read that manifest to check that each bad row is reported and that no
good row is lost; ``polopt data OUT_DIR/pairs.jsonl task.max_length=400`` shows it.

    python examples/library_desk.py OUT_DIR --kind ranking|scored|unpaired [--pairs 200] [--seed 0]

writes the same desk's feedback as rows of another kind instead, ``KIND.jsonl``, ``KIND.csv`` (lists as
JSON arrays in their cells) and ``KIND.parquet`` (list columns): ``ranking`` rows rank three replies
(the helpful one, a neutral one, the curt one; ``ranking[i]`` is the rank of ``responses[i]``, 0 = best,
listed in a seeded order), ``scored`` rows give the same replies a helpfulness score (2, 1, 0, plus
seeded noise), ``unpaired`` rows are single replies labelled 1 (helpful) or 0 (curt). With ``--bad``,
bad rows of the kind are mixed in (those each format can hold) and ``KIND-expected.json`` records the
good rows and, per file, every bad row's location, field and reason.
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import math
import random
from pathlib import Path

MAX_LENGTH = 400  # bytes; the too-long rows are built to exceed it, every good row stays within it

_TOPICS = [
    ("renew {item}", "You can renew {item} up to {n} times at the self-service kiosk or by replying RENEW with your "
                     "card number; the new due date is {days} days from today.",
     "Renewals are possible sometimes."),
    ("find {item} about {subject}", "Try shelf {shelf} on the {floor} floor for {subject}; if {item} is out, I can "
                                    "place a hold and text you when it is back.",
     "Look around, it is probably somewhere."),
    ("book the {room}", "The {room} is free on {day} from {hour}:00; I have pencilled you in, just confirm with "
                        "your card number by {hour2}:00.",
     "Rooms get booked. Ask again later."),
    ("replace a lost card", "A replacement card costs {n} tokens at the front desk on {day}; bring any letter "
                            "with your address and your old holds carry over.",
     "Cards are not our problem."),
    ("return {item} after hours", "Use the brass drop slot beside the {floor} floor entrance; items dropped "
                                  "after closing are checked in the next morning with no late fee.",
     "We are closed then."),
]
_FILL = {
    "item": ["the atlas of tides", "a seed-catalogue", "the lantern-making manual", "three picture books",
             "the recipe almanac", "a jigsaw of the old harbour", "le guide des étoiles", "星の図鑑"],
    "subject": ["beekeeping", "canal boats", "moss gardens", "clockwork", "weather lore", "café history",
                "origami ☂", "knot tying"],
    "room": ["Reed Room", "Lantern Hall", "quiet study 2", "map room"],
    "day": ["Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday"],
    "floor": ["ground", "first", "second"],
    "shelf": ["B12", "C3", "D7", "K1", "M9"],
}
_OPENERS = ["Hello, how do I {task}?", "Can you help me {task}, please?", "hi! I need to {task}",
            "Is it possible to {task} this week?", "Quick one: {task}?\n(asking for my grandmother)"]


def _fill(template: str, rng: random.Random) -> str:
    values = {k: rng.choice(v) for k, v in _FILL.items()}
    hour = rng.randint(9, 16)
    values.update(n=rng.randint(2, 5), days=rng.choice([7, 14, 21]), hour=hour, hour2=hour + 1)
    return template.format(**values)


def good_pairs(n: int, seed: int = 0, *, weights: bool = False) -> list[dict]:
    """``n`` distinct valid pairs; some carry text that stresses readers (quotes, commas,
    newlines, non-ASCII, emoji, surrounding spaces) and one is a contradicting label (the
    pair before it with winner and loser swapped), which is valid data, not a duplicate."""
    rng = random.Random(seed)
    rows, seen, tries = [], set(), 0
    while len(rows) < n:
        tries += 1
        if tries > 100 * n + 1000:
            raise ValueError(f"the library desk can make about 6000 distinct pairs, asked for {n}")
        task_t, good_t, bad_t = rng.choice(_TOPICS)
        state = rng.getstate()
        task = _fill(task_t, rng)
        rng.setstate(state)  # the reply refers to the same item and room as the question
        winner = _fill(good_t, rng)
        prompt = rng.choice(_OPENERS).format(task=task)
        loser = bad_t
        k = len(rows)
        if k % 7 == 3:
            winner = f'{winner} Staff say: "mind the step, it\'s steep", thanks.'
        if k % 11 == 5:
            loser = f"  {loser} 🙃  "
        if k % 13 == 8:
            prompt = f"{prompt}\r\nP.S. the kiosk said: ERROR,42"
        key = (prompt, winner, loser)
        if key in seen or len(prompt.encode()) + max(len(winner.encode()), len(loser.encode())) > MAX_LENGTH:
            continue
        seen.add(key)
        row = {"prompt": prompt, "winner": winner, "loser": loser}
        if weights:
            row["weight"] = round(rng.uniform(0.2, 3.0), 3)
        rows.append(row)
    if n >= 10:  # a contradicting label: valid, kept
        swap = dict(rows[8], winner=rows[8]["loser"], loser=rows[8]["winner"])
        rows[9] = swap
    return rows


def _long_row(rng: random.Random, weights: bool) -> dict:
    row = {"prompt": "Please tell me everything about the reading room rules.",
           "winner": "Here is the full list: " + " ".join(f"rule {i}: be kind to the books." for i in range(40)),
           "loser": "There are rules."}
    if weights:
        row["weight"] = 1.0
    return row


# Bad rows: (field, reason, how) per format; "how" is turned into the format's own form below.
# field is our field name (None: the row as a whole). The reasons are polopt.data.rows.REASONS' codes.
_BAD_JSONL = [
    ("winner", "missing", "absent"), ("loser", "missing", "null"), ("prompt", "not_a_string", "number"),
    ("winner", "not_a_string", "list"), ("loser", "not_a_string", "bool"), ("prompt", "empty", ""),
    ("winner", "empty", "  \n\t"), ("loser", "identical", "identical"), ("winner", "invalid_utf8", "raw_bytes"),
    ("prompt", "invalid_utf8", "lone_surrogate"), (None, "invalid_json", "broken"),
    (None, "not_an_object", "array"), (None, "too_long", "long"), (None, "duplicate", "duplicate"),
]
_BAD_CSV = [
    ("prompt", "empty", ""), ("loser", "empty", "   "), ("loser", "identical", "identical"),
    ("loser", "invalid_utf8", "raw_bytes"), (None, "wrong_field_count", "short"),
    (None, "wrong_field_count", "long_record"), (None, "too_long", "long"), (None, "duplicate", "duplicate"),
]
_BAD_TABLE = [
    ("prompt", "missing", "null"), ("winner", "empty", ""), ("loser", "identical", "identical"),
    ("winner", "invalid_utf8", "raw_bytes"), (None, "too_long", "long"), (None, "duplicate", "duplicate"),
]
_BAD_WEIGHTS = {  # weight cases per format: the value as the format holds it
    "jsonl": [0, -1.5, float("nan"), "heavy", True, None, 1e400],
    "csv": ["0", "-2", "nan", "heavy", "", "inf"],
    "table": [0.0, -1.0, float("nan"), float("inf"), None],
}


def _bad_row(how: str, field: str | None, good: list[dict], rng: random.Random, weights: bool):
    """A bad row as a dict of Python values (raw bytes as ``bytes``), or a marker string for
    rows that only exist as text (broken JSON, arrays, CSV records of the wrong size)."""
    base = dict(rng.choice(good))
    if how == "absent":
        del base[field]
    elif how == "null":
        base[field] = None
    elif how == "number":
        base[field] = 42
    elif how == "list":
        base[field] = ["a", "b"]
    elif how == "bool":
        base[field] = False
    elif how in ("", "  \n\t", "   "):
        base[field] = how
    elif how == "identical":
        base["loser"] = base["winner"]
    elif how == "raw_bytes":
        base[field] = base[field].encode() + b" caf\xe9 \xff"  # Latin-1 bytes, not UTF-8
    elif how == "lone_surrogate":
        base[field] = base[field] + "\ud800"
    elif how == "long":
        base = _long_row(rng, weights)
    elif how == "duplicate":
        return "duplicate"
    else:
        return how  # broken, array, short, long_record
    return base


def _mix(good: list[dict], bad: list, seed: int) -> list[tuple]:
    """Good and bad entries interleaved at seeded positions; good ones keep their order and
    each duplicate comes after the good row it repeats."""
    rng = random.Random(seed + 1)
    entries = [("good", i, row) for i, row in enumerate(good)]
    for item in bad:
        entries.insert(rng.randint(1, len(entries)), ("bad", *item))
    out, last_good = [], None
    for e in entries:
        if e[0] == "good":
            last_good = e[2]
        elif e[4] == "duplicate":
            if last_good is None:
                continue
            e = (*e[:4], dict(last_good))
        out.append(e)
    return out


def build(n: int = 200, seed: int = 0, *, bad: bool = True, weights: bool = False) -> dict:
    """Per format, the list of entries ``("good", i, row)`` or ``("bad", field, reason, how, row)``."""
    rng = random.Random(seed + 2)
    good = good_pairs(n, seed, weights=weights)
    plans = {}
    for fmt, cases in (("jsonl", _BAD_JSONL), ("csv", _BAD_CSV), ("table", _BAD_TABLE)):
        items = []
        if bad:
            for field, reason, how in cases:
                items.append((field, reason, how, _bad_row(how, field, good, rng, weights)))
            if weights:
                for value in _BAD_WEIGHTS[fmt]:
                    items.append(("weight", "bad_weight", "weight", dict(rng.choice(good), weight=value)))
        plans[fmt] = _mix(good, items, seed)
    return {"good": good, "plans": plans}


def _jsonl_line(row, names: dict) -> bytes:
    if row == "broken":
        return b'{"prompt": "When do you open?", "winner": "At nine'
    if row == "array":
        return b'["When do you open?", "At nine.", "Sometimes."]'
    # raw bytes ride through json.dumps as surrogate-escaped text and come back out as the bytes
    obj = {names[k]: v.decode("utf-8", "surrogateescape") if isinstance(v, bytes) else v for k, v in row.items()}
    text = json.dumps(obj, ensure_ascii=False)
    text = text.replace("\ud800", "\\ud800")  # the JSON escape of a lone surrogate: valid JSON, no UTF-8 form
    return text.encode("utf-8", "surrogateescape")


def write_jsonl(plan: list[tuple], path: Path, names: dict) -> list[dict]:
    """Write the entries one per line (and a blank line after the first), return the expected
    rejects with 1-based line numbers."""
    expected, lines = [], []
    for entry in plan:
        lines.append(_jsonl_line(entry[2] if entry[0] == "good" else entry[4], names))
        if entry[0] == "bad":
            expected.append({"line": len(lines), "field": entry[1], "reason": entry[2]})
        if len(lines) == 1:
            lines.append(b"")  # blank lines are skipped, not rows
    path.write_bytes(b"\n".join(lines) + b"\n")
    return expected


def write_csv(plan: list[tuple], path: Path, names: dict, weights: bool) -> list[dict]:
    header = [names["prompt"], "note", names["winner"], names["loser"]] + ([names["weight"]] if weights else [])
    return _write_csv_records(plan, path, header, lambda i, row: _pair_record(i, row, weights))


def _pair_record(i: int, row, weights: bool) -> list[bytes]:
    """Row i of a pair file's plan as a CSV record (two malformed records by name)."""
    if row == "short":
        return [b"When do you open?", b"x"]
    if row == "long_record":
        return [b"When do you open?", b"x", b"At nine.", b"Sometimes.", b"extra", b"more"]
    fields = [row["prompt"], f"note {i}", row["winner"], row["loser"]] + ([row["weight"]] if weights else [])
    return [v if isinstance(v, bytes) else str(v).encode() for v in fields]


def _write_csv_records(plan: list[tuple], path: Path, header: list, record_of) -> list[dict]:
    """Write the header and one record per entry (``record_of(i, row)``), return the expected rejects with
    1-based line numbers."""
    out, line, expected = io.BytesIO(), 2, []
    out.write(_csv_record(header))
    for i, entry in enumerate(plan):
        data = _csv_record(record_of(i, entry[2] if entry[0] == "good" else entry[4]))
        if entry[0] == "bad":
            expected.append({"line": line, "field": entry[1], "reason": entry[2]})
        out.write(data)
        line += data.count(b"\n")  # quoted newlines inside a record move the next record down
    path.write_bytes(out.getvalue())
    return expected


def _csv_record(fields: list) -> bytes:
    """One CSV record (RFC 4180 quoting) from byte strings, raw bytes kept as they are."""
    buffer = io.StringIO()
    csv.writer(buffer, lineterminator="\n").writerow(
        [f.decode("utf-8", "surrogateescape") if isinstance(f, bytes) else f for f in fields])
    return buffer.getvalue().encode("utf-8", "surrogateescape")


def table_columns(plan: list[tuple], names: dict, weights: bool):
    """Arrow arrays of the entries: text columns typed string (raw bytes kept as they are, so a
    value may be invalid UTF-8 exactly as a careless writer leaves it)."""
    import pyarrow as pa

    fields = ["prompt", "winner", "loser"] + (["weight"] if weights else [])
    rows = [e[2] if e[0] == "good" else e[4] for e in plan]
    arrays = {}
    for f in fields:
        values = [r.get(f) for r in rows]
        if f == "weight":
            arrays[names[f]] = pa.array([None if v is None else float(v) for v in values], type=pa.float64())
        else:
            raw = [None if v is None else v if isinstance(v, bytes) else v.encode() for v in values]
            arrays[names[f]] = pa.array(raw, type=pa.binary()).view(pa.string())
    arrays["note"] = pa.array([f"note {i}" for i in range(len(rows))])
    expected = [{"index": i, "field": e[1], "reason": e[2]} for i, e in enumerate(plan) if e[0] == "bad"]
    return pa.table(arrays), expected


def write_all(out: Path, n: int = 200, seed: int = 0, *, bad: bool = True, weights: bool = False,
              names: dict | None = None) -> dict:
    """Write the four files and ``expected.json``; return the manifest."""
    import datasets
    import pyarrow.parquet as pq

    names = {"prompt": "prompt", "winner": "winner", "loser": "loser", "weight": "weight"} | (names or {})
    out.mkdir(parents=True, exist_ok=True)
    built = build(n, seed, bad=bad, weights=weights)
    plans = built["plans"]
    manifest = {"good": built["good"], "max_length": MAX_LENGTH, "columns": names, "expected": {}}
    manifest["expected"]["jsonl"] = write_jsonl(plans["jsonl"], out / "pairs.jsonl", names)
    manifest["expected"]["csv"] = write_csv(plans["csv"], out / "pairs.csv", names, weights)
    table, expected = table_columns(plans["table"], names, weights)
    pq.write_table(table, out / "pairs.parquet")
    manifest["expected"]["parquet"] = expected
    datasets.disable_progress_bars()
    datasets.Dataset(table).save_to_disk(str(out / "pairs_folder"))
    manifest["expected"]["folder"] = expected
    (out / "expected.json").write_text(json.dumps(_finite(manifest), indent=1, ensure_ascii=False), encoding="utf-8")
    return manifest


def _finite(value):
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_finite(v) for v in value]
    return value


NEUTRAL = "Someone at the front desk can help with that."  # the middle reply of ranking and scored rows
KINDS = ("ranking", "scored", "unpaired")


def feedback_rows(kind: str, n: int, seed: int = 0) -> list[dict]:
    """The first ``n`` good pairs' replies as rows of ``kind`` (see the module docstring); seeded."""
    rng = random.Random(seed + 3)
    rows = []
    for pair in good_pairs(n, seed):
        if kind == "unpaired":
            rows.append({"prompt": pair["prompt"], "response": pair["winner"], "label": 1})
            rows.append({"prompt": pair["prompt"], "response": pair["loser"], "label": 0})
            continue
        replies = [(pair["winner"], 0, 2.0), (NEUTRAL, 1, 1.0), (pair["loser"], 2, 0.0)]  # (text, rank, score)
        rng.shuffle(replies)
        row = {"prompt": pair["prompt"], "responses": [r for r, _, _ in replies]}
        if kind == "ranking":
            row["ranking"] = [k for _, k, _ in replies]
        else:
            row["scores"] = [round(s + rng.uniform(-0.3, 0.3), 3) for _, _, s in replies]
        rows.append(row)
    return rows[:n] if kind == "unpaired" else rows


def _kind_cases(kind: str, good: list[dict], rng: random.Random) -> dict[str, list[tuple]]:
    """Bad rows of ``kind`` per format, (field, reason, row): the ones every format can hold, and the
    type errors JSON Lines (any JSON value) or CSV (any text in a cell) can."""
    def changed(**fields):
        return dict(rng.choice(good), **fields)

    def repeated(k: int):
        row = dict(rng.choice(good))
        row["responses"] = [*row["responses"][:k], row["responses"][0], *row["responses"][k + 1:]]
        return row

    dup = ("duplicate",) * 2
    if kind == "ranking":
        every = [("ranking", "not_a_permutation", changed(ranking=[0, 0, 1])),
                 ("ranking", "length_mismatch", changed(ranking=[0, 1])),
                 ("responses", "too_few_responses", changed(responses=[NEUTRAL], ranking=[0])),
                 ("responses[2]", "repeated_response", repeated(2)), ("prompt", "empty", changed(prompt="  ")),
                 (None, *dup)]
        jsonl = [("responses", "not_a_list", changed(responses=NEUTRAL)), ("ranking", "missing", changed(ranking=None)),
                 ("responses[1]", "not_a_string", changed(responses=[NEUTRAL, 5, "curt"]))]
        text = [("ranking", "not_a_list", changed(ranking="first, second, third"))]
    elif kind == "scored":
        every = [("scores", "bad_score", changed(scores=[1.0, float("nan"), 0.5])),
                 ("scores", "length_mismatch", changed(scores=[1.0, 0.5])),
                 ("responses[1]", "empty", changed(responses=[NEUTRAL, "", "curt"])), (None, *dup)]
        jsonl = [("scores", "bad_score", changed(scores=[1.0, "high", 0.5]))]
        text = [("responses", "not_a_list", changed(responses="helpful; neutral; curt"))]
    else:
        every = [("label", "bad_label", changed(label=2)), ("response", "empty", changed(response="")), (None, *dup)]
        jsonl = [("label", "bad_label", changed(label="yes")),
                 ("label", "missing", {k: v for k, v in rng.choice(good).items() if k != "label"})]
        text = [("label", "bad_label", changed(label="thumbs up"))]
    return {"jsonl": every + jsonl, "csv": every + text, "parquet": every}


def _cell(value) -> str:
    return json.dumps(value, ensure_ascii=False) if isinstance(value, list) else str(value)


def _write_kind_csv(plan: list[tuple], path: Path, columns: list[str]) -> list[dict]:
    return _write_csv_records(plan, path, columns,
                              lambda _, row: [_cell(row[c]) if c in row else "" for c in columns])


def write_kind(out: Path, kind: str, n: int = 200, seed: int = 0, *, bad: bool = False) -> list[dict]:
    """Write ``KIND.jsonl``, ``KIND.csv`` and ``KIND.parquet`` of :func:`feedback_rows` (with ``bad``: bad rows
    mixed in, and ``KIND-expected.json``, see the module docstring); return the good rows."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    out.mkdir(parents=True, exist_ok=True)
    rows = feedback_rows(kind, n, seed)
    cases = _kind_cases(kind, rows, random.Random(seed + 4)) if bad else {"jsonl": [], "csv": [], "parquet": []}
    plans = {fmt: _mix(rows, [(f, why, "bad", row) for f, why, row in items], seed)
             for fmt, items in cases.items()}
    entries = {fmt: [e[2] if e[0] == "good" else e[4] for e in plan] for fmt, plan in plans.items()}
    (out / f"{kind}.jsonl").write_text("".join(json.dumps(r, ensure_ascii=False) + "\n" for r in entries["jsonl"]),
                                       encoding="utf-8")
    expected = {"jsonl": [{"line": k + 1, "field": e[1], "reason": e[2]}
                          for k, e in enumerate(plans["jsonl"]) if e[0] == "bad"],
                "csv": _write_kind_csv(plans["csv"], out / f"{kind}.csv", list(rows[0])),
                "parquet": [{"index": k, "field": e[1], "reason": e[2]}
                            for k, e in enumerate(plans["parquet"]) if e[0] == "bad"]}
    pq.write_table(pa.Table.from_pylist(entries["parquet"]), out / f"{kind}.parquet")
    if bad:
        manifest = {"good": rows, "expected": expected}
        (out / f"{kind}-expected.json").write_text(json.dumps(_finite(manifest), indent=1, ensure_ascii=False),
                                                   encoding="utf-8")
    return rows


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("out", type=Path, help="folder to write the files into")
    parser.add_argument("--pairs", type=int, default=200, help="number of good pairs (default 200)")
    parser.add_argument("--bad", action="store_true", help="mix in bad rows of every kind")
    parser.add_argument("--weights", action="store_true", help="add a per-pair weight column")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--kind", choices=KINDS, help="write rows of this kind instead of pairs")
    args = parser.parse_args(argv)
    if args.kind is not None:
        rows = write_kind(args.out, args.kind, args.pairs, args.seed, bad=args.bad)
        print(f"wrote {args.out}/{args.kind}.jsonl, {args.kind}.csv and {args.kind}.parquet: {len(rows)} rows")
        return 0
    manifest = write_all(args.out, args.pairs, args.seed, bad=args.bad, weights=args.weights)
    bad = {k: len(v) for k, v in manifest["expected"].items()}
    print(f"wrote {args.out}/pairs.jsonl, pairs.csv, pairs.parquet, pairs_folder/ and expected.json: "
          f"{len(manifest['good'])} good pairs; bad rows per file: {bad}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
