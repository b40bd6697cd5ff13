"""Rows as the token ids of a local causal LM (``model=local_lm``): plain text and chat messages, one convention.

A prompt is a string or a list of messages ``{"role": ..., "content": ...}``; a response (winner, loser) a
string or a list of assistant messages. A row is a *chat row* when any of its three fields is a message
list; its strings then count as one message (the prompt's as ``user``, a response's as ``assistant``).

Chat rows, rendered with the tokenizer's chat template (transformers' ``apply_chat_template``)::

    prompt_text   = apply_chat_template(prompt, add_generation_prompt=True, tokenize=False)
    full_text     = apply_chat_template(prompt + response, tokenize=False)
    response_text = full_text[len(prompt_text):]     # a row where full_text does not start with
                                                     # prompt_text is rejected (template_mismatch)
    prompt ids    = tokenizer(prompt_text, add_special_tokens=False)
    response ids  = tokenizer(response_text, add_special_tokens=False)

Plain rows::

    prompt ids    = tokenizer(prompt)                # with the tokenizer's own special tokens
    response ids  = tokenizer(response, add_special_tokens=False) + [eos_token_id]

A response's log-probability is then the sum of the model's next-token log-probabilities over its
ids, each scored after the prompt ids and the response ids before it. Prompt and response are
tokenised apart, so a merge across their boundary never happens (common practice).
"""

from __future__ import annotations

from collections.abc import Mapping

RESPONSE_ROLE = "assistant"


class RowProblem(ValueError):
    """Why one row cannot be turned into ids: a reason code of :data:`polopt.data.rows.REASONS` and a detail."""

    def __init__(self, reason: str, field: str | None, detail: str):
        super().__init__(detail)
        self.reason, self.field, self.detail = reason, field, detail


def is_messages(value) -> bool:
    """Whether a field's value is a message list (rather than a string)."""
    return isinstance(value, list)


def message_problem(value: list, *, field: str) -> str | None:
    """Why ``value`` is not a valid message list for ``field`` (None: it is): a non-empty list of objects with
    a string ``role`` and a string ``content``, every role ``assistant`` in a winner or loser."""
    if not value:
        return f"{field} is an empty message list"
    for k, message in enumerate(value):
        if not isinstance(message, Mapping) or not isinstance(message.get("role"), str) \
                or not isinstance(message.get("content"), str):
            return f"{field}[{k}] must be an object with a string role and a string content, got {message!r:.60}"
        if field != "prompt" and message["role"] != RESPONSE_ROLE:
            return f"{field}[{k}] has role {message['role']!r}; a response's messages are the assistant's"
    return None


def as_messages(value, role: str) -> list[dict]:
    """A message list as it is, a string as one message of ``role``."""
    return [dict(m) for m in value] if is_messages(value) else [{"role": role, "content": value}]


def is_chat_row(prompt, *responses) -> bool:
    return any(is_messages(v) for v in (prompt, *responses))


def _ids(tokenizer, text: str, *, special: bool) -> list[int]:
    return list(tokenizer(text, add_special_tokens=special)["input_ids"])


def _render(tokenizer, messages: list[dict], **keys) -> str:
    """``apply_chat_template(messages, tokenize=False, **keys)``; a template that refuses the conversation
    (``raise_exception`` in the template, e.g. roles that do not alternate) makes a :class:`RowProblem`."""
    from jinja2 import TemplateError  # transformers renders chat templates with jinja2

    try:
        return tokenizer.apply_chat_template(messages, tokenize=False, **keys)
    except TemplateError as err:
        raise RowProblem("template_error", None, f"the chat template refused this conversation: {err}") from None


def chat_ids(tokenizer, prompt, response) -> tuple[list[int], list[int]]:
    """(prompt ids, response ids) of a chat row by the module's convention; a :class:`RowProblem` where the
    rendering of the whole conversation does not start with the prompt's."""
    messages = as_messages(prompt, "user")
    prompt_text = _render(tokenizer, messages, add_generation_prompt=True)
    full_text = _render(tokenizer, messages + as_messages(response, RESPONSE_ROLE))
    if not full_text.startswith(prompt_text):
        raise RowProblem("template_mismatch", None, "the chat template's rendering of prompt + response does not "
                                                    "start with its rendering of the prompt with the generation "
                                                    "prompt, so the response's tokens are not defined")
    return _ids(tokenizer, prompt_text, special=False), _ids(tokenizer, full_text[len(prompt_text):], special=False)


def plain_ids(tokenizer, prompt: str, response: str) -> tuple[list[int], list[int]]:
    """(prompt ids, response ids) of a plain row by the module's convention."""
    return _ids(tokenizer, prompt, special=True), _ids(tokenizer, response, special=False) + [tokenizer.eos_token_id]


def pair_ids(tokenizer, prompt, winner, loser) -> tuple[list[int], list[int], list[int]]:
    """(prompt, winner, loser) ids of one row (chat or plain, see the module docstring), or a :class:`RowProblem`
    (a response rendered to no token, a prompt of no token). A chat row's prompt ids are the same for both
    responses (its prompt text does not depend on the response)."""
    p, (w, lo) = member_ids(tokenizer, prompt, [winner, loser], names=("winner", "loser"))
    return p, w, lo


def member_ids(tokenizer, prompt, responses: list, *, names) -> tuple[list[int], list[list[int]]]:
    """(prompt ids, the ids of each response) of one row of any kind by the same convention as
    :func:`pair_ids`; ``names[k]`` is the field reported for response k."""
    ids = chat_ids if is_chat_row(prompt, *responses) else plain_ids
    rendered = [ids(tokenizer, prompt, r) for r in responses]
    p = rendered[0][0]
    if not p:
        raise RowProblem("empty", "prompt", "the prompt has no tokens, so nothing scores the first response token")
    for name, (_, r) in zip(names, rendered, strict=True):
        if not r:
            raise RowProblem("empty", name, f"the {name} renders to no tokens")
    return p, [r for _, r in rendered]


def check_tokenizer(tokenizer, *, chat: bool, plain: bool) -> None:
    """One ValueError where the tokenizer cannot encode the rows: chat rows without a chat template, plain
    rows without an end token."""
    if chat and not getattr(tokenizer, "chat_template", None):
        raise ValueError("the pair file has message rows (lists of {role, content}) but the model's tokenizer has "
                         "no chat template; give one with task.chat_template=PATH (a Jinja template file)")
    if plain and tokenizer.eos_token_id is None:
        raise ValueError("the tokenizer has no end-of-sequence token (eos_token); a plain response must end with one "
                         "so that the model scores where it stops")


def fit_member_ids(prompt: list[int], responses: list[list[int]], *, limit: int, truncation: str,
                   field: str) -> tuple[list[int], list[list[int]], dict[str, int]]:
    """:func:`fit_ids` for a row of any number of responses (``field``: ``response`` or ``responses``, the
    field reported): cut every response on the right (two that become the same: ``repeated_response``) or
    the prompt on the left, with the tokens removed per field."""
    n_p, n_r = len(prompt), max(len(r) for r in responses)
    if n_p + n_r <= limit:
        return prompt, responses, {}
    too_long = f"{n_p + n_r} tokens (prompt {n_p} + longest response {n_r}) > {limit}"
    if truncation == "truncate_response":
        budget = limit - n_p
        if budget < 1:
            raise RowProblem("too_long", "prompt", f"{too_long}, and the prompt alone leaves no room for a response")
        cut = [r[:budget] for r in responses]
        if len({tuple(r) for r in cut}) < len(cut):
            raise RowProblem("repeated_response", field, f"two responses are the same tokens after truncation to "
                                                         f"{budget}")
        return prompt, cut, {field: sum(map(len, responses)) - sum(map(len, cut))}
    if truncation == "truncate_prompt":
        budget = limit - n_r
        if budget < 1:
            raise RowProblem("too_long", field, f"{too_long}, and the longest response alone leaves no room for the "
                                                "prompt")
        return prompt[n_p - budget:], responses, {"prompt": n_p - budget}
    raise RowProblem("too_long", None, too_long)


def fit_ids(prompt: list[int], winner: list[int], loser: list[int], *, limit: int,
            truncation: str) -> tuple[list[int], list[int], list[int], dict[str, int]]:
    """The row's ids within ``limit`` tokens of prompt + longer response, by ``truncation``
    (:data:`polopt.data.validate.TRUNCATION`: ``reject``, ``truncate_response`` cuts both responses on the right,
    ``truncate_prompt`` cuts the prompt on the left), with the tokens removed per field; a :class:`RowProblem`
    where the row cannot fit (``too_long``) or its responses become the same (``identical``)."""
    n_p, n_r = len(prompt), max(len(winner), len(loser))
    if n_p + n_r <= limit:
        return prompt, winner, loser, {}
    too_long = f"{n_p + n_r} tokens (prompt {n_p} + longer response {n_r}) > {limit}"
    if truncation == "truncate_response":
        budget = limit - n_p
        if budget < 1:
            raise RowProblem("too_long", "prompt", f"{too_long}, and the prompt alone leaves no room for a response")
        w, lo = winner[:budget], loser[:budget]
        if w == lo:
            raise RowProblem("identical", "loser", f"winner and loser are the same tokens after truncation to {budget}")
        cut = {f: n for f, n in (("winner", len(winner) - len(w)), ("loser", len(loser) - len(lo))) if n > 0}
        return prompt, w, lo, cut
    if truncation == "truncate_prompt":
        budget = limit - n_r
        if budget < 1:
            raise RowProblem("too_long", "winner" if len(winner) >= len(loser) else "loser",
                             f"{too_long}, and the longer response alone leaves no room for the prompt")
        return prompt[n_p - budget:], winner, loser, {"prompt": n_p - budget}
    raise RowProblem("too_long", None, too_long)
