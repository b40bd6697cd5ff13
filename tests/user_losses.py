"""Losses of a user's own, named by dotted path in the tests (``user_losses:sqrt_abs``)."""

import torch


def sqrt_abs(x):
    """sqrt(|x|): finite everywhere, but its derivative is infinite at x = 0, where training starts
    (the policy starts at the reference, so every margin is 0); autograd gives 0 * inf = NaN."""
    return torch.sqrt(torch.abs(x))


# ---------------------------------------------------------------- pair objectives of a user's own


def anchored_squared(pair, beta, *, weight=1.0):
    """IPO's squared loss of the margin plus ``weight * h_w^2``, an anchor on the winner's log-ratio:
    a pair objective (two positional arguments) with one keyword parameter; smooth and convex in
    the log-ratios."""
    rho = pair.logratio_winner - pair.logratio_loser
    return (beta * rho - 1.0) ** 2 + weight * pair.logratio_winner ** 2


def three_arguments(pair, beta, gamma):
    """Neither f(x) nor f(pair, beta): refused with one line."""
    return pair.winner * beta * gamma


def batch_mean(pair, beta):
    """Reduces over the batch itself: shape () instead of (B,)."""
    return -torch.nn.functional.logsigmoid(beta * (pair.logratio_winner - pair.logratio_loser)).mean()


def log_of_logratio(pair, beta):
    """log(h_w): NaN wherever the winner is below the reference (as on the probe batch)."""
    return torch.log(pair.logratio_winner) * beta


def inverse_logratio(pair, beta):
    """1 / h_w: finite on the probe batch, infinite at the reference, where training starts."""
    return beta / pair.logratio_winner
