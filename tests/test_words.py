"""Clear words: metrics, summary keys and option names say what they are (issue 14).

Expected values are derived beside each check.
"""

import pytest
import torch

from polopt.objective import batch_statistics


def test_pair_accuracy_counts_an_exact_tie_as_half():
    # margins +1 (right), -1 (wrong), 0 and 0 (ties: a coin flip would be right half the time)
    rho = torch.tensor([1.0, -1.0, 0.0, 0.0], dtype=torch.float64)
    zero = torch.zeros(4, dtype=torch.float64)
    assert batch_statistics(rho, zero, zero, None)["pair_accuracy"] == (1 + 0 + 0.5 + 0.5) / 4
    weights = torch.tensor([3.0, 1.0, 0.0, 0.0], dtype=torch.float64)  # weighted: 3 / 4
    assert batch_statistics(rho, zero, zero, weights)["pair_accuracy"] == 0.75


def test_a_policy_at_its_reference_has_pair_accuracy_one_half():
    rho = torch.zeros(6, dtype=torch.float64)  # every margin is 0 before the first step
    assert batch_statistics(rho, rho, rho, None)["pair_accuracy"] == pytest.approx(0.5, abs=1e-15)
