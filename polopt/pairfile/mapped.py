"""Pairs that stay on disk: an Arrow file, memory-mapped, read one batch at a time.

A :class:`polopt.pairs.PairSet` holds every pair in RAM as tensors. For a large
dataset, :class:`MappedPairs` offers the part of its interface the trainer's
minibatch path reads (``len``, ``select(index) -> PairSet``, ``weight``,
``tokens``): the rows live in an Arrow file that ``datasets.Dataset.from_file``
memory-maps, and ``select`` reads the rows of one batch and pads them into
tensors. The operating system pages the file in and out as it likes, so resident
memory stays near the size of the model plus a batch, not the dataset
(bench/stream_pairs.py prints the peak RSS for a million pairs).

Columns (Arrow): ``prompt``, ``winner``, ``loser`` (token lists, or integer ids for
finite tasks), ``reference_winner``, ``reference_loser`` (float64, the cached
reference log-probabilities), optional ``weight`` (float64). :func:`write_arrow`
writes such a file chunk by chunk, never holding the whole dataset.

Full-batch training (``train.batch_size=null``) would read every row each step;
a mapped set refuses it with a ValueError.

:class:`StreamedPairs` is the same for ``task.stream=true`` (:mod:`polopt.pairfile.streamed`): the file
holds only the token columns (and ``weight``), and ``select`` computes the reference
log-probabilities of each batch as it reads it (no gradients), so they are never computed for
the whole file up front nor held for it.
"""

from __future__ import annotations

from collections.abc import Iterable
from pathlib import Path

import numpy as np
import torch

from polopt.pairs import PairSet

Tensor = torch.Tensor

COLUMNS = ("prompt", "winner", "loser", "reference_winner", "reference_loser")


def write_arrow(path: str | Path, chunks: Iterable[dict]) -> Path:
    """Write chunks (dicts of equal-length columns: numpy arrays, lists of token lists, or pyarrow
    arrays) to one Arrow stream file, the format ``datasets.Dataset.from_file`` memory-maps."""
    import pyarrow as pa

    path = Path(path)
    writer = None
    try:
        for chunk in chunks:
            columns = {k: v if isinstance(v, pa.Array) else pa.array(v) for k, v in chunk.items()}
            batch = pa.RecordBatch.from_pydict(columns)
            if writer is None:
                writer = pa.ipc.new_stream(str(path), batch.schema)
            writer.write_batch(batch)
    finally:
        if writer is not None:
            writer.close()
    if writer is None:
        raise ValueError(f"write_arrow: no rows to write to {path}")
    return path


def _pad(rows: list, pad_id: int) -> Tensor:
    """Token lists -> right-padded (B, T) int64; plain integers -> (B,)."""
    if not rows or not isinstance(rows[0], (list, tuple, np.ndarray)):
        return torch.as_tensor(rows, dtype=torch.long)  # (B,)
    width = max(len(r) for r in rows)
    out = torch.full((len(rows), width), pad_id, dtype=torch.long)  # (B, T)
    for i, r in enumerate(rows):
        out[i, : len(r)] = torch.as_tensor(r, dtype=torch.long)
    return out


class MappedPairs:
    """Pairs in a memory-mapped Arrow file; ``select(index)`` reads one batch into a PairSet.

    ``pad_id``: the padding of token-list columns; ``count_tokens``: give each batch its real
    token count (prompt with winner plus prompt with loser) for ``tokens_per_s``.
    """

    streamed = True  # the batcher reads it batch by batch through select(); no whole-set tensors
    required = COLUMNS

    def __init__(self, path: str | Path, *, pad_id: int = 0, count_tokens: bool = True):
        import datasets

        self.path = Path(path)
        if not self.path.is_file():
            raise ValueError(f"pairs file {str(path)!r} does not exist "
                             "(write one with polopt.pairfile.mapped.write_arrow)")
        self.dataset = datasets.Dataset.from_file(str(self.path), in_memory=False)
        missing = [c for c in self.required if c not in self.dataset.column_names]
        if missing:
            raise ValueError(f"pairs file {self.path} lacks the columns {missing}; it needs {', '.join(self.required)} "
                             "(and may have weight)")
        self.pad_id = pad_id
        self.weighted = "weight" in self.dataset.column_names
        # the trainer reads only whether these are None (each batch carries its own): empty markers
        self.weight = torch.zeros(0) if self.weighted else None
        token_lists = isinstance(self.dataset.features["prompt"], datasets.Sequence | datasets.List | list)
        self.tokens = torch.zeros(0) if count_tokens and token_lists else None

    def __len__(self) -> int:
        return self.dataset.num_rows

    def __getattr__(self, name: str):
        if name in COLUMNS:
            raise ValueError("a memory-mapped pair set is read one batch at a time: set train.batch_size "
                             "(full-batch training would read the whole file every step)")
        raise AttributeError(name)

    def select(self, index: Tensor) -> PairSet:
        """The rows ``index`` (B,) as an in-memory PairSet, token lists right-padded with ``pad_id``."""
        return self.from_rows(self.dataset[index.tolist()])

    def from_rows(self, rows: dict) -> PairSet:
        """Columns of some rows (as ``datasets`` gives them) as a PairSet."""
        prompt, winner, loser = (_pad(rows[c], self.pad_id) for c in ("prompt", "winner", "loser"))
        if winner.dim() == 2:  # one response width for winners and losers, as PairSet has
            width = max(winner.shape[1], loser.shape[1])
            winner, loser = (torch.nn.functional.pad(t, (0, width - t.shape[1]), value=self.pad_id)
                             for t in (winner, loser))  # (B, T_r)
        tokens = None
        if self.tokens is not None:
            n = (prompt != self.pad_id).sum(1)  # (B,)
            tokens = 2 * n + (winner != self.pad_id).sum(1) + (loser != self.pad_id).sum(1)  # (B,)
        weight = torch.as_tensor(rows["weight"], dtype=torch.float64) if self.weighted else None
        ref_w, ref_l = self.reference_of(rows, prompt, winner, loser)
        return PairSet(prompt, winner, loser, ref_w, ref_l, weight, tokens,
                       *((t != self.pad_id).sum(1) if t.dim() == 2 else None for t in (winner, loser)))  # (B,)

    def reference_of(self, rows: dict, prompt: Tensor, winner: Tensor, loser: Tensor) -> tuple[Tensor, Tensor]:
        return (torch.as_tensor(rows["reference_winner"], dtype=torch.float64),
                torch.as_tensor(rows["reference_loser"], dtype=torch.float64))


class StreamedPairs(MappedPairs):
    """Token pairs in a memory-mapped Arrow file (prompt, winner, loser, optional weight); each batch's
    reference log-probs are computed when it is read, by the model given to :meth:`attach_reference`."""

    required = ("prompt", "winner", "loser")

    def __init__(self, path: str | Path, *, pad_id: int, digest: bytes, count_tokens: bool = True):
        super().__init__(path, pad_id=pad_id, count_tokens=count_tokens)
        self.digest = digest  # SHA-256 of the accepted pairs, from the streaming pass
        self.reference = None
        self._open_random_access()

    def _open_random_access(self) -> None:
        """Map the file for random reads (madvise MADV_RANDOM: no read-ahead). The kernel still maps
        pages around each faulting one (fault-around), so :meth:`select` unmaps what it touched
        (:meth:`_release`): measured, 20 batches of 64 rows otherwise left a 68 MiB file wholly resident."""
        import bisect
        import mmap

        import pyarrow as pa

        with self.path.open("rb") as f:
            self._map = mmap.mmap(f.fileno(), 0, access=mmap.ACCESS_READ)
        if hasattr(self._map, "madvise") and hasattr(mmap, "MADV_RANDOM"):
            self._map.madvise(mmap.MADV_RANDOM)
        self._batches = list(pa.ipc.open_stream(pa.py_buffer(self._map)))
        self._starts = [0]
        for batch in self._batches:
            self._starts.append(self._starts[-1] + batch.num_rows)
        self._find = bisect.bisect_right

    def select(self, index: Tensor) -> PairSet:
        """The rows ``index`` (B,), read cell by cell from the mapped record batches."""
        names = [*self.required, *(["weight"] if self.weighted else [])]
        rows: dict[str, list] = {name: [] for name in names}
        for i in index.tolist():
            k = self._find(self._starts, i) - 1
            batch, j = self._batches[k], i - self._starts[k]
            for name in names:
                rows[name].append(batch.column(name)[j].as_py())
        self._release()
        return self.from_rows(rows)

    def _release(self) -> None:
        """Unmap the pages this batch faulted in (MADV_DONTNEED on a read-only file mapping: they stay in
        the page cache, a later read maps them again), so resident memory does not grow with the file."""
        import mmap

        if hasattr(mmap, "MADV_DONTNEED"):
            self._map.madvise(mmap.MADV_DONTNEED)

    def attach_reference(self, model: torch.nn.Module) -> None:
        self.reference = model.eval().requires_grad_(False)

    def identity(self) -> tuple[Tensor, ...]:
        """Tensors that pin these pairs for a checkpoint's fingerprint: the pass's digest and the reference's
        weights (the in-memory path fingerprints the cached reference log-probs instead)."""
        weights = tuple(self.reference.state_dict().values()) if self.reference is not None else ()
        return (torch.frombuffer(bytearray(self.digest), dtype=torch.uint8), *weights)

    def in_order(self, size: int) -> Iterable[PairSet]:
        """Every pair, in file order, ``size`` at a time; read with plain reads, not through the memory map,
        so a full pass leaves no file pages resident in this process."""
        import pyarrow as pa

        with pa.OSFile(str(self.path)) as source:
            for batch in pa.ipc.open_stream(source):
                for start in range(0, batch.num_rows, size):
                    yield self.from_rows(batch.slice(start, size).to_pydict())

    @torch.no_grad()
    def reference_of(self, rows: dict, prompt: Tensor, winner: Tensor, loser: Tensor) -> tuple[Tensor, Tensor]:
        from polopt.models.logprobs import batched_logprobs

        if self.reference is None:
            raise ValueError("streamed pairs need a reference model before a batch is read (attach_reference)")
        both = batched_logprobs(self.reference, torch.cat([prompt, prompt]), torch.cat([winner, loser]),
                                pad_id=self.pad_id, batch_size=2 * len(prompt))  # (2B,)
        return both.chunk(2)
