"""Tokenizers: the built-in byte tokenizer against Python's UTF-8 codec (RFC 3629), batching,
truncation on character boundaries; a local tokenizers-library tokenizer when installed."""

from __future__ import annotations

import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from polopt.data.tokenizer import ByteTokenizer, load_tokenizer

TOK = ByteTokenizer()
SAMPLES = ["", "plain ascii", "café crème", "星の図鑑", "emoji 🙃☂ and combining e\u0301", "\x00\n\r\t", "\U0010ffff"]


@pytest.mark.parametrize("text", SAMPLES)
def test_encode_is_the_utf8_bytes(text):
    assert TOK.encode(text) == list(text.encode("utf-8"))
    assert TOK.decode(TOK.encode(text)) == text


@settings(max_examples=300, deadline=None)
@given(st.text())  # every code point but the surrogates, which have no UTF-8 form
def test_round_trip_of_any_text(text):
    ids = TOK.encode(text, add_bos=True, add_eos=True)
    assert ids[0] == TOK.bos_id and ids[-1] == TOK.eos_id
    assert ids[1:-1] == list(text.encode("utf-8"))
    assert TOK.decode(ids) == text
    assert TOK.count(text) == len(text.encode("utf-8"))


@settings(max_examples=200, deadline=None)
@given(st.text(), st.integers(0, 40), st.sampled_from(["right", "left"]))
def test_truncate_keeps_the_longest_whole_characters_within_n_bytes(text, n, side):
    cut = TOK.truncate(text, n, side=side)
    assert len(cut.encode("utf-8")) <= n or cut == text
    assert text.startswith(cut) if side == "right" else text.endswith(cut)
    k = len(cut)
    if len(cut) < len(text):  # one more character would not fit
        more = text[:k + 1] if side == "right" else text[len(text) - k - 1:]
        assert len(more.encode("utf-8")) > n


def test_decode_skips_special_ids_and_replaces_broken_bytes():
    ids = [TOK.bos_id, *"é".encode(), 0xFF, TOK.eos_id, TOK.pad_id]
    # Python's own decoder with errors="replace" gives U+FFFD for the stray byte
    assert TOK.decode(ids) == ("é".encode() + b"\xff").decode("utf-8", errors="replace") == "é\ufffd"


def test_lone_surrogates_are_refused():
    with pytest.raises(UnicodeEncodeError):
        TOK.encode("a\ud800")


def test_batch_encode_right_pads_with_a_mask():
    ids, mask = TOK.batch_encode(["ab", "", "é"], add_eos=True)
    pad, eos = TOK.pad_id, TOK.eos_id
    assert ids.tolist() == [[97, 98, eos], [eos, pad, pad], [0xC3, 0xA9, eos]]
    assert mask.tolist() == [[True, True, True], [True, False, False], [True, True, True]]
    assert ids.dtype == torch.long and mask.dtype == torch.bool
    cut, cut_mask = TOK.batch_encode(["abcdef"], max_length=4)
    assert cut.tolist() == [[97, 98, 99, 100]] and cut_mask.all()
    assert TOK.vocab_size == 259 and len({TOK.pad_id, TOK.bos_id, TOK.eos_id}) == 3


def test_errors():
    with pytest.raises(TypeError, match="text must be a str, got int"):
        TOK.encode(5)
    with pytest.raises(ValueError, match="side must be right or left, got 'middle'"):
        TOK.truncate("abc", 1, side="middle")
    with pytest.raises(ValueError, match=r"tokenizer must be 'byte' or a local directory, got '.*nowhere' \(no such "
                                         r"directory; nothing is downloaded\)"):
        load_tokenizer("/nowhere")
    assert isinstance(load_tokenizer("byte"), ByteTokenizer) and isinstance(load_tokenizer(None), ByteTokenizer)


@pytest.fixture
def word_tokenizer_dir(tmp_path):
    """A tiny word-level tokenizer built with the tokenizers library itself and saved locally."""
    tokenizers = pytest.importorskip("tokenizers")
    from tokenizers import models, pre_tokenizers

    vocab = {"<pad>": 0, "<unk>": 1, "</s>": 2, "the": 3, "map": 4, "room": 5, "is": 6, "upstairs": 7, ".": 8}
    tok = tokenizers.Tokenizer(models.WordLevel(vocab, unk_token="<unk>"))
    tok.pre_tokenizer = pre_tokenizers.Whitespace()
    tok.add_special_tokens(["<pad>", "</s>"])
    tok.save(str(tmp_path / "tokenizer.json"))
    return tmp_path, tok


def test_local_tokenizer_matches_the_library(word_tokenizer_dir):
    directory, reference = word_tokenizer_dir
    tok = load_tokenizer(directory)
    text = "the map room is upstairs ."
    assert tok.encode(text) == reference.encode(text, add_special_tokens=False).ids == [3, 4, 5, 6, 7, 8]
    assert tok.encode(text, add_eos=True)[-1] == 2 and tok.pad_id == 0 and tok.bos_id is None
    assert tok.decode(tok.encode(text)) == reference.decode([3, 4, 5, 6, 7, 8])
    assert tok.count(text) == 6
    assert tok.truncate(text, 3) == "the map room" and tok.truncate(text, 2, side="left") == "upstairs ."
    ids, mask = tok.batch_encode([text, "the room"], add_eos=True)
    assert ids.tolist()[1] == [3, 5, 2, 0, 0, 0, 0] and mask.sum(1).tolist() == [7, 3]
    with pytest.raises(ValueError, match="has no beginning-of-sequence token; pass bos="):
        tok.encode(text, add_bos=True)
    with pytest.raises(ValueError, match="special token '<s>' is not in the vocabulary"):
        load_tokenizer(directory, bos="<s>")


def test_pair_lengths_in_tokens_of_a_local_tokenizer(word_tokenizer_dir, tmp_path):
    import json

    from polopt.data import load_pairs

    directory, _ = word_tokenizer_dir
    path = tmp_path / "p.jsonl"
    path.write_text(json.dumps({"prompt": "the map room", "winner": "is upstairs .", "loser": "is the room"}) + "\n",
                    encoding="utf-8")
    data = load_pairs(path, tokenizer=str(directory), max_length=5, truncation="truncate_response")
    assert data.winner == ["is upstairs"] and data.loser == ["is the"]  # 2 tokens each beside 3 of prompt
    assert data.length == [5] and data.accounting["tokens_removed"] == 2
