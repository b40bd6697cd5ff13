"""Checking rows beyond pairs: unpaired, ranking and scored rows, accepted or rejected like pairs.

The kinds (:data:`polopt.data.rows.KINDS`; which one a file holds: :mod:`polopt.data.kinds`)::

    unpaired  {"prompt": ..., "response": ..., "label": 1}             label 1 / 0 or true / false
    ranking   {"prompt": ..., "responses": [r_0, ...], "ranking": [k_0, ...]}
              ranking[i] is the rank of responses[i]: 0 = best, a permutation of 0..G-1
    scored    {"prompt": ..., "responses": [r_0, ...], "scores": [s_0, ...]}
              scores[i] is the score of responses[i], a finite number (higher = better)

The checks, in :mod:`polopt.data.validate`'s order (a row gets the first failing check as its reason,
the other field problems are listed beside it):

1. fields: the prompt as for pairs; unpaired: the response a text (or a message list, with
   ``model=local_lm``), the label 1, 0, true or false (``bad_label``; in CSV the text ``1``, ``0``,
   ``true``, ``false`` in any case); ranking and scored: ``responses`` a list (``not_a_list``; in CSV a
   JSON array in the cell) of at least 2 (``too_few_responses``) texts, each checked as a text field and
   reported as ``responses[k]``; ``ranking`` / ``scores`` a list (``not_a_list``) of one entry per
   response (``length_mismatch``): the ranking a permutation of 0..G-1 (``not_a_permutation``; ties are
   not rankings), the scores finite numbers (``bad_score``); the weight as for pairs;
2. no two responses of a row the same text (``repeated_response``);
3. length: prompt + longest response against ``max_length``; ``truncate_response`` cuts every response
   on the right (two that become the same: ``repeated_response``), ``truncate_prompt`` the prompt on
   the left;
4. duplicates: the same (prompt, responses, feedback, weight) as an earlier accepted row.

Every row is accepted or rejected once, so ``rows_in == rows_accepted + rows_rejected`` holds as for
pairs (:func:`polopt.data.validate.accounting`).
"""

from __future__ import annotations

import json
import math
from collections import Counter

from polopt.data.read import RawTable
from polopt.data.rows import KINDS, Reject
from polopt.data.validate import (
    PairData,
    accounting,
    check_policies,
    fit_to_length,
    row_rejecter,
    text_problem,
    weight_problems,
)

LABELS = {"1": 1.0, "0": 0.0, "true": 1.0, "false": 0.0}  # CSV text of a label, lower-cased


def _short(value, limit: int = 40) -> str:
    text = repr(value)
    return text if len(text) <= limit else text[:limit - 3] + "..."


def _as_list(value, text_values: bool):
    """A list field's value as a list (CSV: parsed from a JSON array in the cell), or None."""
    if text_values and isinstance(value, str):
        try:
            value = json.loads(value)
        except (ValueError, RecursionError):  # ValueError also: an integer of over 4300 digits
            return None
    return list(value) if isinstance(value, (list, tuple)) else None


def _problem(name: str, reason: str, detail: str) -> dict:
    return {"field": name, "reason": reason, "detail": detail}


def label_value(value, text_values: bool) -> float | None:
    """An unpaired row's label as 1.0 / 0.0, or None where it is not 1, 0, true or false."""
    if text_values and isinstance(value, str):
        return LABELS.get(value.strip().lower())
    if isinstance(value, bool):
        return float(value)
    if isinstance(value, (int, float)) and value in (0, 1):
        return float(value)
    return None


def _responses(raw: dict, present: set, text_values: bool, messages: bool) -> tuple[list | None, list[dict]]:
    """(the responses, their problems) of a ranking or scored row."""
    value = raw["responses"]
    if value is None:
        return None, [text_problem("responses", None, "responses" in present)]
    members = _as_list(value, text_values)
    if members is None:
        how = " (a JSON array in the cell)" if text_values else ""
        return None, [_problem("responses", "not_a_list", f"responses is {_short(value)}, not a list{how}")]
    if len(members) < 2:
        return None, [_problem("responses", "too_few_responses",
                               f"{len(members)} response(s); a ranking or scored row ranks or scores at least 2")]
    problems = [p for k, r in enumerate(members)
                if (p := text_problem(f"responses[{k}]", r, True, messages, role_of="response"))]
    if not problems:
        seen: dict = {}
        for k, r in enumerate(members):
            key = json.dumps(r)
            if key in seen:
                problems.append(_problem(f"responses[{k}]", "repeated_response",
                                         f"responses[{k}] is the same text as responses[{seen[key]}]"))
                break
            seen[key] = k
    return members, problems


def _per_response(field: str, kind: str, entries: str, value, g: int | None,
                  text_values: bool) -> tuple[list | None, list[dict]]:
    """``value`` as a list of one entry per response, or the problem: ``not_a_list`` (a list of ``kind``), or
    ``length_mismatch`` (so many ``entries`` for the row's ``g`` responses)."""
    items = _as_list(value, text_values)
    if items is None:
        return None, [_problem(field, "not_a_list", f"{field} is {_short(value)}, not a list of {kind}")]
    if g is not None and len(items) != g:
        return None, [_problem(field, "length_mismatch", f"{len(items)} {entries} for {g} responses")]
    return items, []


def _ranking(value, g: int | None, text_values: bool) -> tuple[list | None, list[dict]]:
    ranks, problems = _per_response("ranking", "ranks", "ranks", value, g, text_values)
    if ranks is None:
        return None, problems
    whole = all(isinstance(k, int) and not isinstance(k, bool) for k in ranks)
    if not whole or sorted(ranks) != list(range(len(ranks))):
        return None, [_problem("ranking", "not_a_permutation", f"ranking {_short(ranks, 60)} is not a permutation of "
                                                               f"0..{len(ranks) - 1} (ranking[i] is the rank of "
                                                               "responses[i], 0 = best, no ties)")]
    return ranks, []


def _scores(value, g: int | None, text_values: bool) -> tuple[list | None, list[dict]]:
    scores, problems = _per_response("scores", "numbers", "scores", value, g, text_values)
    if scores is None:
        return None, problems
    for k, s in enumerate(scores):
        if isinstance(s, bool) or not isinstance(s, (int, float)):
            return None, [_problem("scores", "bad_score", f"scores[{k}] is {_short(s)}, not a number")]
        try:
            finite = math.isfinite(float(s))
        except OverflowError:  # an integer beyond the float range
            finite = False
        if not finite:
            return None, [_problem("scores", "bad_score", f"scores[{k}] is {_short(s)}, not finite")]
    return [float(s) for s in scores], []


def parse_row(kind: str, raw: dict, present: set, text_values: bool, messages: bool) -> tuple[dict | None, list]:
    """(the row as ``{prompt, responses, feedback}`` lists, None where it has problems; its problems in
    field order) for a row of ``kind`` (unpaired, ranking or scored)."""
    problems = [p for p in [text_problem("prompt", raw["prompt"], "prompt" in present, messages)] if p]
    if kind == "unpaired":
        problem = text_problem("response", raw["response"], "response" in present, messages)
        members = None if problem else [raw["response"]]
        problems += [problem] if problem else []
        label = label_value(raw["label"], text_values)
        feedback = None if label is None else [label]
        if label is None:
            problems.append(_problem("label", "missing", "label is null" if "label" in present else "label is absent")
                            if raw["label"] is None else
                            _problem("label", "bad_label", f"label {_short(raw['label'])} is not 1, 0, true or false"))
    else:
        members, found = _responses(raw, present, text_values, messages)
        problems += found
        g = len(members) if members is not None else None
        name = KINDS[kind][1]
        if raw[name] is None:
            feedback, found = None, [text_problem(name, None, name in present)]
            found[0]["detail"] = f"{name} is null" if name in present else f"{name} is absent"
        else:
            feedback, found = (_ranking if kind == "ranking" else _scores)(raw[name], g, text_values)
        problems += found
    problems += weight_problems(raw, present, text_values)
    if problems:
        return None, problems
    return {"prompt": raw["prompt"], "responses": members, "feedback": feedback}, []


def validate_groups(table: RawTable, tokenizer, *, max_length: int | None = None, truncation: str = "reject",
                    duplicates: str = "reject", messages: bool = False) -> PairData:
    """Check every row of ``table`` (a file of unpaired, ranking or scored rows; see the module docstring);
    return the accepted rows and the accounting, as :func:`polopt.data.validate.validate` does for pairs."""
    if messages and max_length is not None:
        raise ValueError("message rows are measured in the model's tokens after the chat template, not here: "
                         "validate them with max_length=None")
    check_policies(max_length, truncation, duplicates)
    kind, one = table.kind, table.kind == "unpaired"
    first, second = KINDS[kind]
    out = PairData(rejects=list(table.early_rejects), kind=kind)
    seen: dict[str, int] = {}
    counts: Counter = Counter()
    truncated_fields: Counter = Counter()
    for i, location in enumerate(table.locations):
        raw = {f: v[i] for f, v in table.values.items()}

        reject = row_rejecter(out, table, i, location)

        row, problems = parse_row(kind, raw, table.present[i], table.text_values, messages)
        if problems:
            reject(problems[0]["field"], problems[0]["reason"], problems[0]["detail"], problems[1:])
            continue
        weight = float(raw["weight"]) if table.weighted else 1.0
        key = json.dumps([row["prompt"], row["responses"], row["feedback"], weight])
        field = "response" if one else "responses"
        fitted = fit_to_length(row["prompt"], row["responses"], [field] * len(row["responses"]), tokenizer,
                               max_length, truncation, same=(field, "repeated_response"))
        if isinstance(fitted, Reject):
            reject(fitted.field, fitted.reason, fitted.detail)
            continue
        (prompt, responses), cut, length = fitted
        if key in seen:
            counts["duplicates"] += 1
            if duplicates == "reject":
                reject(None, "duplicate", f"the same row and weight as {table.unit} {seen[key]}")
                continue
        else:
            seen[key] = location
        if cut:
            counts["truncated"] += 1
            truncated_fields.update(cut.keys())
            counts["removed"] += sum(cut.values())
        members, feedback = (responses[0], row["feedback"][0]) if one else (responses, row["feedback"])
        out.add({"prompt": prompt, first: members, second: feedback, "weight": weight}, location=location,
                length=length)
    out.rejects.sort(key=lambda r: r.location)
    out.accounting = accounting(table, out, tokenizer, max_length=max_length, truncation=truncation,
                                duplicates=duplicates, n_duplicates=counts["duplicates"],
                                n_truncated=counts["truncated"], truncated_fields=truncated_fields,
                                removed=counts["removed"])
    out.accounting["group_sizes"] = dict(sorted(Counter(len(r) for r in out.responses).items()))
    return out
