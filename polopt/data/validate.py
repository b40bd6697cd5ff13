"""Checking raw rows: every row is either accepted or rejected with a reason, never lost.

Owns the row checks, in this order (a row gets the first failing check as its
reason; the other field problems found are listed beside it):

1. fields: each of prompt, winner, loser present (``missing``), text
   (``not_a_string``), valid UTF-8 (``invalid_utf8``), not empty or only
   whitespace (``empty``); the weight, where used, a finite number > 0
   (``bad_weight``; in CSV, where every value is text, parsed with ``float``);
2. winner and loser differ (``identical``; exact comparison of the texts);
3. length: ``count(prompt) + max(count(winner), count(loser))`` tokens of the
   tokenizer (bytes for the built-in one) against ``max_length``, by the
   truncation policy (:data:`TRUNCATION`); truncated rows are counted;
4. duplicates: the same (prompt, winner, loser, weight) as an earlier accepted
   row, compared on the original texts; the first is kept, later ones are
   rejected (``duplicates="reject"``) or kept and counted (``"keep"``). The same
   pair with winner and loser swapped is not a duplicate: it is a
   contradicting label, which is data.

The accounting dict says ``rows_in == rows_accepted + rows_rejected``, and
:func:`validate` raises if that ever fails to hold. Rows of the other kinds (unpaired, ranking,
scored: :data:`polopt.data.rows.KINDS`) are checked by :mod:`polopt.data.group_rows` in the same
order, into the same :class:`PairData` and accounting.
"""

from __future__ import annotations

import json
import math
from collections import Counter
from dataclasses import dataclass, field

from polopt.data.chat import is_messages, message_problem
from polopt.data.read import RawTable
from polopt.data.rows import KINDS, REASONS, TEXT_FIELDS, Reject, describe_bad_bytes, representable

TRUNCATION = {
    "reject": "reject pairs longer than max_length",
    "truncate_response": "cut winner and loser on the right to fit beside the whole prompt",
    "truncate_prompt": "cut the prompt on the left (keep its end, nearest the response) to fit beside the "
                       "longer response",
}
DUPLICATES = ("reject", "keep")
CUT_FIELDS = ("prompt", "winner", "loser", "response", "responses")  # the fields truncation may cut


@dataclass
class PairData:
    """Accepted rows as parallel lists, the rejects, and the accounting.

    ``kind`` is the file's kind of row (:data:`polopt.data.rows.KINDS`). Pairs fill ``winner`` and
    ``loser``; the other kinds fill ``responses`` (a list per row: the one response of an unpaired
    row, the G responses of a ranking or scored row) and ``feedback`` (a list per row, one entry per
    response: the label 1.0 / 0.0, the rank 0 = best, or the score). ``location[i]`` is where row i
    came from (1-based line, or 0-based index; see ``accounting["row_unit"]``); ``length[i]`` its
    tokens (prompt + longest response) after any truncation.
    """

    prompt: list[str] = field(default_factory=list)
    winner: list[str] = field(default_factory=list)
    loser: list[str] = field(default_factory=list)
    weight: list[float] = field(default_factory=list)
    location: list[int] = field(default_factory=list)
    length: list[int] = field(default_factory=list)
    rejects: list[Reject] = field(default_factory=list)
    accounting: dict = field(default_factory=dict)
    kind: str = "pairs"
    responses: list[list] = field(default_factory=list)
    feedback: list[list] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.prompt)

    def rows(self) -> list[dict]:
        """The accepted rows as dicts in our field names: ``{prompt, winner, loser, weight}``,
        ``{prompt, response, label, weight}``, ``{prompt, responses, ranking | scores, weight}``."""
        if self.kind == "pairs":
            return [{"prompt": p, "winner": w, "loser": lo, "weight": wt}
                    for p, w, lo, wt in zip(self.prompt, self.winner, self.loser, self.weight, strict=True)]
        first, second = KINDS[self.kind]
        one = self.kind == "unpaired"
        return [{"prompt": p, first: r[0] if one else r, second: f[0] if one else f, "weight": wt}
                for p, r, f, wt in zip(self.prompt, self.responses, self.feedback, self.weight, strict=True)]

    def add(self, row: dict, *, location: int, length: int | None) -> None:
        """Append one accepted row (a dict as :meth:`rows` gives) with its location and length."""
        self.prompt.append(row["prompt"])
        if self.kind == "pairs":
            self.winner.append(row["winner"])
            self.loser.append(row["loser"])
        else:
            first, second = KINDS[self.kind]
            one = self.kind == "unpaired"
            self.responses.append([row[first]] if one else list(row[first]))
            self.feedback.append([row[second]] if one else list(row[second]))
        self.weight.append(row["weight"])
        self.location.append(location)
        self.length.append(length)

    def to_dataset(self):
        """The accepted rows as a ``datasets.Dataset`` with the columns of :meth:`rows` and the row's
        location (``line`` or ``index``)."""
        import datasets

        rows = self.rows()
        names = rows[0] if rows else ("prompt", *KINDS[self.kind], "weight")
        columns = {name: [r[name] for r in rows] for name in names}
        return datasets.Dataset.from_dict(columns | {self.accounting.get("row_unit", "line"): self.location})


def check_policies(max_length, truncation: str, duplicates: str) -> None:
    if truncation not in TRUNCATION:
        raise ValueError(f"truncation must be one of {', '.join(TRUNCATION)}, got {truncation!r}")
    if duplicates not in DUPLICATES:
        raise ValueError(f"duplicates must be one of {', '.join(DUPLICATES)}, got {duplicates!r}")
    if max_length is not None and (isinstance(max_length, bool) or not isinstance(max_length, int)
                                   or max_length < 2):
        raise ValueError(f"max_length must be an integer >= 2 (tokens) or null (no limit), got {max_length!r}")


def validate(table: RawTable, tokenizer, *, max_length: int | None = None, truncation: str = "reject",
             duplicates: str = "reject", messages: bool = False) -> PairData:
    """Check every row of ``table`` (see the module docstring); return the accepted pairs. ``messages``: a
    text field may also be a list of chat messages (:mod:`polopt.data.chat`; ``bad_messages`` where it is
    not a valid one); lengths are then not measured here (``max_length`` must be None)."""
    if messages and max_length is not None:
        raise ValueError("message rows are measured in the model's tokens after the chat template, not here: "
                         "validate them with max_length=None")
    check_policies(max_length, truncation, duplicates)
    out = PairData(rejects=list(table.early_rejects))
    seen: dict[tuple, int] = {}
    n_duplicates, n_truncated, removed = 0, 0, 0
    truncated_fields: Counter = Counter()
    for i, location in enumerate(table.locations):
        raw = {f: v[i] for f, v in table.values.items()}

        reject = row_rejecter(out, table, i, location)

        problems = _field_problems(raw, table.present[i], table.text_values, messages)
        if problems:
            first, *others = problems
            reject(first["field"], first["reason"], first["detail"], others)
            continue
        prompt, winner, loser = (raw[f] for f in TEXT_FIELDS)
        weight = _as_float(raw["weight"]) if table.weighted else 1.0
        if winner == loser:
            reject("loser", "identical", "winner and loser are the same text")
            continue
        key = tuple(json.dumps(v) if is_messages(v) else v for v in (prompt, winner, loser)) + (weight,)
        fitted = fit_to_length(prompt, [winner, loser], ["winner", "loser"], tokenizer, max_length, truncation,
                               same=("loser", "identical"))
        if isinstance(fitted, Reject):
            reject(fitted.field, fitted.reason, fitted.detail)
            continue
        (prompt, (winner, loser)), cut, length = fitted
        if key in seen:
            n_duplicates += 1
            if duplicates == "reject":
                reject(None, "duplicate", f"the same pair and weight as {table.unit} {seen[key]}")
                continue
        else:
            seen[key] = location
        if cut:
            n_truncated += 1
            truncated_fields.update(cut.keys())
            removed += sum(cut.values())
        out.add({"prompt": prompt, "winner": winner, "loser": loser, "weight": weight}, location=location,
                length=length)
    out.rejects.sort(key=lambda r: r.location)
    out.accounting = accounting(table, out, tokenizer, max_length=max_length, truncation=truncation,
                                 duplicates=duplicates, n_duplicates=n_duplicates, n_truncated=n_truncated,
                                 truncated_fields=truncated_fields, removed=removed)
    return out


def _field_problems(raw: dict, present: set, text_values: bool, messages: bool = False) -> list[dict]:
    """Every problem of the single fields of one row, in field order."""
    problems = [p for name in TEXT_FIELDS if (p := text_problem(name, raw[name], name in present, messages))]
    return problems + weight_problems(raw, present, text_values)


def weight_problems(raw: dict, present: set, text_values: bool) -> list[dict]:
    """[the weight's problem] where the row has a weight and it is not a finite number > 0, else []."""
    if "weight" in raw:
        detail = _weight_problem(raw["weight"], "weight" in present, text_values)
        if detail is not None:
            return [{"field": "weight", "reason": "bad_weight", "detail": detail}]
    return []


def text_problem(name: str, value, present: bool, messages: bool = False, *, role_of: str | None = None) -> dict | None:
    """The problem of one text field's value, or None: missing, not text, not UTF-8, empty, or (``messages``)
    a bad message list. ``name`` is the field reported (e.g. ``responses[2]``); ``role_of``: the field whose
    rule a message list follows (default ``name``; a response's messages are the assistant's)."""
    if messages and is_messages(value):
        detail = message_problem(value, field=role_of or name)
        return None if detail is None else {"field": name, "reason": "bad_messages", "detail": detail}
    if value is None:
        return {"field": name, "reason": "missing", "detail": f"{name} is null" if present else f"{name} is absent"}
    if isinstance(value, bytes):
        return {"field": name, "reason": "invalid_utf8", "detail": describe_bad_bytes(value)}
    if not isinstance(value, str):
        return {"field": name, "reason": "not_a_string",
                "detail": f"{name} is a {type(value).__name__} ({_short(value)}), not text"}
    if not _encodable(value):
        return {"field": name, "reason": "invalid_utf8", "detail": _surrogate_detail(name, value)}
    if not value.strip():
        return {"field": name, "reason": "empty",
                "detail": f"{name} is empty" if not value else f"{name} is only whitespace"}
    return None


def _weight_problem(value, present: bool, text_values: bool) -> str | None:
    if value is None:
        return "weight is null" if present else "weight is absent"
    if text_values and isinstance(value, str):
        try:
            number = float(value)
        except ValueError:
            return f"weight {_short(value)} is not a number"
    elif isinstance(value, bool) or not isinstance(value, (int, float)):
        return f"weight is a {type(value).__name__} ({_short(value)}), not a number"
    else:
        number = _as_float(value)
    if not math.isfinite(number):
        return f"weight {_short(value)} is not finite"
    if number <= 0:
        return f"weight {_short(value)} is not > 0"
    return None


def _as_float(value) -> float:
    try:
        return float(value)
    except OverflowError:  # an integer beyond the float range
        return math.inf


def row_rejecter(out: PairData, table: RawTable, i: int, location):
    """``reject(field, reason, detail, others=())``: records row i of ``table`` (at ``location``) as rejected
    in ``out``, with its content; the one way pair and group readers reject a row."""
    def reject(field_name, reason, detail, others=()):
        out.rejects.append(Reject(location, table.unit, field_name, reason, detail, table.content[i], list(others)))

    return reject


def fit_to_length(prompt, responses: list, fields: list[str], tokenizer, max_length: int | None, truncation: str,
                  *, same: tuple[str, str]):
    """((prompt, responses), {field: tokens removed}, length) within ``max_length`` by the policy
    ``truncation``, or a Reject (its location is filled in by the caller). The length is prompt + the
    longest response; ``fields`` names each response's field in messages and counts (winner / loser, or
    response / responses), ``same`` the (field, reason) of responses that truncation makes the same text."""
    if not all(isinstance(t, str) for t in (prompt, *responses)):
        return (prompt, responses), {}, None  # a message row: measured in the model's tokens later
    n_p, n_r = tokenizer.count(prompt), [tokenizer.count(r) for r in responses]
    length, longest = n_p + max(n_r), "longer" if len(responses) == 2 else "longest"
    if max_length is None or length <= max_length:
        return (prompt, responses), {}, length
    unit = "bytes" if getattr(tokenizer, "name", "") == "byte" else "tokens"
    too_long = f"{length} {unit} (prompt {n_p} + {longest} response {max(n_r)}) > max_length {max_length}"
    if truncation == "reject":
        return Reject(0, "", None, "too_long", too_long)
    if truncation == "truncate_response":
        budget = max_length - n_p
        if budget < 1:
            return Reject(0, "", "prompt", "too_long", f"{too_long}, and the prompt alone leaves no room to cut "
                                                       "the responses to")
        cut = [tokenizer.truncate(r, budget) for r in responses]
        if len(set(cut)) < len(cut):
            what = "winner and loser are" if fields == ["winner", "loser"] else "two responses are"
            return Reject(0, "", same[0], same[1], f"{what} the same text after truncation to {budget} {unit}")
        m_r = [tokenizer.count(r) for r in cut]
        removed = Counter()
        for f, before, after in zip(fields, n_r, m_r, strict=True):
            removed[f] += before - after
        return (prompt, cut), {f: k for f, k in removed.items() if k > 0}, n_p + max(m_r)
    budget = max_length - max(n_r)  # truncate_prompt
    if budget < 1:
        return Reject(0, "", fields[n_r.index(max(n_r))], "too_long",
                      f"{too_long}, and the {longest} response alone leaves no room for the prompt")
    cut_p = tokenizer.truncate(prompt, budget, side="left")
    if not cut_p.strip():
        return Reject(0, "", "prompt", "too_long", f"{too_long}; the prompt cut to {budget} {unit} is empty")
    return (cut_p, responses), {"prompt": n_p - tokenizer.count(cut_p)}, tokenizer.count(cut_p) + max(n_r)


def accounting(table: RawTable, out: PairData, tokenizer, *, max_length, truncation, duplicates, n_duplicates,
               n_truncated, truncated_fields, removed) -> dict:
    """The accounting dict of a checked table (every kind of row), after checking the balance."""
    rows_in = len(table) + len(table.early_rejects)
    accepted, rejected = len(out), len(out.rejects)
    if rows_in != accepted + rejected:  # never: every row is accepted or rejected exactly once
        raise RuntimeError(f"row accounting broke: rows_in {rows_in} != accepted {accepted} + rejected {rejected}")
    by_reason = Counter(r.reason for r in out.rejects)
    return {
        "source": table.source,
        "format": table.format,
        "reader": table.reader,
        "row_unit": table.unit,
        "row_numbering": "1-based line where the record starts" if table.unit == "line" else "0-based row index",
        "row_kind": table.kind,
        "columns": table.columns.mapping(table.kind) | ({} if table.weighted else {"weight": None}),
        "columns_found": table.columns_found,
        "weighted": table.weighted,
        "rows_in": rows_in,
        "rows_accepted": accepted,
        "rows_rejected": rejected,
        "rejected_by_reason": {k: by_reason[k] for k in REASONS if by_reason[k]},
        "balance": f"rows_in {rows_in} = rows_accepted {accepted} + rows_rejected {rejected}",
        "blank_lines": table.blank_lines,
        "tokenizer": getattr(tokenizer, "name", type(tokenizer).__name__),
        "max_length": max_length,
        "truncation": truncation,
        "rows_truncated": n_truncated,
        "truncated_fields": {f: truncated_fields[f] for f in CUT_FIELDS if truncated_fields[f]},
        "tokens_removed": removed,
        "duplicates": duplicates,
        "duplicate_rows": n_duplicates,
    }


def reject_later(data: PairData, rejected: dict[int, Reject], cuts: dict[int, dict[str, int]], lengths: list[int], *,
                 tokenizer: str, max_length: int | None) -> PairData:
    """``data`` after checks that need the model (its tokens, its context): accepted row i moves to the
    rejects where ``rejected`` has it (its location and row filled in here), ``cuts[i]`` counts the tokens
    truncation removed from its fields, ``lengths[i]`` is its measured length. The accounting is updated so
    that ``rows_in = rows_accepted + rows_rejected`` still holds; ``tokenizer`` and ``max_length`` say what
    the lengths were measured with and against."""
    out = PairData(rejects=list(data.rejects), kind=data.kind)
    truncated: Counter = Counter()
    for i, row in enumerate(data.rows()):
        if i in rejected:
            r = rejected[i]
            out.rejects.append(Reject(data.location[i], data.accounting["row_unit"], r.field, r.reason, r.detail,
                                      representable(row)))
            continue
        truncated.update(cuts.get(i, {}).keys())
        out.add(row, location=data.location[i], length=lengths[i])
    out.rejects.sort(key=lambda r: r.location)
    by_reason = Counter(r.reason for r in out.rejects)
    a = dict(data.accounting)
    a.update(rows_accepted=len(out), rows_rejected=len(out.rejects),
             rejected_by_reason={k: by_reason[k] for k in REASONS if by_reason[k]},
             balance=f"rows_in {a['rows_in']} = rows_accepted {len(out)} + rows_rejected {len(out.rejects)}",
             tokenizer=tokenizer, max_length=max_length,
             rows_truncated=sum(1 for i, c in cuts.items() if c and i not in rejected),
             truncated_fields={f: truncated[f] for f in CUT_FIELDS if truncated[f]},
             tokens_removed=sum(sum(c.values()) for i, c in cuts.items() if i not in rejected))
    if data.kind != "pairs":
        a["group_sizes"] = dict(sorted(Counter(len(r) for r in out.responses).items()))
    if a["rows_in"] != a["rows_accepted"] + a["rows_rejected"]:  # never: each row moves exactly once
        raise RuntimeError(f"row accounting broke: {a['balance']}")
    out.accounting = a
    return out


def _surrogate_detail(name: str, text: str) -> str:
    try:  # bytes that a reader kept with surrogateescape come back out as the bytes
        return f"{name}: {describe_bad_bytes(text.encode('utf-8', 'surrogateescape'))}"
    except UnicodeEncodeError:
        return f"{name} holds a lone surrogate, which has no UTF-8 form"


def _encodable(text: str) -> bool:
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


def _short(value, limit: int = 40) -> str:
    text = repr(value)
    return text if len(text) <= limit else text[:limit - 3] + "..."
