"""Memory-mapped pairs (polopt/pairfile/mapped.py): training from an Arrow file on disk equals training
from the same pairs held in RAM, bit for bit (the same batches, the same tensors)."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from polopt import losses
from polopt.pairfile.mapped import MappedPairs, write_arrow
from polopt.pairs import PairSet
from polopt.training.loop import TrainSettings, train
from polopt.training.optim import OptimConfig
from toy_tasks.families import bradley_terry
from toy_tasks.finite.session import prepare
from toy_tasks.sequence.task import sequence_task


def sequence_setup():
    task = sequence_task(n_symbols=2, max_length=3, reference_width=16, reference_layers=1)
    session = task.prepare(losses.resolve_margin("logistic"), beta=0.5, mode="sampled", n_pairs=60, seed=1)
    return task, session


def rows_of(pairs: PairSet, pad_id: int, start: int, stop: int) -> dict:
    """Rows start..stop as Arrow-ready columns: token lists without their padding."""
    def unpad(t):
        return [[int(v) for v in row if v != pad_id] for row in t[start:stop]]

    return {"prompt": unpad(pairs.prompt), "winner": unpad(pairs.winner), "loser": unpad(pairs.loser),
            "reference_winner": pairs.reference_winner[start:stop].numpy(),
            "reference_loser": pairs.reference_loser[start:stop].numpy()}


def test_mapped_token_pairs_train_exactly_like_pairs_in_ram(tmp_path):
    task, session = sequence_setup()
    pad = task.vocab.pad_id
    pairs = session.pairs
    path = write_arrow(tmp_path / "pairs.arrow", (rows_of(pairs, pad, s, s + 25) for s in range(0, len(pairs), 25)))
    mapped = MappedPairs(path, pad_id=pad)
    assert len(mapped) == len(pairs)
    index = torch.tensor([5, 0, 59, 17])
    batch, want = mapped.select(index), pairs.select(index)
    assert torch.equal(batch.reference_winner, want.reference_winner)  # float64 through Arrow unchanged
    assert torch.equal(batch.tokens, want.tokens)

    results = []
    for data in (pairs, mapped):
        policy = session.build_policy("transformer", width=16, layers=1, heads=2, context=task.context_needed)
        results.append((policy, train(policy, data, losses.resolve_margin("logistic"),
                                      TrainSettings(beta=0.5, steps=8, optim=OptimConfig("adam", 0.003),
                                                    batch_size=16, seed=3, log_every=4, progress=False,
                                                    bucketing=False))))  # a mapped file is not bucketed
    (p_ram, r_ram), (p_map, r_map) = results
    for name, value in p_ram.state_dict().items():
        assert torch.equal(value, p_map.state_dict()[name]), name
    strip = [{k: v for k, v in r.items() if k not in ("seconds", "tokens_per_s")} for r in r_ram.history]
    assert strip == [{k: v for k, v in r.items() if k not in ("seconds", "tokens_per_s")} for r in r_map.history]
    assert "tokens_per_s" in r_map.history[-1]


def test_mapped_index_pairs_with_weights(tmp_path):
    session = prepare(bradley_terry(n_responses=4, seed=3),
                      losses.resolve_margin("squared"), beta=0.5, mode="exact")
    p = session.pairs
    path = write_arrow(tmp_path / "w.arrow", [{"prompt": p.prompt.numpy(), "winner": p.winner.numpy(),
                                              "loser": p.loser.numpy(), "reference_winner": p.reference_winner.numpy(),
                                              "reference_loser": p.reference_loser.numpy(),
                                              "weight": p.weight.numpy()}])
    mapped = MappedPairs(path)
    index = torch.tensor(np.arange(len(p))[::-1].copy())
    got, want = mapped.select(index), p.select(index)
    for name in ("prompt", "winner", "loser", "reference_winner", "reference_loser", "weight"):
        assert torch.equal(getattr(got, name), getattr(want, name)), name
    assert mapped.tokens is None


def test_full_batch_and_bad_files_are_one_line(tmp_path):
    task, session = sequence_setup()
    path = write_arrow(tmp_path / "p.arrow", [rows_of(session.pairs, task.vocab.pad_id, 0, 10)])
    mapped = MappedPairs(path, pad_id=task.vocab.pad_id)
    policy = session.build_policy("bigram", context=task.context_needed, init="random")
    with pytest.raises(ValueError, match=r"read one batch at a time: set train.batch_size"):
        train(policy, mapped, losses.resolve_margin("logistic"),
              TrainSettings(beta=0.5, steps=1, optim=OptimConfig(), progress=False))
    with pytest.raises(ValueError, match=r"pairs file '.*nothing.arrow' does not exist"):
        MappedPairs(tmp_path / "nothing.arrow")
    bad = write_arrow(tmp_path / "bad.arrow", [{"prompt": [[1]], "winner": [[2]]}])
    with pytest.raises(ValueError, match=r"lacks the columns \['loser', 'reference_winner', 'reference_loser'\]"):
        MappedPairs(bad)
