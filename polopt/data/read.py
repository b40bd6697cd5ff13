"""Reading preference-pair files into raw rows, with where each row came from.

Owns the formats: JSON Lines (``.jsonl``, ``.ndjson``, ``.json``; a ``.json``
file may also hold one array of objects), CSV (``.csv``; ``.tsv`` with tabs),
Parquet (``.parquet``, ``.pq``), a folder written by ``datasets``'
``save_to_disk``, and (only when asked for with ``hub=True``) a data set name on
the hub. The result is a :class:`RawTable`: the mapped columns' raw values per
row, each row's location and original content, and the rows that could not
even be read as rows (undecodable or unparsable lines). Checking the values is
:mod:`polopt.data.validate`'s job.

Why text files are scanned record by record first: ``datasets`` reads JSON Lines
with pyarrow and CSV with pandas, and both stop on the whole file at one
undecodable byte or one malformed line (a ``DatasetGenerationError``, naming at
most the first bad line). So both are scanned with the standard library, with
line numbers: undecodable records (strict UTF-8, RFC 3629) and unparsable ones
become rejects, and reading goes on.

- CSV: ``datasets`` then loads a copy of the mapped columns of the records that
  parsed, every column typed string and with pandas' NA guessing off, so an
  empty field stays "" and "007" stays "007" (checked against the scan's count).
- JSON Lines: the standard library's ``json`` (RFC 8259) is the reader, not
  ``datasets``: its JSON builder lets pyarrow infer column types, so a prompt
  "2024-01-01" comes back as "2024-01-01 00:00:00" and the number 5 as "5",
  even with string features given: silent changes to the text, and a wrong
  type accepted. The accepted pairs are a ``datasets.Dataset`` all the same
  (:meth:`polopt.data.PairData.to_dataset`).

Parquet and saved folders are read by ``datasets`` directly; their text columns
are decoded from the Arrow bytes row by row, so one bad value rejects one row
(pyarrow itself would fail the whole column on it).
"""

from __future__ import annotations

import codecs
import contextlib
import csv
import io
import json
import sys
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

from polopt.data.kinds import infer_kind
from polopt.data.rows import FIELDS, KINDS, Columns, Reject, describe_bad_bytes, representable

TEXT_SUFFIXES = {".jsonl": "jsonl", ".ndjson": "jsonl", ".json": "jsonl", ".csv": "csv", ".tsv": "csv"}
TABLE_SUFFIXES = {".parquet": "parquet", ".pq": "parquet"}
FORMATS = ("auto", "jsonl", "csv", "parquet", "folder", "hub")


@dataclass
class RawTable:
    """Rows as read, before any check. ``values[f][i]`` is the raw value of our field ``f``
    (prompt, the fields of the file's ``kind`` of row, weight when used) in row i: a str, bytes (text
    that is not valid UTF-8), None (absent or null) or any other object the file held (a list for
    responses, ranking and scores)."""

    source: str
    format: str
    unit: str  # "line" (1-based) | "index" (0-based)
    columns: Columns
    columns_found: list[str]
    weighted: bool
    locations: list[int] = field(default_factory=list)
    values: dict[str, list] = field(default_factory=dict)
    content: list[dict] = field(default_factory=list)  # the original rows, JSON-representable
    present: list[set] = field(default_factory=list)  # which of our fields each row's source had
    early_rejects: list[Reject] = field(default_factory=list)  # rows that could not be read as rows
    blank_lines: int = 0
    reader: str = ""
    text_values: bool = False  # CSV: every value is text, so a weight is parsed from text
    kind: str = "pairs"  # the kind of row (polopt.data.rows.KINDS), inferred by polopt.data.kinds

    def __len__(self) -> int:
        return len(self.locations)


def read_table(path: str | Path, columns: Columns, *, format: str = "auto", hub: bool = False,
               split: str = "train") -> RawTable:
    """Read ``path`` into a :class:`RawTable`; a problem with the file as a whole (not found,
    unknown format, required columns absent) is one ``ValueError``."""
    if format not in FORMATS:
        raise ValueError(f"format must be one of {', '.join(FORMATS)}, got {format!r}")
    kind = _detect(Path(path), format, hub)
    if kind == "jsonl":
        return _read_jsonl(Path(path), columns)
    if kind == "csv":
        return _read_csv(Path(path), columns)
    return _read_dataset(str(path), columns, kind, split)


def _detect(path: Path, format: str, hub: bool) -> str:
    if format == "hub":
        if not hub:
            raise ValueError("format hub reads a data set from the hub; it must be asked for with hub=true")
        return "hub"
    if not path.exists():
        if hub and format == "auto":
            return "hub"
        raise ValueError(f"pair file not found: {str(path)!r} (a data set name on the hub is read only "
                         "with hub=true, or polopt data --hub; tests and the walk-through never do)")
    if format != "auto":
        return format
    if path.is_dir():
        return "folder"
    kind = TEXT_SUFFIXES.get(path.suffix.lower()) or TABLE_SUFFIXES.get(path.suffix.lower())
    if kind is None:
        known = ", ".join(sorted({*TEXT_SUFFIXES, *TABLE_SUFFIXES}))
        raise ValueError(f"cannot tell the format of {str(path)!r} from its suffix {path.suffix!r}; use one of "
                         f"{known}, a saved dataset folder, or give format= (jsonl, csv, parquet, folder)")
    return kind


def _wanted(columns: Columns, kind: str | None = "pairs") -> list[tuple[str, str]]:
    """(our field, file column) pairs to read for rows of ``kind`` (None: every field), weight last."""
    fields = [f for f in FIELDS if f != "weight"] if kind is None else ["prompt", *KINDS[kind]]
    return [(f, columns.column(f)) for f in fields] + ([("weight", columns.weight)] if columns.weight is not None
                                                         else [])


def _check_columns(found: list[str], columns: Columns, source: str, kind: str | None = "pairs") -> bool:
    """Raise the file-level error for absent required columns of rows of ``kind`` (None: no kind is complete;
    the pair columns are named); return whether weights are used."""
    own = KINDS[kind or "pairs"]
    missing = [columns.column(f) for f in ("prompt", *own) if columns.column(f) not in found]
    if columns.weight_required and columns.weight not in found:
        missing.append(columns.weight)
    if missing:
        shown = ", ".join(map(repr, found[:20])) + (" ..." if len(found) > 20 else "") if found else "none"
        others = "" if kind is not None else (" A file of another kind of row has prompt with response + label "
                                              "(unpaired), responses + ranking, or responses + scores.")
        raise ValueError(f"{source}: missing column(s) {', '.join(missing)}; the file has: {shown}. "
                         "Map your names with task.columns, e.g. task.columns='{prompt: question, winner: "
                         "good_reply, loser: other_reply}' (polopt train task=pairs and polopt data alike)." + others)
    return columns.weight is not None and columns.weight in found


# ------------------------------------------------------------------ JSON Lines


def _read_jsonl(path: Path, columns: Columns) -> RawTable:
    data = path.read_bytes()
    if data.startswith(codecs.BOM_UTF8):
        data = data[len(codecs.BOM_UTF8):]
    if path.suffix.lower() == ".json" and data.lstrip()[:1] == b"[":
        return _read_json_array(path, data, columns)
    lines = data.split(b"\n")
    if lines and lines[-1] == b"":
        lines.pop()  # the newline that ends the last line
    rows: list[tuple[int, dict]] = []
    early: list[Reject] = []
    blank = 0
    for number, raw in enumerate(lines, 1):
        raw = raw[:-1] if raw.endswith(b"\r") else raw
        if not raw.strip():
            blank += 1
            continue
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError:
            early.append(_undecodable_json_line(number, raw, columns))
            continue
        try:
            obj = json.loads(text)
        except (ValueError, RecursionError) as err:  # ValueError also: an integer of over 4300 digits
            detail = _json_error(err)
            early.append(Reject(number, "line", None, "invalid_json", f"not valid JSON: {detail}", {"raw": text}))
            continue
        if not isinstance(obj, dict):
            early.append(Reject(number, "line", None, "not_an_object",
                                f"a JSON {type(obj).__name__}, not an object", {"raw": text}))
            continue
        rows.append((number, obj))
    return _json_table(path, "jsonl", "line", rows, early, blank, columns)


def _read_json_array(path: Path, data: bytes, columns: Columns) -> RawTable:
    """A ``.json`` file holding one JSON array of objects; rows are its 0-based indices."""
    try:
        # undecodable bytes ride along as U+DC80..U+DCFF, so only the rows holding them are rejected
        items = json.loads(data.decode("utf-8", errors="surrogateescape"))
    except (ValueError, RecursionError) as err:
        raise ValueError(f"{path}: not valid JSON as a whole ({_json_error(err)}); write one object per line "
                         "(JSON Lines) to have bad rows rejected one by one") from None
    if not isinstance(items, list):
        raise ValueError(f"{path}: a .json file must hold an array of objects or one object per line")
    rows, early = [], []
    for i, obj in enumerate(items):
        if isinstance(obj, dict):
            rows.append((i, obj))
        else:
            early.append(Reject(i, "index", None, "not_an_object", f"a JSON {type(obj).__name__}, not an object",
                                {"raw": representable(obj)}))
    return _json_table(path, "json", "index", rows, early, 0, columns)


def _json_table(path: Path, format: str, unit: str, rows: list[tuple[int, dict]], early: list[Reject], blank: int,
                columns: Columns) -> RawTable:
    found = list(dict.fromkeys(k for _, obj in rows for k in obj))
    kind = infer_kind(found, ((n, obj.get) for n, obj in rows), columns, unit=unit, source=str(path))
    weighted = _check_columns(found, columns, str(path), kind) if rows else False
    kind = kind or "pairs"
    table = RawTable(str(path), format, unit, columns, found, weighted, early_rejects=early, blank_lines=blank,
                     kind=kind)
    wanted = [(f, c) for f, c in _wanted(columns, kind) if f != "weight" or weighted]
    table.locations = [n for n, _ in rows]
    table.content = [representable(obj) for _, obj in rows]
    table.present = [{f for f, c in wanted if c in obj} for _, obj in rows]
    table.values = {f: [obj.get(c) for _, obj in rows] for f, c in wanted}
    table.reader = "json (standard library, RFC 8259)"
    return table


def _undecodable_json_line(number: int, raw: bytes, columns: Columns) -> Reject:
    """An invalid-UTF-8 line: find the field with the bad bytes where the line still parses."""
    detail = describe_bad_bytes(raw)
    try:
        obj = json.loads(raw.decode("utf-8", errors="surrogateescape"))
    except (ValueError, RecursionError):
        obj = None
    if not isinstance(obj, dict):
        return Reject(number, "line", None, "invalid_utf8", detail, {"raw": representable(raw)})
    bad = [f for f, c in _wanted(columns, None) if _undecodable_value(obj.get(c))]
    if bad and isinstance(obj[columns.column(bad[0])], str):
        detail = f"{bad[0]}: {describe_bad_bytes(obj[columns.column(bad[0])].encode('utf-8', 'surrogateescape'))}"
    return Reject(number, "line", bad[0] if bad else None, "invalid_utf8", detail, representable(obj))


def _json_error(err: Exception) -> str:
    if isinstance(err, json.JSONDecodeError):
        where = f"line {err.lineno} column {err.colno}" if err.lineno > 1 else f"column {err.colno}"
        return f"{err.msg.removesuffix(' at')} at {where}"
    if isinstance(err, RecursionError):
        return "nested too deep"
    return str(err).split(";")[0]


def _undecodable(text: str) -> bool:
    return any(0xDC80 <= ord(ch) <= 0xDCFF for ch in text)


def _undecodable_value(value) -> bool:
    """Whether a JSON value holds undecodable bytes in a string (at any depth: lists of responses)."""
    if isinstance(value, str):
        return _undecodable(value)
    if isinstance(value, list):
        return any(_undecodable_value(v) for v in value)
    if isinstance(value, dict):
        return any(_undecodable_value(v) for v in value.values())
    return False


def _load_with_datasets(builder: str, copy: Path, cache: Path, names: list[str], n: int, **kwargs) -> dict:
    import datasets

    with _quiet_datasets():
        ds = datasets.load_dataset(builder, data_files=str(copy), split="train", cache_dir=str(cache),
                                   keep_in_memory=True, **kwargs)
    if len(ds) != n:
        raise RuntimeError(f"datasets read {len(ds)} rows where the pre-scan found {n}")
    table = ds.with_format("arrow")[:]
    return {name: arrow_values(table.column(name)) if name in table.column_names else [None] * n
            for name in names}


# ------------------------------------------------------------------ CSV


def _read_csv(path: Path, columns: Columns) -> RawTable:
    data = path.read_bytes()
    if data.startswith(codecs.BOM_UTF8):
        data = data[len(codecs.BOM_UTF8):]
    # surrogateescape keeps undecodable bytes as U+DC80..U+DCFF, so the csv module can still cut
    # the file into records and the bad record is found and reported, not the whole file lost
    text = data.decode("utf-8", errors="surrogateescape")
    delimiter = "\t" if path.suffix.lower() == ".tsv" else ","
    csv.field_size_limit(sys.maxsize)  # the default 128 KiB per field would reject long responses
    # newline="": lines end at \n, \r\n or \r only, and quoted newlines stay in their field
    physical = io.StringIO(text, newline="").readlines()
    position = 0  # lines handed to the csv reader so far

    def lines_from(k: int):
        nonlocal position
        position = k
        while position < len(physical):
            position += 1
            yield physical[position - 1]

    reader = csv.reader(lines_from(0), delimiter=delimiter)
    header = _csv_header(reader, path, data)
    rows: list[tuple[int, dict]] = []
    early: list[Reject] = []
    blank = 0
    while True:
        start = position + 1
        try:
            record = next(reader)
        except StopIteration:
            break
        except csv.Error as err:
            raise ValueError(f"{path}: CSV cannot be parsed at line {start}: {err}") from None
        if not record or (len(record) == 1 and not record[0].strip() and len(header) > 1):
            blank += 1
            continue
        if len(record) != len(header) and position > start:
            # most likely an unbalanced quote that swallowed the lines after it: reject only the line
            # where it starts and read on from the next line, so the rows after it are not lost
            early.append(Reject(start, "line", None, "wrong_field_count",
                                f"{len(record)} fields over lines {start}-{position}, the header has {len(header)} "
                                f"(an unbalanced quote?); only line {start} is rejected",
                                {"raw": representable(physical[start - 1])}))
            position = start
            reader = csv.reader(lines_from(start), delimiter=delimiter)
            continue
        bad = [i for i, v in enumerate(record) if _undecodable(v)]
        named = dict(zip(header, record, strict=False))
        if bad:
            name = header[bad[0]] if bad[0] < len(header) else None
            ours = next((f for f, c in _wanted(columns, None) if c == name), None)
            detail = describe_bad_bytes(record[bad[0]].encode("utf-8", "surrogateescape"))
            detail = f"column {name!r}: {detail}" if name is not None else f"field {bad[0] + 1}: {detail}"
            early.append(Reject(start, "line", ours, "invalid_utf8", detail, representable(named)))
            continue
        if len(record) != len(header):
            early.append(Reject(start, "line", None, "wrong_field_count",
                                f"{len(record)} fields, the header has {len(header)}",
                                {"fields": representable(record)}))
            continue
        rows.append((start, named))
    kind = infer_kind(header, ((n, r.get) for n, r in rows), columns, unit="line", source=str(path))
    weighted = _check_columns(header, columns, str(path), kind) if header else False
    kind = kind or "pairs"
    table = RawTable(str(path), "csv", "line", columns, header, weighted, early_rejects=early, blank_lines=blank,
                     text_values=True, kind=kind)
    wanted = [(f, c) for f, c in _wanted(columns, kind) if f != "weight" or weighted]
    table.locations = [n for n, _ in rows]
    table.content = [dict(r) for _, r in rows]
    table.present = [{f for f, _ in wanted} for _ in rows]  # CSV has no null: a field is there, maybe empty
    plain = {f: [r[c] for _, r in rows] for f, c in wanted}
    table.values, table.reader = _through_datasets_csv(plain, len(rows))
    return table


def _csv_header(reader, path: Path, data: bytes) -> list[str]:
    """The CSV header (the reader's first record; [] for an empty file), refused when it cannot be
    read, is not UTF-8 or names a column twice."""
    try:
        header = next(reader)
    except StopIteration:
        header = []
    except csv.Error as err:
        raise ValueError(f"{path}: the CSV header cannot be read: {err}") from None
    if any(_undecodable(h) for h in header):
        where = describe_bad_bytes(data.splitlines()[0])
        raise ValueError(f"{path}: the CSV header (line 1) is not valid UTF-8: {where}")
    dupes = sorted({h for h in header if header.count(h) > 1})
    if dupes:
        raise ValueError(f"{path}: the CSV header names column(s) {', '.join(map(repr, dupes))} more than once")
    return header


def _through_datasets_csv(plain: dict[str, list], n: int) -> tuple[dict[str, list], str]:
    if n == 0:
        return plain, "csv (standard library; no rows)"
    import datasets

    try:
        with tempfile.TemporaryDirectory(prefix="polopt-data-") as tmp:
            copy = Path(tmp) / "rows.csv"
            with copy.open("w", encoding="utf-8", newline="") as f:
                writer = csv.writer(f, quoting=csv.QUOTE_ALL)
                writer.writerow(list(plain))
                writer.writerows(zip(*plain.values(), strict=True))
            features = datasets.Features({name: datasets.Value("string") for name in plain})
            # every value is text, and an empty field stays "" (pandas would make it NaN)
            values = _load_with_datasets("csv", copy, Path(tmp) / "cache", list(plain), n, features=features,
                                         keep_default_na=False, na_filter=False)
        if values != plain:  # never seen; if pandas ever parses a record differently, trust the scan
            return plain, "csv (standard library; datasets read some values differently)"
        return values, "datasets csv (after a record-by-record pre-scan)"
    except Exception as err:
        return plain, f"csv (standard library; datasets could not hold the rows: {type(err).__name__})"


# ------------------------------------------------------------------ Parquet, saved folders, hub


def _read_dataset(source: str, columns: Columns, kind: str, split: str) -> RawTable:
    import datasets

    with tempfile.TemporaryDirectory(prefix="polopt-data-") as cache:
        try:
            with _quiet_datasets():
                if kind == "parquet":
                    ds = datasets.Dataset.from_parquet(source, cache_dir=cache, keep_in_memory=True)
                elif kind == "folder":
                    ds = datasets.load_from_disk(source, keep_in_memory=True)
                else:  # hub: only reached with hub=True
                    ds = datasets.load_dataset(source, split=split)
        except Exception as err:
            raise ValueError(f"{source}: datasets cannot read it as {kind}: {err}") from None
        if isinstance(ds, datasets.DatasetDict):
            if split not in ds:
                raise ValueError(f"{source}: split {split!r} not found; the folder has: {', '.join(ds)}")
            ds = ds[split]
        table = ds.with_format("arrow")[:] if len(ds) else ds.data.table
    found = list(table.column_names)
    n = table.num_rows
    every = {name: arrow_values(table.column(name)) for name in found}
    rows = ((i, lambda c, i=i: every[c][i] if c in every else None) for i in range(n))
    row_kind = infer_kind(found, rows, columns, unit="index", source=source)
    weighted = _check_columns(found, columns, source, row_kind)
    row_kind = row_kind or "pairs"
    out = RawTable(source, kind, "index", columns, found, weighted,
                   reader=f"datasets {'load_from_disk' if kind == 'folder' else kind}", kind=row_kind)
    wanted = [(f, c) for f, c in _wanted(columns, row_kind) if f != "weight" or weighted]
    out.locations = list(range(n))
    out.values = {f: every[c] for f, c in wanted}
    out.content = [{name: representable(every[name][i]) for name in found} for i in range(n)]
    out.present = [{f for f, _ in wanted} for _ in range(n)]  # a table has every column in every row
    return out


@contextlib.contextmanager
def _quiet_datasets():
    """No progress bars from ``datasets`` while it reads (its global switch, restored after)."""
    import datasets

    was_enabled = not datasets.are_progress_bars_disabled()
    datasets.disable_progress_bars()
    try:
        yield
    finally:
        if was_enabled:
            datasets.enable_progress_bars()


def arrow_values(column) -> list:
    """Python values of an Arrow column. Text (string or binary) is decoded row by row: a value
    that is not valid UTF-8 stays bytes, so that one row is rejected, not the column lost."""
    import pyarrow as pa

    array = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    if pa.types.is_dictionary(array.type):
        array = array.dictionary_decode()
    if pa.types.is_string(array.type) or pa.types.is_large_string(array.type):
        # the same buffers seen as bytes: no UTF-8 validation happens in this view
        array = array.view(pa.binary() if pa.types.is_string(array.type) else pa.large_binary())
    if pa.types.is_binary(array.type) or pa.types.is_large_binary(array.type):
        return [None if b is None else _decode_or_bytes(b) for b in array.to_pylist()]
    try:
        return array.to_pylist()
    except Exception:  # nested values holding undecodable text: keep what can be shown
        return [repr(array[i]) for i in range(len(array))]


def _decode_or_bytes(data: bytes):
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError:
        return data
