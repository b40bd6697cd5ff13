"""One streaming pass over a pair file: read, check, count, deduplicate, hand on the accepted rows.

``task.stream=true`` must not hold anything proportional to the file. This module
reads a JSON Lines or Parquet file :data:`CHUNK` rows at a time (a JSON Lines file
line by line, a Parquet file by pyarrow's record batches), checks each chunk with
the same row checks as the in-memory path (:func:`polopt.data.validate.validate`,
whose own duplicate check sees one chunk only and is switched off here), and finds
duplicates over the whole file by a disk-backed set: the SHA-256 digest (16 bytes
kept) of each accepted row's ``(prompt, winner, loser, weight)`` goes into an
SQLite table with that digest as its primary key (the standard library's
``sqlite3``; its page cache is bounded, the table lives in a file beside the run).
A collision of 128-bit digests among n rows has probability about n^2 / 2^129
(birthday bound), ~1e-27 for a million rows.

Rejects go to ``rejects.jsonl`` as they are found, in file order; the accounting
(:func:`accounting`) keeps ``rows_in = rows_accepted + rows_rejected`` and the keys
of the in-memory path's. Accepted rows come out of :func:`accepted_chunks` as
chunks of token lists (prompt ``bos + tokens``, responses ``tokens + eos``), for an
Arrow writer (:func:`polopt.pairfile.mapped.write_arrow`).
"""

from __future__ import annotations

import codecs
import hashlib
import json
import sqlite3
import time
from collections import Counter
from collections.abc import Iterator
from pathlib import Path

from polopt.data.kinds import complete_kinds, describe
from polopt.data.read import (
    TABLE_SUFFIXES,
    TEXT_SUFFIXES,
    RawTable,
    _check_columns,
    _json_error,
    _json_table,
    _undecodable_json_line,
    _wanted,
    arrow_values,
)
from polopt.data.rows import REASONS, TEXT_FIELDS, Columns, Reject, representable
from polopt.data.validate import check_policies, validate

CHUNK = 4096  # rows read, checked and written at a time


def _kind(path: Path, format: str) -> str:
    if not path.is_file():
        raise ValueError(f"pair file not found: {str(path)!r} (task.stream=true reads a local JSON Lines or "
                         "Parquet file)")
    kind = format if format != "auto" else TEXT_SUFFIXES.get(path.suffix.lower()) or \
        TABLE_SUFFIXES.get(path.suffix.lower())
    if kind not in ("jsonl", "parquet") or path.suffix.lower() == ".json" and format == "auto":
        raise ValueError(f"task.stream=true reads JSON Lines (.jsonl, .ndjson) or Parquet files, got {str(path)!r} "
                         f"(format {kind or format}); convert it with polopt data, or set task.stream=false")
    return kind


def _jsonl_chunks(path: Path, columns: Columns) -> Iterator[RawTable]:
    rows, early, blank = [], [], 0
    with path.open("rb") as f:
        for number, raw in enumerate(f, 1):
            if number == 1 and raw.startswith(codecs.BOM_UTF8):
                raw = raw[len(codecs.BOM_UTF8):]
            raw = raw.rstrip(b"\n")
            raw = raw[:-1] if raw.endswith(b"\r") else raw
            if not raw.strip():
                blank += 1
                continue
            try:
                obj = json.loads(raw.decode("utf-8"))
            except UnicodeDecodeError:
                early.append(_undecodable_json_line(number, raw, columns))
                obj = None
            except (ValueError, RecursionError) as err:
                early.append(Reject(number, "line", None, "invalid_json", f"not valid JSON: {_json_error(err)}",
                                    {"raw": raw.decode("utf-8")}))
                obj = None
            if obj is not None and not isinstance(obj, dict):
                early.append(Reject(number, "line", None, "not_an_object",
                                    f"a JSON {type(obj).__name__}, not an object", {"raw": raw.decode("utf-8")}))
            elif obj is not None:
                rows.append((number, obj))
            if len(rows) + len(early) >= CHUNK:
                yield _json_table(path, "jsonl", "line", rows, early, blank, columns)
                rows, early, blank = [], [], 0
    if rows or early or blank:
        yield _json_table(path, "jsonl", "line", rows, early, blank, columns)


def _parquet_chunks(path: Path, columns: Columns) -> Iterator[RawTable]:
    import pyarrow.parquet as pq

    try:
        source = pq.ParquetFile(str(path))
    except Exception as err:
        raise ValueError(f"{path}: pyarrow cannot read it as parquet: {err}") from None
    found = list(source.schema_arrow.names)
    kinds = complete_kinds(found, columns)
    if kinds and "pairs" not in kinds:
        refuse_kind(kinds[0])
    weighted = _check_columns(found, columns, str(path))
    wanted = [(f, c) for f, c in _wanted(columns) if f != "weight" or weighted]
    start = 0
    for batch in source.iter_batches(batch_size=CHUNK):
        every = {name: arrow_values(batch.column(name)) for name in found}
        n = batch.num_rows
        table = RawTable(str(path), "parquet", "index", columns, found, weighted, reader="pyarrow parquet batches")
        table.locations = list(range(start, start + n))
        table.values = {f: every[c] for f, c in wanted}
        table.content = [{name: representable(every[name][i]) for name in found} for i in range(n)]
        table.present = [{f for f, _ in wanted} for _ in range(n)]
        start += n
        yield table


def refuse_kind(kind: str):
    """The one line for a file of rows beyond pairs under ``task.stream=true``."""
    raise ValueError(f"task.stream=true streams pair rows (prompt, winner, loser); this file holds "
                     f"{describe(kind)} rows: set task.stream=false (read in memory)")


class SeenDigests:
    """A disk-backed set of 16-byte row digests (SQLite, primary key), with each one's first location."""

    def __init__(self, path: Path):
        path.unlink(missing_ok=True)
        self.path = path
        self.db = sqlite3.connect(str(path))
        self.db.execute("PRAGMA journal_mode=OFF")
        self.db.execute("PRAGMA synchronous=OFF")
        self.db.execute("CREATE TABLE seen (digest BLOB PRIMARY KEY, location INTEGER) WITHOUT ROWID")

    def first(self, digest: bytes, location: int) -> int | None:
        """None when ``digest`` is new (it is added), else the location where it was first seen."""
        row = self.db.execute("SELECT location FROM seen WHERE digest = ?", (digest,)).fetchone()
        if row is None:
            self.db.execute("INSERT INTO seen VALUES (?, ?)", (digest, location))
            return None
        return row[0]

    def close(self) -> None:
        self.db.close()
        self.path.unlink(missing_ok=True)


def row_digest(prompt: str, winner: str, loser: str, weight: float) -> bytes:
    """The first 16 bytes of the SHA-256 of a row's key (prompt, winner, loser, weight) as canonical JSON."""
    return hashlib.sha256(json.dumps([prompt, winner, loser, weight]).encode("utf-8", "surrogatepass")).digest()[:16]


class StreamPass:
    """Runs the pass (:meth:`chunks`); afterwards :attr:`accounting` and :attr:`digest` (SHA-256 of every
    accepted pair's tokens in order: the data's identity for resumes)."""

    def __init__(self, file: dict, tokenizer, ids, *, rejects_path: Path, work_dir: Path, limit: int | None = None):
        self.file, self.tokenizer, self.ids, self.limit = file, tokenizer, ids, limit
        self.columns = Columns.parse(dict(file["columns"]) if hasattr(file["columns"], "items") else file["columns"])
        check_policies(file["max_length"], file["truncation"], file["duplicates"])
        self.path = Path(file["path"])
        self.kind = _kind(self.path, file.get("format") or "auto")
        self.rejects_path, self.work_dir = rejects_path, work_dir
        self.counts: Counter = Counter()
        self.by_reason: Counter = Counter()
        self.truncated_fields: Counter = Counter()
        self.weighted = None
        self.found: list[str] = []
        self.reader = ""
        self.longest = 0  # tokens of the longest accepted prompt + response, bos and eos counted
        self.hash = hashlib.sha256()
        self.seconds = 0.0

    def chunks(self) -> Iterator[dict]:
        """Accepted rows, chunk by chunk: {prompt, winner, loser: token lists[, weight]}."""
        start = time.perf_counter()
        source = _jsonl_chunks if self.kind == "jsonl" else _parquet_chunks
        seen = SeenDigests(self.work_dir / "seen-digests.sqlite")
        self.rejects_path.parent.mkdir(parents=True, exist_ok=True)
        try:
            with self.rejects_path.open("w", encoding="utf-8") as rejects:
                for table in source(self.path, self.columns):
                    out = self._check(table, seen, rejects)
                    if out is not None:
                        yield out
        finally:
            seen.close()
            self.seconds = time.perf_counter() - start

    def _check(self, table: RawTable, seen: SeenDigests, rejects) -> dict | None:
        if table.kind != "pairs":
            refuse_kind(table.kind)
        if self.weighted is None and len(table):
            self.weighted, self.found, self.reader = table.weighted, table.columns_found, table.reader
        part = validate(table, self.tokenizer, max_length=self.file["max_length"], truncation=self.file["truncation"],
                        duplicates="keep")
        a = part.accounting
        for key in ("rows_in", "blank_lines", "rows_truncated", "tokens_removed"):
            self.counts[key] += a[key]
        self.truncated_fields.update(a["truncated_fields"])
        index = {loc: i for i, loc in enumerate(table.locations)}
        bad = list(part.rejects)
        keep = []
        for k, location in enumerate(part.location):
            i = index[location]
            raw = [table.values[f][i] for f in TEXT_FIELDS]
            weight = part.weight[k]
            first = seen.first(row_digest(*raw, weight), location)
            if first is not None:
                self.counts["duplicate_rows"] += 1
                if self.file["duplicates"] == "reject":
                    bad.append(Reject(location, table.unit, None, "duplicate",
                                      f"the same pair and weight as {table.unit} {first}", table.content[i]))
                    continue
            keep.append(k)
        for r in sorted(bad, key=lambda r: r.location):
            rejects.write(json.dumps(r.record(), ensure_ascii=False, allow_nan=False) + "\n")
            self.by_reason[r.reason] += 1
        if self.limit is not None:
            keep = keep[:max(self.limit - self.counts["rows_written"], 0)]
        self.counts["rows_rejected"] += len(bad)
        self.counts["rows_accepted"] += len(part) - (len(bad) - len(part.rejects))
        self.counts["rows_written"] += len(keep)
        if not keep:
            return None
        enc, ids = self.tokenizer.encode, self.ids
        prompt = [[ids.bos, *enc(part.prompt[k])] for k in keep]
        winner = [[*enc(part.winner[k]), ids.eos] for k in keep]
        loser = [[*enc(part.loser[k]), ids.eos] for k in keep]
        for p, w, lo in zip(prompt, winner, loser, strict=True):
            self.longest = max(self.longest, len(p) + max(len(w), len(lo)))
            self.hash.update(json.dumps([p, w, lo]).encode())
        out = {"prompt": prompt, "winner": winner, "loser": loser}
        if self.weighted:
            out["weight"] = [float(part.weight[k]) for k in keep]
            self.hash.update(json.dumps(out["weight"]).encode())
        return out

    @property
    def digest(self) -> bytes:
        return self.hash.digest()

    def accounting(self) -> dict:
        """The keys of the in-memory path's accounting (:mod:`polopt.data.validate`), for the whole file."""
        c = self.counts
        rows_in, accepted, rejected = c["rows_in"], c["rows_accepted"], c["rows_rejected"]
        if rows_in != accepted + rejected:  # never: every row is accepted or rejected exactly once
            raise RuntimeError(f"row accounting broke: rows_in {rows_in} != accepted {accepted} + rejected {rejected}")
        unit = "line" if self.kind == "jsonl" else "index"
        return {
            "source": str(self.path), "format": self.kind, "reader": self.reader, "row_unit": unit,
            "row_numbering": "1-based line where the record starts" if unit == "line" else "0-based row index",
            "columns": self.columns.mapping() | ({} if self.weighted else {"weight": None}),
            "columns_found": self.found, "weighted": bool(self.weighted),
            "rows_in": rows_in, "rows_accepted": accepted, "rows_rejected": rejected,
            "rejected_by_reason": {k: self.by_reason[k] for k in REASONS if self.by_reason[k]},
            "balance": f"rows_in {rows_in} = rows_accepted {accepted} + rows_rejected {rejected}",
            "blank_lines": c["blank_lines"],
            "tokenizer": getattr(self.tokenizer, "name", type(self.tokenizer).__name__),
            "max_length": self.file["max_length"], "truncation": self.file["truncation"],
            "rows_truncated": c["rows_truncated"],
            "truncated_fields": {f: self.truncated_fields[f] for f in TEXT_FIELDS if self.truncated_fields[f]},
            "tokens_removed": c["tokens_removed"], "duplicates": self.file["duplicates"],
            "duplicate_rows": c["duplicate_rows"], "streamed": True, "rows_written": c["rows_written"],
            "pass_seconds": self.seconds, "rows_per_s": rows_in / self.seconds if self.seconds else None,
        }
