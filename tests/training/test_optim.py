"""The optimiser the trainer builds (polopt/training/optim.py): torch's fused Adam/AdamW kernel where it
applies, the same update as torch's default loop and as Adam's formula.

What is checked against what: after several steps on fixed gradients, the parameters of the optimiser
``make_optimiser`` builds equal those of torch's own single-tensor Adam/AdamW (``foreach=False,
fused=False``, torch's CPU default) to float32 rounding, and Adam's update written out in float64 from the
paper (Kingma & Ba, Adam: A Method for Stochastic Optimization, 2015, Algorithm 1; AdamW's decoupled decay:
Loshchilov & Hutter, Decoupled Weight Decay Regularization, 2019).
"""

from __future__ import annotations

import math

import pytest
import torch
from torch import nn

from polopt.training.optim import OptimConfig, fused_kernel_applies, make_optimiser

LR, BETAS, EPS = 1e-2, (0.9, 0.999), 1e-8


def gradients(shape, steps: int) -> list[torch.Tensor]:
    g = torch.Generator().manual_seed(7)
    return [torch.randn(shape, generator=g) * 10.0 ** (-k % 4) for k in range(steps)]  # scales 1 .. 1e-3


def run(optimiser, param: nn.Parameter, grads: list[torch.Tensor]) -> torch.Tensor:
    for grad in grads:
        param.grad = grad.clone()
        optimiser.step()
    return param.detach().clone()


def adam_by_hand(start: torch.Tensor, grads: list[torch.Tensor], *, weight_decay: float, decoupled: bool):
    """Algorithm 1 of Kingma & Ba (2015) in float64; decoupled decay as Loshchilov & Hutter (2019)."""
    theta = start.double().clone()
    m, v = torch.zeros_like(theta), torch.zeros_like(theta)
    for t, grad in enumerate(grads, start=1):
        g = grad.double()
        if decoupled:
            theta = theta * (1 - LR * weight_decay)
        else:
            g = g + weight_decay * theta  # Adam's L2 term enters the gradient
        m = BETAS[0] * m + (1 - BETAS[0]) * g
        v = BETAS[1] * v + (1 - BETAS[1]) * g * g
        m_hat, v_hat = m / (1 - BETAS[0] ** t), v / (1 - BETAS[1] ** t)
        theta = theta - LR * m_hat / (v_hat.sqrt() + EPS)
    return theta


@pytest.mark.parametrize("name, torch_class, weight_decay", [("adam", torch.optim.Adam, 0.0),
                                                             ("adam", torch.optim.Adam, 0.1),
                                                             ("adamw", torch.optim.AdamW, 0.1)])
def test_the_fused_update_is_torchs_default_update_and_adams_formula(name, torch_class, weight_decay):
    start = torch.randn(64, 33, generator=torch.Generator().manual_seed(1))
    grads = gradients(start.shape, 12)
    ours = nn.Parameter(start.clone())
    optimiser, _ = make_optimiser([ours], OptimConfig(name, LR, weight_decay=weight_decay, schedule="constant"), 12)
    assert optimiser.param_groups[0]["fused"] is True
    theirs = nn.Parameter(start.clone())
    default = torch_class([theirs], lr=LR, weight_decay=weight_decay, foreach=False, fused=False)
    got, want = run(optimiser, ours, grads), run(default, theirs, grads)
    torch.testing.assert_close(got, want, rtol=1e-5, atol=1e-6)
    by_hand = adam_by_hand(start, grads, weight_decay=weight_decay, decoupled=name == "adamw")
    torch.testing.assert_close(got.double(), by_hand, rtol=1e-5, atol=1e-6)
    assert not torch.equal(got, start)  # it moved


def test_the_fused_kernel_applies_to_plain_float_tensors_on_cpu_only():
    assert fused_kernel_applies([nn.Parameter(torch.zeros(3)), torch.zeros(2, dtype=torch.float64)])
    assert not fused_kernel_applies([])
    assert not fused_kernel_applies([nn.Parameter(torch.zeros(3)), nn.Parameter(torch.zeros(3, device="meta"))])
    assert not fused_kernel_applies([nn.Parameter(torch.zeros(3, dtype=torch.long), requires_grad=False)])


def test_sgd_and_plain_tensors_keep_torchs_default():
    sgd, _ = make_optimiser([nn.Parameter(torch.zeros(3))], OptimConfig("sgd", 0.1), 5)
    assert not sgd.defaults.get("fused")
    meta, _ = make_optimiser([nn.Parameter(torch.zeros(3, device="meta"))], OptimConfig("adam", 0.1), 5)
    assert not meta.param_groups[0]["fused"]


@pytest.mark.parametrize("max_norm", [math.inf, 0.5])
def test_the_steps_gradient_norm_with_and_without_a_limit(max_norm):
    # the norm the loop logs and guards is the 2-norm of all gradients as one vector (torch.linalg.vector_norm
    # of their concatenation); without a limit the gradients stay as they were, with one they are scaled to it
    from polopt.parallel.distributed import clip_grad_norm

    model = nn.Sequential(nn.Linear(5, 4), nn.Linear(4, 3, bias=False))
    model(torch.randn(8, 5, generator=torch.Generator().manual_seed(2))).square().sum().backward()
    before = [p.grad.clone() for p in model.parameters()]
    whole = torch.linalg.vector_norm(torch.cat([g.flatten() for g in before]))
    assert clip_grad_norm(model, max_norm) == pytest.approx(float(whole), rel=1e-6)
    scale = min(1.0, max_norm / float(whole))
    assert (scale == 1.0) == (max_norm == math.inf)  # the limited case does clip
    for p, g in zip(model.parameters(), before, strict=True):
        torch.testing.assert_close(p.grad, g * scale)
