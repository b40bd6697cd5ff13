"""``train.compile`` (polopt.models.compiling): the key's checks, not its speed (bench/share_prompt.py measures that).

Compiling itself takes minutes on a busy CPU, so no test here runs a compiled forward pass; the
equality of compiled and eager log-probabilities is torch.compile's own contract.
"""

import pytest
import torch

from polopt.models import compiling
from polopt.models.logprobs import SequencePolicy
from polopt.models.tabular import TabularPolicy
from polopt.models.transformer import TinyTransformer


def test_no_compiler_is_one_line(monkeypatch):
    monkeypatch.setattr(compiling, "system_compiler", lambda: None)
    policy = SequencePolicy(TinyTransformer(5, context=4, width=8, layers=1, heads=2), pad_id=4)
    with pytest.raises(ValueError, match=r"train.compile=true needs a C\+\+ compiler .* set train.compile=false"):
        compiling.compile_policy(policy)


def test_compiled_in_place_keeps_the_state_dict_keys(monkeypatch):
    # checkpoints of a compiled run load into an uncompiled model and back (nn.Module.compile keeps the keys)
    monkeypatch.setattr(compiling, "system_compiler", lambda: "/usr/bin/c++")
    policy = SequencePolicy(TinyTransformer(5, context=4, width=8, layers=1, heads=2), pad_id=4)
    keys = list(policy.state_dict())
    assert compiling.compile_policy(policy) is policy
    assert list(policy.state_dict()) == keys


def test_a_finite_policy_is_left_as_it_is():
    policy = TabularPolicy(torch.log(torch.full((1, 3), 1 / 3)))
    assert compiling.compile_policy(policy) is policy
