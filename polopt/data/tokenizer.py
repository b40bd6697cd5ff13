"""Tokenizers: text <-> token ids, and batches of ids with right padding and a mask.

Owns :class:`ByteTokenizer`, the built-in one (the UTF-8 bytes of the text are
the ids 0..255, RFC 3629; three special ids follow), :class:`LocalTokenizer`,
a wrapper around a tokenizer saved in a local directory (the ``tokenizers``
library's ``tokenizer.json``, or a ``transformers`` tokenizer folder; never
downloaded), and :func:`load_tokenizer`, which picks one from a config value.

Every tokenizer offers the same small interface: ``encode(text)``,
``decode(ids)``, ``count(text)``, ``truncate(text, n, side=)``,
``batch_encode(texts)`` and the ids ``pad_id``, ``eos_id``, ``bos_id`` with
``vocab_size``.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # torch is imported when a batch is built, so `polopt data` starts quickly
    from torch import Tensor


class _Batching:
    """Batch encoding shared by every tokenizer; needs ``encode`` and ``pad_id``."""

    def count(self, text: str) -> int:
        """Number of content tokens of ``text`` (no special ids)."""
        return len(self.encode(text))

    def batch_encode(self, texts: list[str], *, add_bos: bool = False, add_eos: bool = True,
                     max_length: int | None = None) -> tuple[Tensor, Tensor]:
        """Ids ``(B, T)`` (int64) right-padded with ``pad_id``, and a mask ``(B, T)`` (bool,
        True on real tokens). ``max_length`` cuts each sequence on the right (the special ids
        count); T is the longest sequence after that."""
        import torch

        rows = [self.encode(t, add_bos=add_bos, add_eos=add_eos) for t in texts]
        if max_length is not None:
            rows = [r[:max_length] for r in rows]
        width = max((len(r) for r in rows), default=0)
        ids = torch.full((len(rows), width), self.pad_id, dtype=torch.long)  # (B, T)
        mask = torch.zeros((len(rows), width), dtype=torch.bool)  # (B, T)
        for i, r in enumerate(rows):
            ids[i, :len(r)] = torch.as_tensor(r, dtype=torch.long)
            mask[i, :len(r)] = True
        return ids, mask


class ByteTokenizer(_Batching):
    """The UTF-8 encoding of the text (RFC 3629) as ids 0..255, then ``pad_id`` = 256,
    ``bos_id`` = 257 (beginning of sequence), ``eos_id`` = 258 (end of sequence).

    Every string round-trips: ``decode(encode(s)) == s``. Lengths are bytes.
    """

    name = "byte"
    pad_id, bos_id, eos_id = 256, 257, 258
    vocab_size = 259

    def encode(self, text: str, *, add_bos: bool = False, add_eos: bool = False) -> list[int]:
        if not isinstance(text, str):
            raise TypeError(f"text must be a str, got {type(text).__name__}")
        # "strict": a lone surrogate has no UTF-8 form, so it is an error, not a silent "?"
        ids = list(text.encode("utf-8"))
        return [self.bos_id] * add_bos + ids + [self.eos_id] * add_eos

    def decode(self, ids) -> str:
        """Text of the byte ids; special ids are skipped. Bytes that are not valid UTF-8
        (e.g. a model's sample cut mid-character) become U+FFFD."""
        data = bytes(int(i) for i in ids if 0 <= int(i) < 256)
        return data.decode("utf-8", errors="replace")

    def truncate(self, text: str, n: int, *, side: str = "right") -> str:
        """The longest piece of ``text`` with at most ``n`` bytes, cut on a character boundary;
        ``side="right"`` keeps the start, ``"left"`` keeps the end."""
        _check_side(side)
        data = text.encode("utf-8")
        if len(data) <= n:
            return text
        piece = data[:n] if side == "right" else data[len(data) - n:] if n > 0 else b""
        # the cut may split a multi-byte character: its leftover bytes are dropped, never replaced
        return piece.decode("utf-8", errors="ignore")


class LocalTokenizer(_Batching):
    """A tokenizer saved in a local directory: ``tokenizer.json`` read with the ``tokenizers``
    library, else the folder read with ``transformers.AutoTokenizer`` (``local_files_only``).

    ``pad``, ``bos`` and ``eos`` name special tokens of its vocabulary; a missing pad token
    falls back to the eos token (common practice for causal models).
    """

    def __init__(self, directory: str | Path, *, pad: str | None = None, bos: str | None = None,
                 eos: str | None = None):
        directory = Path(directory)
        if not directory.is_dir():
            raise ValueError(f"tokenizer must be 'byte' or a local directory, got {str(directory)!r} "
                             "(no such directory; nothing is downloaded)")
        self.name = str(directory)
        self._tok, self._hf = _open_local(directory)
        self.vocab_size = self._tok.get_vocab_size() if self._hf is None else len(self._hf)
        self.bos_id = self._special(bos, ("<s>", "<bos>", "[BOS]", "<|begin_of_text|>"), "bos_token_id")
        self.eos_id = self._special(eos, ("</s>", "<eos>", "[EOS]", "<|endoftext|>"), "eos_token_id")
        self.pad_id = self._special(pad, ("<pad>", "[PAD]"), "pad_token_id")
        if self.pad_id is None:
            self.pad_id = self.eos_id if self.eos_id is not None else 0

    def _token_id(self, token: str) -> int | None:
        return self._tok.token_to_id(token) if self._hf is None else self._hf.convert_tokens_to_ids(token)

    def _special(self, given: str | None, candidates: tuple[str, ...], hf_attr: str) -> int | None:
        if given is not None:
            found = self._token_id(given)
            if found is None:
                raise ValueError(f"special token {given!r} is not in the vocabulary of {self.name}")
            return found
        if self._hf is not None and getattr(self._hf, hf_attr, None) is not None:
            return getattr(self._hf, hf_attr)
        for token in candidates:
            found = self._token_id(token)
            if found is not None and (self._hf is None or found != self._hf.unk_token_id):
                return found
        return None

    def encode(self, text: str, *, add_bos: bool = False, add_eos: bool = False) -> list[int]:
        if not isinstance(text, str):
            raise TypeError(f"text must be a str, got {type(text).__name__}")
        if self._hf is None:
            ids = self._tok.encode(text, add_special_tokens=False).ids
        else:
            ids = self._hf.encode(text, add_special_tokens=False)
        if add_bos and self.bos_id is None:
            raise ValueError(f"tokenizer {self.name} has no beginning-of-sequence token; pass bos=")
        if add_eos and self.eos_id is None:
            raise ValueError(f"tokenizer {self.name} has no end-of-sequence token; pass eos=")
        return [self.bos_id] * add_bos + list(ids) + [self.eos_id] * add_eos

    def decode(self, ids) -> str:
        ids = [int(i) for i in ids]
        if self._hf is None:
            return self._tok.decode(ids, skip_special_tokens=True)
        return self._hf.decode(ids, skip_special_tokens=True)

    def truncate(self, text: str, n: int, *, side: str = "right") -> str:
        """At most ``n`` tokens of ``text``, cut on a token boundary, taken from the original
        text by character offsets where the tokenizer gives them (so the kept text is unchanged)."""
        _check_side(side)
        ids = self.encode(text)
        if len(ids) <= n:
            return text
        if self._hf is None:
            offsets = self._tok.encode(text, add_special_tokens=False).offsets
            if n == 0:
                return ""
            return text[:offsets[n - 1][1]] if side == "right" else text[offsets[len(ids) - n][0]:]
        kept = ids[:n] if side == "right" else ids[len(ids) - n:] if n > 0 else []
        return self.decode(kept)


def _check_side(side: str) -> None:
    if side not in ("right", "left"):
        raise ValueError(f"side must be right or left, got {side!r}")


def _open_local(directory: Path):
    """(tokenizers.Tokenizer, None) or (None, transformers tokenizer) for a local folder."""
    file = directory / "tokenizer.json"
    try:
        import tokenizers
    except ImportError:
        tokenizers = None
    if tokenizers is not None and file.is_file():
        return tokenizers.Tokenizer.from_file(str(file)), None
    try:
        import transformers
    except ImportError:
        raise ValueError(f"tokenizer directory {str(directory)!r} needs the 'tokenizers' package (for a "
                         "tokenizer.json) or 'transformers'; install the extra: "
                         "pip install 'polopt[local-lm]'") from None
    return None, transformers.AutoTokenizer.from_pretrained(str(directory), local_files_only=True)


def load_tokenizer(spec: str | Path | None = "byte", **specials):
    """``"byte"`` (or None): the built-in :class:`ByteTokenizer`; a local directory: a
    :class:`LocalTokenizer`. Never downloads."""
    if spec is None or str(spec) == "byte":
        return ByteTokenizer()
    return LocalTokenizer(spec, **specials)
