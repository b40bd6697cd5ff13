"""The group update's exact target on responses lumped by equal reward (toy_tasks.methods.group_target:
lumped_group_target), which lets the 364-response sequence task have one.

Held against: the direct solve on the whole task (group_update_target, itself tested against training in
tests/methods/test_group_method.py) on a finite task with tied rewards, where both fit; and the closed
form pi_ref e^{r / beta} for the leave-one-out advantage with the KL in the reward (Kool et al., Buy 4
REINFORCE samples, get a baseline for free!, 2019: the leave-one-out baseline leaves the expected update
the gradient of E_pi[r'], here with r' = r - beta log(pi / pi_ref) held, derived by hand).
"""

import numpy as np
import pytest
import torch

from polopt.methods.environment import FiniteEnvironment
from polopt.methods.group import advantages
from toy_tasks.methods.group_target import group_update_target, lumped_classes, lumped_group_target, reward_classes
from toy_tasks.methods.view import kl_optimum

BETA = 0.5
REWARDS = np.array([[0.3, 1.0, 0.3, -0.5, 1.0, 0.3], [0.0, 0.0, 0.8, 0.8, -0.4, 0.2]])  # ties within each prompt


def environment() -> FiniteEnvironment:
    reference = np.random.default_rng(3).dirichlet(np.full(6, 2.0), size=2)  # (2, 6)
    return FiniteEnvironment(torch.as_tensor(np.log(reference)), torch.tensor([0.6, 0.4], dtype=torch.float64),
                             torch.as_tensor(REWARDS))


def test_reward_classes_group_equal_rewards():
    index, values = reward_classes(REWARDS[0])
    assert index.tolist() == [1, 2, 1, 0, 2, 1] and values.tolist() == [-0.5, 0.3, 1.0]
    assert lumped_classes(environment(), 3) == 4**3  # the second prompt has 4 distinct rewards


@pytest.mark.parametrize(("advantage", "kl"), [("standardised", "estimator"), ("centred", "exact"),
                                               ("leave_one_out", "in_reward")])
def test_the_lumped_target_is_the_direct_solve(advantage, kl):
    env = environment()
    lumped, how, _ = lumped_group_target(env, beta=BETA, group_size=3, advantage=advantage, kl=kl)
    direct, _, _ = group_update_target(env, beta=BETA, group_size=3, advantage=advantage, kl=kl)
    assert "lumped by equal reward (3, 4 classes per prompt)" in how
    np.testing.assert_allclose(lumped, direct, rtol=0, atol=1e-8)
    if (advantage, kl) == ("leave_one_out", "in_reward"):
        reference = env.reference.exp().numpy()
        np.testing.assert_allclose(lumped, kl_optimum(reference, REWARDS, BETA), rtol=0, atol=1e-8)


def test_rewards_equal_up_to_rounding_have_no_standardised_advantage():
    # IEEE 754 binary64: 0.1 + 0.2 is 0.30000000000000004, one ulp from 0.3; the sequence task's rewards are such
    # sums of the same symbol values in different orders
    tied = torch.tensor([[0.3, 0.1 + 0.2]], dtype=torch.float64)
    assert tied[0, 0] != tied[0, 1]
    assert advantages(tied, "standardised").tolist() == [[0.0, 0.0]]
    apart = torch.tensor([[0.3, 0.1 + 0.2, 1.0, -1.0]], dtype=torch.float64)  # a real spread: numpy's formula
    r = apart.numpy()[0]
    np.testing.assert_allclose(advantages(apart, "standardised").numpy()[0], (r - r.mean()) / r.std(ddof=1),
                               rtol=0, atol=1e-15)
