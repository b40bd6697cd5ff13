"""Rows as a local LM's token ids (polopt/data/chat.py): message lists checked, the convention's pieces, and
truncation in tokens. Expected ids are derived by hand from the word-level tokenizer of tests/helpers_local_lm.py
(its vocabulary: the specials, then the words, in order) and its chat template."""

from __future__ import annotations

import pytest

pytest.importorskip("transformers")

from helpers_local_lm import SPECIALS, WORDS, word_tokenizer  # noqa: E402

from polopt.data.chat import RowProblem, fit_ids, message_problem, pair_ids  # noqa: E402

ID = {w: i for i, w in enumerate(SPECIALS + WORDS)}


@pytest.mark.parametrize("value,field,detail", [
    ([], "prompt", "prompt is an empty message list"),
    (["hello"], "prompt", "prompt[0] must be an object with a string role and a string content"),
    ([{"role": "user", "content": 3}], "prompt", "prompt[0] must be an object"),
    ([{"role": "user", "content": "hi"}], "winner", "winner[0] has role 'user'; a response's messages are the "
                                                    "assistant's"),
])
def test_malformed_message_lists_are_named(value, field, detail):
    assert message_problem(value, field=field).startswith(detail)


def test_a_valid_conversation_passes():
    prompt = [{"role": "system", "content": "be brief"}, {"role": "user", "content": "where ?"}]
    assert message_problem(prompt, field="prompt") is None
    assert message_problem([{"role": "assistant", "content": "near"}], field="loser") is None


def test_plain_and_chat_rows_by_hand():
    tok = word_tokenizer()
    # plain: <s> + prompt words; response words + </s>
    p, w, lo = pair_ids(tok, "where is the kettle ?", "near the river .", "blue")
    assert p == [ID["<s>"], ID["where"], ID["is"], ID["the"], ID["kettle"], ID["?"]]
    assert w == [ID["near"], ID["the"], ID["river"], ID["."], ID["</s>"]] and lo == [ID["blue"], ID["</s>"]]
    # chat (the loser is a message list, so the string winner counts as one assistant message): the template
    # renders "<|user|> where ? <|assistant|> " for the prompt and adds "blue </s> " for a response
    p, w, lo = pair_ids(tok, "where ?", "blue", [{"role": "assistant", "content": "green ."}])
    assert p == [ID["<|user|>"], ID["where"], ID["?"], ID["<|assistant|>"]]
    assert w == [ID["blue"], ID["</s>"]] and lo == [ID["green"], ID["."], ID["</s>"]]


def test_a_template_whose_turn_does_not_extend_the_prompt_is_a_row_problem():
    tok = word_tokenizer()
    tok.chat_template = ("{% for m in messages %}{{ m['content'] }} {% endfor %}"
                         "{% if add_generation_prompt %}<|assistant|> {% endif %}")
    with pytest.raises(RowProblem) as caught:
        pair_ids(tok, [{"role": "user", "content": "where ?"}], "blue", "green")
    assert caught.value.reason == "template_mismatch"


def test_a_template_that_refuses_a_conversation_is_a_row_problem():
    """A template's raise_exception (transformers' way for a template to refuse, e.g. a system message it does not
    take) rejects that row only."""
    tok = word_tokenizer()
    tok.chat_template = ("{% for m in messages %}{% if m['role'] == 'system' %}{{ raise_exception('no system "
                         "messages') }}{% endif %}{{ m['content'] }} {% endfor %}")
    with pytest.raises(RowProblem) as caught:
        pair_ids(tok, [{"role": "system", "content": "be brief"}, {"role": "user", "content": "where ?"}], "a", "b")
    assert caught.value.reason == "template_error" and "no system messages" in caught.value.detail


def test_truncation_in_tokens():
    p, w, lo = [1, 2, 3, 4], [5, 6, 7, 8, 9], [5, 6, 10]
    assert fit_ids(p, w, lo, limit=9, truncation="reject") == (p, w, lo, {})  # 4 + 5 = 9 fits
    with pytest.raises(RowProblem, match=r"9 tokens \(prompt 4 \+ longer response 5\) > 8"):
        fit_ids(p, w, lo, limit=8, truncation="reject")
    assert fit_ids(p, w, lo, limit=7, truncation="truncate_response") == (p, [5, 6, 7], [5, 6, 10], {"winner": 2})
    assert fit_ids(p, w, lo, limit=7, truncation="truncate_prompt") == ([3, 4], w, lo, {"prompt": 2})
    with pytest.raises(RowProblem) as caught:  # both responses become [5, 6]
        fit_ids(p, w, lo, limit=6, truncation="truncate_response")
    assert caught.value.reason == "identical"
    with pytest.raises(RowProblem) as caught:
        fit_ids(p, w, lo, limit=5, truncation="truncate_prompt")
    assert caught.value.reason == "too_long" and caught.value.field == "winner"


def test_the_data_layer_takes_message_lists_only_when_asked(tmp_path):
    """read_pair_file(messages=True) accepts valid message lists and rejects malformed ones as bad_messages;
    without it (the built-in transformer's path) a list is not_a_string, as before."""
    import json

    from polopt.data import PairFileSpec, read_pair_file

    rows = [{"prompt": [{"role": "user", "content": "where ?"}], "winner": "near", "loser": "far"},
            {"prompt": [{"role": "user"}], "winner": "near", "loser": "far"},
            {"prompt": "where ?", "winner": [{"role": "assistant", "content": "near"}], "loser": "far"},
            {"prompt": "where ?", "winner": [{"role": "assistant", "content": "near"}], "loser": "far"}]
    path = tmp_path / "pairs.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    data = read_pair_file(PairFileSpec(path), messages=True)
    assert data.location == [1, 3]
    assert [(r.location, r.reason) for r in data.rejects] == [(2, "bad_messages"), (4, "duplicate")]
    plain = read_pair_file(PairFileSpec(path))
    assert len(plain) == 0 and {r.reason for r in plain.rejects} == {"not_a_string"}
