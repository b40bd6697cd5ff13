"""Losses of a user's own, named by dotted path in the tests (``user_losses:sqrt_abs``)."""

import torch


def sqrt_abs(x):
    """sqrt(|x|): finite everywhere, but its derivative is infinite at x = 0, where training starts
    (the policy starts at the reference, so every margin is 0); autograd gives 0 * inf = NaN."""
    return torch.sqrt(torch.abs(x))
