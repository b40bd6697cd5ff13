"""The vocabulary of the data layer: which columns hold a row, and why a row was rejected.

Owns :class:`Columns` (the mapping from our field names ``prompt``, ``winner``,
``loser``, ``response``, ``label``, ``responses``, ``ranking``, ``scores``, ``weight`` to a
file's column names), :data:`KINDS` (the four kinds of row and the fields each holds beside the
prompt), :class:`Reject` (one bad row:
where, which field, which reason), the reason codes in :data:`REASONS`, and
:func:`representable`, which turns a row's original content into something
JSON can hold for the rejects file.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field

TEXT_FIELDS = ("prompt", "winner", "loser")
# kind of row -> its fields beside prompt (and the optional weight); the kinds are task.feedback's names
KINDS = {
    "pairs": ("winner", "loser"),
    "unpaired": ("response", "label"),
    "ranking": ("responses", "ranking"),
    "scored": ("responses", "scores"),
}
FIELDS = ("prompt", "winner", "loser", "response", "label", "responses", "ranking", "scores", "weight")

# reason code -> what it means; the codes are stable (summaries, rejects files and tests use them)
REASONS = {
    "invalid_utf8": "the bytes are not valid UTF-8 (RFC 3629), or a string holds a lone surrogate",
    "invalid_json": "the line is not valid JSON",
    "not_an_object": "the line is valid JSON but not an object",
    "wrong_field_count": "the CSV record has a different number of fields than the header",
    "missing": "a required field is absent or null",
    "not_a_string": "a text field holds a number, list, object or boolean (message lists: model=local_lm only)",
    "bad_messages": "a message list is empty, holds an item without a string role and content, or a response "
                    "holds a message that is not the assistant's",
    "empty": "a text field is empty or only whitespace",
    "bad_weight": "the weight is not a finite number > 0",
    "identical": "winner and loser are the same text",
    "too_long": "the pair is longer than max_length and the truncation policy does not cut it",
    "duplicate": "the same (prompt, winner, loser, weight) as an earlier accepted row (other kinds: the same prompt, "
                 "responses, feedback and weight)",
    "bad_label": "an unpaired row's label is not 1, 0, true or false",
    "not_a_list": "responses, ranking or scores is not a list (in CSV: not a JSON array)",
    "too_few_responses": "a ranking or scored row has fewer than 2 responses",
    "length_mismatch": "ranking or scores does not have one entry per response",
    "not_a_permutation": "ranking is not a permutation of 0..G-1 (G responses; 0 = best)",
    "bad_score": "a score is not a finite number",
    "repeated_response": "two responses of one ranking or scored row are the same text (after truncation, where cut)",
    "template_mismatch": "the chat template's rendering of prompt + response does not start with that of the prompt",
    "template_error": "the chat template refused the conversation (its raise_exception, e.g. roles out of order)",
}


@dataclass(frozen=True)
class Columns:
    """Our field -> the file's column (every field of :data:`FIELDS` but weight defaults to its own name).
    ``weight`` None: no weights (all 1). The default weight column ``weight`` is used only when the file
    has it; a weight column named explicitly must exist."""

    prompt: str = "prompt"
    winner: str = "winner"
    loser: str = "loser"
    weight: str | None = "weight"
    weight_required: bool = False
    response: str = "response"
    label: str = "label"
    responses: str = "responses"
    ranking: str = "ranking"
    scores: str = "scores"

    @classmethod
    def parse(cls, mapping: Mapping | str | None) -> Columns:
        """From a mapping ``{prompt: question, winner: good_reply, ...}`` (config
        ``task.columns``) or the CLI's ``prompt=question,winner=good_reply``."""
        if mapping is None:
            return cls()
        if isinstance(mapping, str):
            items = {}
            for part in filter(None, (p.strip() for p in mapping.split(","))):
                key, eq, value = part.partition("=")
                if not eq or not value.strip():
                    raise ValueError(f"columns must look like prompt=NAME,winner=NAME,loser=NAME[,weight=NAME], "
                                     f"got {mapping!r}")
                items[key.strip()] = value.strip()
            mapping = items
        if not isinstance(mapping, Mapping):
            raise TypeError(f"columns must be a mapping of {', '.join(FIELDS)} to column names, "
                            f"got {type(mapping).__name__}")
        unknown = sorted(set(mapping) - set(FIELDS))
        if unknown:
            raise ValueError(f"columns: unknown key {unknown[0]!r}; the keys are {', '.join(FIELDS)}")
        for key, value in mapping.items():
            if not (value is None and key == "weight") and (not isinstance(value, str) or not value):
                raise ValueError(f"columns.{key} must be a column name (a non-empty string), got {value!r}")
        names = [mapping.get(f, f) for f in TEXT_FIELDS]
        if len(set(names)) < 3:
            raise ValueError(f"columns: prompt, winner and loser must be three different columns, got {names}")
        every = {f: mapping.get(f, f) for f in FIELDS if f != "weight"}
        for kind, own in KINDS.items():
            used = [every[f] for f in ("prompt", *own)]
            if len(set(used)) < len(used):
                raise ValueError(f"columns: {', '.join(('prompt', *own))} (rows of kind {kind}) must be different "
                                 f"columns, got {used}")
        weight = mapping.get("weight", "weight")
        required = "weight" in mapping and weight is not None and weight != "weight"
        others = {f: every[f] for f in ("response", "label", "responses", "ranking", "scores")}
        return cls(*names, weight=weight, weight_required=required, **others)

    def mapping(self, kind: str = "pairs") -> dict:
        """Our fields of rows of ``kind`` (prompt, the kind's own, weight) -> the file's columns."""
        return {f: getattr(self, f) for f in ("prompt", *KINDS[kind], "weight")}

    def column(self, name: str) -> str:
        return getattr(self, name)


@dataclass
class Reject:
    """One rejected row. ``location`` is the 1-based line for JSONL and CSV (where the record
    starts) and the 0-based index for Parquet and saved folders; ``unit`` says which."""

    location: int
    unit: str  # "line" | "index"
    field: str | None  # our field name (prompt, winner, loser, response, ..., weight), None for the whole row
    reason: str  # a key of REASONS
    detail: str
    row: dict | None = None  # the original row, as far as JSON can hold it
    other_problems: list[dict] = field(default_factory=list)

    def record(self) -> dict:
        """The rejects-file line: ``{"line": 7, "field": ..., "reason": ..., "detail": ..., "row": ...}``."""
        out = {self.unit: self.location, "field": self.field, "reason": self.reason, "detail": self.detail}
        if self.other_problems:
            out["other_problems"] = self.other_problems
        out["row"] = self.row
        return out

    def message(self) -> str:
        where = f"{self.unit} {self.location}"
        return f"{where}: {self.field or 'row'}: {self.reason}: {self.detail}"


def describe_bad_bytes(data: bytes) -> str:
    """Where the first invalid UTF-8 byte of ``data`` is (1-based), for a reject's detail."""
    try:
        data.decode("utf-8")
    except UnicodeDecodeError as err:
        return f"byte {err.start + 1} (0x{data[err.start]:02x}) is not valid UTF-8"
    return "valid UTF-8"


def representable(value):
    """``value`` as JSON can hold it: bytes and undecodable text as backslash-escaped strings,
    non-finite floats as strings, unknown objects by ``str``."""
    if isinstance(value, Mapping):
        return {str(k): representable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [representable(v) for v in value]
    if isinstance(value, bytes):
        return value.decode("utf-8", errors="backslashreplace")
    if isinstance(value, str):
        # lone surrogates (undecodable bytes kept by surrogateescape, or "\ud800" escapes in JSON)
        return _escape_surrogates(value) if _has_surrogate(value) else value
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    if value is None or isinstance(value, (bool, int, float)):
        return value
    return str(value)


def _has_surrogate(text: str) -> bool:
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return True
    return False


def _escape_surrogates(text: str) -> str:
    """Bytes kept by ``surrogateescape`` (U+DC80..U+DCFF) as ``\\xNN``, other lone surrogates as
    ``\\uNNNN``; everything else unchanged."""
    out = []
    for ch in text:
        code = ord(ch)
        if 0xDC80 <= code <= 0xDCFF:
            out.append(f"\\x{code - 0xDC00:02x}")
        elif 0xD800 <= code <= 0xDFFF:
            out.append(f"\\u{code:04x}")
        else:
            out.append(ch)
    return "".join(out)
