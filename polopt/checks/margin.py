"""The battery behind ``polopt check``: does a loss f do what its derivation promises?

Each check is a small function ``loss -> CheckResult`` (name, status, a reason in
plain words, and the facts it measured). Statuses:

- ``fail``: the loss cannot do its job (it rewards the loser, gives no gradient at
  the reference, is not elementwise, overflows, or training misses the exact optimum);
- ``warn``: it works, but not in the way a user is likely to assume (not convex;
  a rescaled built-in, i.e. a different beta than the one written);
- ``pass``: as expected; the reason still says what was measured;
- ``skip``: not run, because an earlier failure makes it meaningless.

The checks, in order:

1. ``elementwise``: one value per margin, the same shape out as in, no coupling
   between margins (a Jacobian with zero off-diagonal), a torch.Tensor.
2. ``finite``: finite values and gradients at margins up to +-1e4 in float64,
   float32 and bfloat16.
3. ``signal``: f'(0) < 0, i.e. at the reference (all margins 0) the loss pushes
   winners up. f'(0) > 0 rewards the loser; f'(0) = 0 gives no gradient at all.
4. ``convexity``: second differences on a grid; not convex is a warning.
5. ``taylor``: f(0), f'(0), f''(0) and the ratio f''(0) / |f'(0)| (Tang et al.
   2024, GPO), with the beta at which each built-in regularises as strongly.
6. ``pair_optimum``: the per-pair optimum x*(p) = argmin p f(x) + (1 - p) f(-x)
   on a grid of p: positive for p > 1/2, non-decreasing, 0 at p = 1/2.
7. ``certainty``: whether x*(1) is finite (Azar et al. 2023, section 4.2).
8. ``scale``: whether f is a rescaled built-in, f(x) = c g(a x) + k; a != 1 is the
   built-in at beta * a (a wrong scale if the built-in was meant).
9. ``population:<task>``: on each finite task given, the exact optimum of the
   population loss against what the trainer reaches in exact mode, and the sign of
   the trained weighted mean margin.

The finite tasks are arguments (objects with ``prepare(loss, beta=, mode=)``, see
:mod:`polopt.training.loop`), so this module never imports ``toy_tasks``.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence

import numpy as np
import scipy.optimize
import torch

from polopt import losses
from polopt.checks.group import run_group_checks, unvalidated_group
from polopt.checks.pair import run_pair_checks
from polopt.checks.population import check_population
from polopt.checks.result import CheckResult, Report, guarded, what_it_tests
from polopt.losses.group_objective import GroupObjective
from polopt.losses.margin import MarginLoss
from polopt.losses.registry import PairLoss
from polopt.training.optim import OptimConfig

Tensor = torch.Tensor

EXTREME_MARGINS = (-1e4, -1e3, -100.0, -50.0, -20.0, -5.0, -1.0, 0.0, 1.0, 5.0, 20.0, 50.0, 100.0, 1e3, 1e4)
CURVE_P = np.round(np.linspace(0.02, 0.98, 49), 10)  # includes 1/2
CONVEXITY_GRID = (-30.0, 30.0, 0.01)  # start, stop, step of the second differences
NO_SIGNAL_SLOPE = 1e-8  # |f'(0)| below this (relative to max(1, |f''(0)|)) is no signal










# ----------------------------------------------------------------------------
# Helpers
# ----------------------------------------------------------------------------


def _builtins() -> list[MarginLoss]:
    return [losses.resolve_margin(name) for name in losses.builtin_names("margin")]


def _call(loss: MarginLoss, x: Tensor) -> Tensor:
    """f(x), with a TypeError when f does not return a tensor."""
    out = loss(x)
    if not isinstance(out, Tensor):
        raise TypeError(f"f returned a {type(out).__name__}, not a torch.Tensor")
    return out


def _error(name: str, err: Exception) -> CheckResult:
    return CheckResult(name, "fail", f"f raised {type(err).__name__}: {err}", {"error": str(err)})


def _fmt(x: float) -> str:
    return f"{x:.4g}" if math.isfinite(x) else ("+inf" if x > 0 else "-inf" if x < 0 else "nan")


# ----------------------------------------------------------------------------
# 1-3: the function itself
# ----------------------------------------------------------------------------


def check_elementwise(loss: MarginLoss) -> CheckResult:
    """Same shape out as in, one value per margin, no coupling between margins.

    A loss of the family is applied to each scaled margin separately and reduced
    later (:func:`polopt.losses.reduce.weighted_mean`); a mean or a sum inside f
    couples the pairs of a batch, so the loss would depend on the batch size.
    """
    name = "elementwise"
    try:
        for shape in [(), (5,), (3, 4), (2, 3, 2)]:
            x = torch.linspace(-2.0, 2.0, max(math.prod(shape), 1), dtype=torch.float64).reshape(shape)
            out = _call(loss, x)
            if tuple(out.shape) != shape:
                return CheckResult(name, "fail", f"for an input of shape {shape} f returned shape "
                                   f"{tuple(out.shape)}: a loss must return one value per margin (unreduced); "
                                   "polopt reduces over pairs itself", {"input_shape": shape,
                                                                        "output_shape": tuple(out.shape)})
        x = torch.linspace(-3.0, 3.0, 8, dtype=torch.float64)  # (8,)
        together = _call(loss, x).detach()  # (8,)
        alone = torch.stack([_call(loss, x[i:i + 1]).detach().reshape(()) for i in range(len(x))])  # (8,)
        gap = float((together - alone).abs().max())
        jac = torch.autograd.functional.jacobian(lambda v: _call(loss, v), x)  # (8, 8)
        off = float((jac - torch.diag(torch.diagonal(jac))).abs().max())
    except Exception as err:  # a user's f may raise anything; the report says what
        return _error(name, err)
    scale = max(1.0, float(together.abs().max()))
    facts = {"batch_vs_single_max_difference": gap, "jacobian_off_diagonal_max": off}
    if gap > 1e-10 * scale or off > 1e-10 * scale:
        return CheckResult(name, "fail", f"not elementwise: the value at one margin depends on the other "
                           f"margins of the batch (batch vs one-at-a-time differs by {gap:.3g}, largest "
                           f"cross-derivative {off:.3g}); a mean, sum or normalisation over the batch "
                           "inside f makes the loss depend on the batch", facts)
    return CheckResult(name, "pass", "elementwise and shape-preserving (checked on shapes (), (5,), (3, 4), "
                       "(2, 3, 2) and by the Jacobian)", facts)


def check_finite(loss: MarginLoss) -> CheckResult:
    """Finite values and gradients at margins up to +-1e4 in float64, float32 and bfloat16."""
    name = "finite"
    bad, dtype_changes = [], []
    for dtype in (torch.float64, torch.float32, torch.bfloat16):
        try:
            x = torch.tensor(EXTREME_MARGINS, dtype=dtype, requires_grad=True)
            y = _call(loss, x)
            (g,) = torch.autograd.grad(y.sum(), x, allow_unused=True)
        except Exception as err:
            return _error(name, err)
        g = torch.zeros_like(x) if g is None else g
        if y.dtype != dtype:
            dtype_changes.append(f"{str(dtype).removeprefix('torch.')} -> {str(y.dtype).removeprefix('torch.')}")
        for what, t in (("value", y), ("gradient", g)):
            t = t.detach().float().reshape(-1)
            for xi, ti in zip(EXTREME_MARGINS, t.tolist(), strict=True):
                if not math.isfinite(ti):
                    bad.append((abs(xi), xi, what, _fmt(ti), str(dtype).removeprefix("torch.")))
    facts = {"margins": list(EXTREME_MARGINS), "non_finite": [b[1:] for b in bad], "dtype_changes": dtype_changes}
    if bad:
        bad.sort()
        shown = "; ".join(f"{what} {v} at x = {xi:g} ({dt})" for _, xi, what, v, dt in bad[:4])
        more = f" (and {len(bad) - 4} more)" if len(bad) > 4 else ""
        return CheckResult(name, "fail", f"not finite at extreme margins: {shown}{more}; one badly ranked pair "
                           "would turn the whole batch's loss into inf/nan; use a stable form "
                           "(torch.nn.functional.softplus, logsigmoid) or continue f linearly beyond a bound",
                           facts)
    if dtype_changes:
        return CheckResult(name, "warn", f"finite everywhere, but f changes the dtype ({', '.join(dtype_changes)}); "
                           "the trainer then mixes precisions", facts)
    return CheckResult(name, "pass", "finite values and gradients at margins -1e4..1e4 in float64, float32 "
                       "and bfloat16", facts)


def check_signal(loss: MarginLoss) -> CheckResult:
    """f'(0) < 0: at the reference every margin is 0, so the first gradient step moves
    each winner's log-ratio by -beta f'(0) (times the learning rate) relative to its loser's."""
    name = "signal"
    try:
        f0, d1, d2 = loss.derivatives_at(0.0)
    except Exception as err:
        return _error(name, err)
    facts = {"f0": f0, "f1": d1, "f2": d2}
    if not math.isfinite(d1):
        return CheckResult(name, "fail", f"f'(0) = {_fmt(d1)} is not finite", facts)
    if abs(d1) <= NO_SIGNAL_SLOPE * max(1.0, abs(d2)):
        return CheckResult(name, "fail", f"no preference signal: f'(0) = {d1:.3g}, so at the reference policy "
                           "(every margin 0) the loss has zero gradient and training never moves; a loss "
                           "symmetric in the margin (e.g. x^2) cannot tell winner from loser", facts)
    if d1 > 0:
        return CheckResult(name, "fail", f"sign error: f'(0) = {d1:.4g} > 0, so the loss falls as the margin "
                           "becomes negative: it rewards the loser and training moves away from the preferred "
                           "responses (did you write f(-x), or forget a minus sign?)", facts)
    return CheckResult(name, "pass", f"f'(0) = {d1:.4g} < 0: a larger margin lowers the loss", facts)


# ----------------------------------------------------------------------------
# 4-5: shape near and away from 0
# ----------------------------------------------------------------------------


def check_convexity(loss: MarginLoss) -> CheckResult:
    """Midpoint convexity on a grid: f(x - h) - 2 f(x) + f(x + h) >= 0 (up to rounding).

    Not convex is a warning, not a failure: the GPO family includes the savage loss.
    """
    name = "convexity"
    start, stop, step = CONVEXITY_GRID
    x = torch.arange(start, stop + step / 2, step, dtype=torch.float64)  # (N,)
    try:
        with torch.no_grad():
            f = _call(loss, x).double()  # (N,)
    except Exception as err:
        return _error(name, err)
    second = f[:-2] - 2.0 * f[1:-1] + f[2:]  # (N-2,)
    rounding = 1e-9 * (f[:-2].abs() + 2.0 * f[1:-1].abs() + f[2:].abs()) + 1e-13
    concave = (second < -rounding) & torch.isfinite(second)
    facts = {"grid": [start, stop, step], "declared_convex": loss.convex}
    if not bool(concave.any()):
        facts["convex_on_grid"] = True
        if loss.convex is False:
            return CheckResult(name, "pass", f"convex on [{start:g}, {stop:g}] although declared not convex", facts)
        return CheckResult(name, "pass", f"convex on [{start:g}, {stop:g}] (second differences, step {step:g})", facts)
    where = x[1:-1][concave]
    lo, hi = float(where.min()), float(where.max())
    facts.update({"convex_on_grid": False, "concave_from": lo, "concave_to": hi,
                  "min_second_derivative": float(second.min()) / step**2})
    what = (f"not convex: f'' < 0 somewhere in [{lo:.3g}, {hi:.3g}] (smallest f'' ~ "
            f"{facts['min_second_derivative']:.3g}). What may go wrong: the population loss can have several "
            "stationary points, so the exact solver (started at the reference) and gradient training can each end "
            "at one that is not the global minimum; where f flattens, badly ranked pairs get almost no gradient; "
            "existence and uniqueness results for convex losses do not apply")
    if loss.convex is True:
        return CheckResult(name, "fail", f"declared convex, but {what}", facts)
    return CheckResult(name, "warn", what, facts)


def gpo_ratio(loss: MarginLoss) -> float | None:
    """f''(0) / |f'(0)|, the regularisation strength per unit beta (Tang et al. 2024, GPO); None if f'(0) = 0."""
    _, d1, d2 = loss.derivatives_at(0.0)
    return d2 / abs(d1) if d1 != 0 and math.isfinite(d1) and math.isfinite(d2) else None


def check_taylor(loss: MarginLoss, *, beta: float) -> CheckResult:
    """Taylor coefficients at 0 and the equal-regularisation beta of every built-in.

    Near 0, beta f(beta rho) ~ f(0) + f'(0) beta rho + f''(0) beta^2 rho^2 / 2; dividing by
    |f'(0)| beta, the pull back towards rho = 0 has strength beta f''(0) / |f'(0)|. A
    built-in g regularises as strongly at beta_g = beta R_f / R_g (Tang et al.,
    Generalized Preference Optimization, 2024, section 3).
    """
    name = "taylor"
    try:
        f0, d1, d2 = loss.derivatives_at(0.0)
    except Exception as err:
        return _error(name, err)
    ratio = gpo_ratio(loss)
    equivalent = {}
    for ref in _builtins():
        r = gpo_ratio(ref)
        equivalent[ref.name] = beta * ratio / r if ratio is not None and r else None
    facts = {"f0": f0, "f1": d1, "f2": d2, "ratio": ratio, "equivalent_beta": equivalent}
    coeffs = f"f(0) = {f0:.4g}, f'(0) = {d1:.4g}, f''(0) = {d2:.4g}"
    if ratio is None:
        return CheckResult(name, "skip", f"{coeffs}; the ratio f''(0)/|f'(0)| is undefined (f'(0) = 0)", facts)
    same = ", ".join(f"{k} at beta {v:.4g}" for k, v in equivalent.items() if v is not None)
    if d2 < 0:
        return CheckResult(name, "warn", f"{coeffs}; f''(0) < 0: near margin 0 the loss pushes margins apart "
                           "instead of pulling them back, so there is no regularisation at small margins", facts)
    if d2 == 0:
        return CheckResult(name, "pass", f"{coeffs}; f''(0) = 0 (like hinge): no quadratic pull at 0, the "
                           "regularisation comes from where f stops decreasing", facts)
    return CheckResult(name, "pass", f"{coeffs}; ratio f''(0)/|f'(0)| = {ratio:.4g}: at beta {beta:g} it "
                       f"regularises like {same}", facts)


# ----------------------------------------------------------------------------
# 6-7: the per-pair optimum
# ----------------------------------------------------------------------------


def flat_interval(loss: MarginLoss, p: float, x: float, *, bound: float = 60.0) -> tuple[float, float]:
    """The interval of scaled margins around ``x`` where ``p f(m) + (1 - p) f(-m)`` stays within
    rounding (1e-9 relative) of its value at ``x``, on a grid of step 1e-3; (x, x) when ``x`` is not finite."""
    if not math.isfinite(x):
        return (x, x)
    grid = np.linspace(-bound, bound, 120_001)  # step 1e-3
    values = loss.expected_pair_loss(grid, p)
    level = float(loss.expected_pair_loss(x, p))
    flat = values <= level + 1e-9 * max(1.0, abs(level))
    k = int(np.argmin(np.abs(grid - x)))
    if not flat[k]:
        return (x, x)
    lo = k - int(np.argmin(flat[k::-1])) + 1 if not flat[: k + 1].all() else 0
    hi = k + int(np.argmin(flat[k:])) - 1 if not flat[k:].all() else len(grid) - 1
    return (float(grid[lo]), float(grid[hi]))


def pair_optimum_curve(loss: MarginLoss, ps: Sequence[float] = CURVE_P) -> np.ndarray:
    """x*(p) for each p (:meth:`polopt.losses.margin.MarginLoss.pair_optimum`: the member's closed form where it
    has one)."""
    return np.array([loss.pair_optimum(float(p)) for p in ps])


def check_pair_optimum(loss: MarginLoss) -> CheckResult:
    """See :func:`_check_pair_optimum`; infinite optima make numpy's arithmetic warn harmlessly."""
    with np.errstate(invalid="ignore"):
        return _check_pair_optimum(loss)


def _closed_form_problems(loss: MarginLoss, xs: np.ndarray, numeric: np.ndarray) -> list[str]:
    """A declared closed form of x*(p) must be a minimiser: no grid point where the numerical one is lower."""
    for p, xc, xn in zip(CURVE_P, xs, numeric, strict=True):
        vc, vn = float(loss.expected_pair_loss(xc, p)), float(loss.expected_pair_loss(np.clip(xn, -60, 60), p))
        if vc > vn + 1e-9 * max(1.0, abs(vn)):
            return [f"the declared closed form gives x*({p:g}) = {xc:.4g}, but x = {xn:.4g} has a "
                    f"lower pair loss ({vn:.6g} < {vc:.6g})"]
    return []


def _symmetry_warnings(loss: MarginLoss, xs: np.ndarray, facts: dict) -> list[str]:
    """x*(1 - p) = -x*(p) where the minimiser is unique; where it breaks, say whether the pair objective is
    flat there (an interval of optimal margins, recorded in ``facts``) or only numerically asymmetric."""
    warnings: list[str] = []
    mirror = xs[::-1]  # x*(1 - p) on the same grid
    both = np.isfinite(xs) & np.isfinite(mirror)
    asym = both & (np.abs(np.where(both, xs + mirror, 0.0)) > 1e-4 * (1 + np.abs(np.where(both, xs, 0.0))))
    if asym.any():
        k = int(np.flatnonzero(asym)[0])
        lo, hi = flat_interval(loss, float(CURVE_P[k]), xs[k])
        facts["flat_at"] = {"p": float(CURVE_P[k]), "margins": [lo, hi]}
        if hi - lo > 1e-3:
            level = float(loss.expected_pair_loss(xs[k], CURVE_P[k]))
            warnings.append(f"the pair objective is flat at p = {CURVE_P[k]:g}: every scaled margin from {lo:.4g} "
                            f"to {hi:.4g} gives the same pair loss {level:.6g}, "
                            "so the optimum is not unique there and such pairs keep whatever margin training gives "
                            "them")
        else:
            warnings.append(f"x*(1 - p) != -x*(p) at p = {CURVE_P[k]:g}: x*({CURVE_P[k]:g}) = {xs[k]:.4g} but "
                            f"-x*({1 - CURVE_P[k]:g}) = {-mirror[k]:.4g}; by the symmetry of the pair objective "
                            "the minimiser is not unique there")
    return warnings


def _check_pair_optimum(loss: MarginLoss) -> CheckResult:
    """The per-pair optimum x*(p) = argmin_x p f(x) + (1 - p) f(-x) on a grid of p.

    Derivable facts for any f: the objective at (1 - p, -x) equals that at (p, x), so
    x*(1 - p) = -x*(p) whenever the minimiser is unique, and x*(1/2) = 0 for convex f.
    Fails when x*(p) <= 0 for p > 1/2 (the preference is not learned), when x*(p)
    decreases in p (margins do not order pairs by preference strength), when
    x*(1/2) != 0 with a strictly lower loss than at 0 (margins for pairs with no
    preference), or when a declared closed form is not a minimiser. Warns when the
    minimiser is not unique (antisymmetry broken numerically).
    """
    name = "pair_optimum"
    try:
        xs = pair_optimum_curve(loss)
        numeric = np.array([losses.margin.numerical_pair_optimum(loss, float(p)) for p in CURVE_P])
    except Exception as err:
        return _error(name, err)
    facts = {"p": CURVE_P.tolist(), "optimum": xs.tolist()}
    problems, warnings = [], []
    if loss.closed_form_optimum is not None:
        problems += _closed_form_problems(loss, xs, numeric)
    half = int(np.argmin(np.abs(CURVE_P - 0.5)))
    x_half = xs[half]
    at_zero = float(loss.expected_pair_loss(0.0, 0.5))
    if abs(x_half) > 1e-6 and float(loss.expected_pair_loss(x_half, 0.5)) < at_zero - 1e-12:
        problems.append(f"x*(1/2) = {_fmt(x_half)} != 0: a pair with no preference still gets a non-zero margin, "
                        "in a direction chosen by where training starts")
    upper = CURVE_P > 0.5
    if np.any(np.isnan(xs[upper])):
        k = int(np.flatnonzero(upper & np.isnan(xs))[0])
        problems.append(f"the pair objective is flat in the margin at p = {CURVE_P[k]:g}: every margin is optimal, "
                        "so the loss carries no preference")
    elif np.all(xs[upper] <= 1e-9):
        kind = "0 for every p" if np.all(np.abs(xs) <= 1e-9) else "negative for p > 1/2"
        problems.append(f"x*(p) is {kind} (e.g. x*(0.8) = {_fmt(xs[np.argmin(np.abs(CURVE_P - 0.8))])}):"
                        " the optimum does not favour the preferred response")
    elif np.any(~np.isfinite(xs[upper])):
        k = int(np.flatnonzero(upper & ~np.isfinite(xs))[0])
        facts["infinite_below_certainty"] = True
        problems.append(f"x*(p) is infinite already at p = {CURVE_P[k]:g} < 1: even uncertain preferences drive "
                        "the margins to infinity, so beta does not regularise and the population optimum is at "
                        "infinity (f flattens out too fast to balance p f(x) against (1 - p) f(-x))")
    else:
        finite = np.isfinite(xs)
        safe = np.where(finite, xs, 0.0)
        drops = np.flatnonzero(finite[1:] & finite[:-1] & (np.diff(safe) < -1e-6 * (1 + np.abs(safe[1:]))))
        if len(drops):
            k = drops[0]
            problems.append(f"x*(p) decreases in p (x*({CURVE_P[k]:g}) = {xs[k]:.4g} > x*({CURVE_P[k + 1]:g}) = "
                            f"{xs[k + 1]:.4g}): a more strongly preferred pair would end with a smaller margin")
    warnings += _symmetry_warnings(loss, xs, facts)
    facts["x_half"] = x_half
    samples = ", ".join(f"x*({p:g}) = {_fmt(xs[np.argmin(np.abs(CURVE_P - p))])}" for p in (0.6, 0.75, 0.9))
    if problems:
        return CheckResult(name, "fail", "; ".join(problems + warnings), facts)
    if warnings:
        return CheckResult(name, "warn", "; ".join(warnings) + f"; {samples}", facts)
    lo, hi = flat_interval(loss, 0.5, x_half)
    at_half = (f"x*(1/2) is any margin from {lo:.4g} to {hi:.4g} (the pair objective is flat there)" if hi - lo > 1e-3
               else "x*(p) is 0 at p = 1/2")
    return CheckResult(name, "pass", f"{at_half}, positive above, non-decreasing and antisymmetric; "
                       f"{samples} (scaled margins beta * rho)", facts)


def check_certainty(loss: MarginLoss) -> CheckResult:
    """Whether a pair preferred with probability 1 has a finite optimal margin."""
    name = "certainty"
    try:
        x1 = loss.pair_optimum(1.0)
    except Exception as err:
        return _error(name, err)
    facts = {"optimum_at_1": x1, "finite": math.isfinite(x1)}
    if math.isnan(x1):
        return CheckResult(name, "fail", "the pair objective at p = 1 is flat: every margin is optimal", facts)
    if x1 == -math.inf or (math.isfinite(x1) and x1 < -1e-9):
        return CheckResult(name, "fail", f"x*(1) = {_fmt(x1)}: with certain labels the optimum favours the loser",
                           facts)
    if abs(x1) <= 1e-9:
        return CheckResult(name, "fail", "x*(1) = 0: even with certain labels the optimal margin is 0", facts)
    if math.isfinite(x1):
        return CheckResult(name, "pass", f"finite optimum at p = 1: x*(1) = {x1:.4g}, so deterministic labels "
                           "give bounded margins", facts)
    return CheckResult(name, "pass", "no finite optimum at p = 1: on pairs with deterministic labels the margin "
                       "grows without bound (Azar et al. 2023, section 4.2); on a finite task a finite optimum then "
                       "needs every response to be beaten sometimes (a strongly connected win graph, Ford 1957)",
                       facts)


# ----------------------------------------------------------------------------
# 8: relation to the built-ins (wrong scale)
# ----------------------------------------------------------------------------

_FIT_X = torch.linspace(-4.0, 4.0, 161, dtype=torch.float64)  # where f is compared with c g(a x) + k
_FIT_A = np.concatenate([-np.geomspace(20.0, 0.05, 240), np.geomspace(0.05, 20.0, 240)])


def fit_rescaled(loss: MarginLoss, reference: MarginLoss) -> tuple[float, float, float, float]:
    """The (a, c, k) minimising ||f(x) - c g(a x) - k|| on [-4, 4], and the residual
    relative to the spread of f. c and k are linear least squares for each a; a is
    searched on a grid (both signs) and refined with scipy's bounded scalar minimiser."""
    with torch.no_grad():
        target = _call(loss, _FIT_X).double().numpy()  # (N,)
    if not np.all(np.isfinite(target)):
        return math.nan, math.nan, math.nan, math.inf
    spread = float(np.ptp(target)) or 1.0

    def residual(a: float) -> tuple[float, float, float]:
        with torch.no_grad():
            g = reference(a * _FIT_X).double().numpy()
        design = np.stack([g, np.ones_like(g)], axis=1)  # (N, 2)
        (c, k), *_ = np.linalg.lstsq(design, target, rcond=None)
        return float(np.sqrt(np.mean((design @ [c, k] - target) ** 2))) / spread, float(c), float(k)

    with torch.no_grad():  # every candidate a at once: g is elementwise, so (A, N) in, (A, N) out
        g = reference(torch.as_tensor(_FIT_A)[:, None] * _FIT_X[None, :]).double().numpy()  # (A, N)
    g_c = g - g.mean(1, keepdims=True)
    t_c = target - target.mean()
    c_all = (g_c @ t_c) / np.maximum((g_c**2).sum(1), 1e-300)  # (A,) least-squares slope per a
    coarse = np.sqrt(np.mean((c_all[:, None] * g_c - t_c[None]) ** 2, axis=1)) / spread  # (A,)
    j = int(np.argmin(coarse))
    # refine between the neighbours of the best grid point, never across a = 0
    bracket = [_FIT_A[i] for i in (j - 1, j, j + 1) if 0 <= i < len(_FIT_A) and _FIT_A[i] * _FIT_A[j] > 0]
    lo, hi = min(bracket), max(bracket)
    best = scipy.optimize.minimize_scalar(lambda a: residual(a)[0], bounds=(lo, hi),
                                          method="bounded", options={"xatol": 1e-12}) if lo != hi else None
    a = float(best.x) if best is not None and best.fun <= coarse[j] else float(_FIT_A[j])
    res, c, k = residual(a)
    return a, c, k, res


def check_scale(loss: MarginLoss, *, beta: float, tolerance: float = 1e-6) -> CheckResult:
    """Whether f is a built-in g rescaled: f(x) = c g(a x) + k.

    With a > 0 this is g at beta a (margins 1/a times g's at the same beta); c > 0
    only scales the gradient (an SGD learning rate; Adam is almost invariant); k
    changes nothing. A built-in is its own reference and is not compared with itself.
    """
    name = "scale"
    matches = []
    try:
        for ref in _builtins():
            if losses.is_builtin(loss) and ref.name == loss.name:
                continue
            a, c, k, res = fit_rescaled(loss, ref)
            if res <= tolerance and abs(c) > 1e-9:  # c = 0 would "match" a constant f
                matches.append({"builtin": ref.name, "a": a, "c": c, "k": k, "residual": res})
    except Exception as err:
        return _error(name, err)
    facts = {"matches": matches}
    if not matches:
        why = "" if losses.is_builtin(loss) else " (its equivalent beta per built-in is in the taylor check)"
        return CheckResult(name, "pass", f"not a rescaled built-in{why}", facts)
    m = min(matches, key=lambda m: abs(math.log(abs(m["a"]))) + abs(math.log(abs(m["c"]))))
    g, a, c = m["builtin"], m["a"], m["c"]
    offset = f" + {m['k']:.3g}" if abs(m["k"]) > 1e-6 else ""
    form = f"f(x) = {c:.4g} * {g}({a:.4g} x){offset}"
    if a < 0 or c < 0:
        return CheckResult(name, "fail", f"{form}: the {g} loss with the sign of the "
                           f"{'margin' if a < 0 else 'loss'} flipped; it rewards the loser", facts)
    exact_a, exact_c = abs(a - 1) <= 1e-4, abs(c - 1) <= 1e-4
    if exact_a and exact_c:
        return CheckResult(name, "pass", f"identical to the built-in {g} (up to a constant {m['k']:.3g})", facts)
    parts = []
    if not exact_a:
        parts.append(f"the input is scaled by {a:.4g}: at beta {beta:g} this is {g} at beta {beta * a:.4g}, so its "
                     f"optimal margins are {1 / a:.4g} times {g}'s at the same beta; if you meant {g}, the scale "
                     "of x is wrong")
    if not exact_c:
        parts.append(f"the value is scaled by {c:.4g}: the same optima as {g}, gradients {c:.4g} times as large "
                     "(a different learning rate under SGD; Adam is almost invariant)")
    return CheckResult(name, "warn", f"wrong scale? {form}: " + "; ".join(parts), facts)


# ----------------------------------------------------------------------------
# 9: the population optimum on finite tasks
# ----------------------------------------------------------------------------








# ----------------------------------------------------------------------------
# The battery
# ----------------------------------------------------------------------------



def run_checks(loss: MarginLoss | PairLoss | str | Callable[..., Tensor], *, beta: float = 0.5, tasks: Sequence = (),
               steps: int = 2000, optim: OptimConfig | None = None, tol: float = 1e-3,
               progress: bool | None = False, params: dict | None = None, noisy_task=None,
               on_check: Callable[[CheckResult, float], None] | None = None, group_tasks: tuple | None = None
               ) -> Report:
    """Every check of the module docstring; the population checks on ``tasks``
    (objects with ``prepare``, or ``(name, task)`` pairs). When f is not elementwise
    the other checks are skipped: f of a single margin is then not defined.
    A pair objective gets the checks of :mod:`polopt.checks.pair` (``noisy_task``: the finite task
    whose exact optimum's finiteness it reports); a group objective those of :mod:`polopt.checks.group`
    (``group_tasks``: the finite task with rewards and the same task with every reward equal).
    ``progress``: a tqdm bar over the checks (None: only on a terminal);
    ``on_check(result, seconds)``: called as each check ends (``polopt check``'s progress lines)."""
    import time

    from tqdm.auto import tqdm

    try:
        loss = losses.resolve(loss, **(params or {}))
    except ValueError:
        broken = unvalidated_group(loss)
        if broken is None:
            raise
        return run_group_checks(broken, beta=beta, on_check=on_check)  # per_group fails with the reason
    if isinstance(loss, GroupObjective):
        signal, silent = group_tasks or (None, None)
        return run_group_checks(loss, beta=beta, signal_task=signal, silent_task=silent, steps=steps, optim=optim,
                                tol=tol, on_check=on_check)
    if isinstance(loss, PairLoss) and loss.margin is None:
        return run_pair_checks(loss, beta=beta, tasks=tasks, noisy_task=noisy_task, steps=steps, optim=optim,
                               tol=tol)
    loss = loss.margin if isinstance(loss, PairLoss) else loss
    checks: list[tuple[str, Callable[[], CheckResult]]] = [
        ("finite", lambda: check_finite(loss)), ("signal", lambda: check_signal(loss)),
        ("convexity", lambda: check_convexity(loss)), ("taylor", lambda: check_taylor(loss, beta=beta)),
        ("pair_optimum", lambda: check_pair_optimum(loss)), ("certainty", lambda: check_certainty(loss)),
        ("scale", lambda: check_scale(loss, beta=beta))]
    labelled = [item if isinstance(item, tuple) else (getattr(item, "name", type(item).__name__), item)
                for item in tasks]
    for label, task in labelled:
        checks.append((f"population:{label}", lambda task=task, label=label: check_population(
            loss, task, beta=beta, steps=steps, optim=optim, tol=tol, name=label)))
    start = time.perf_counter()
    results = [guarded("elementwise", lambda: check_elementwise(loss))]
    if on_check is not None:
        on_check(results[0], time.perf_counter() - start)
    elementwise = results[0].status != "fail"
    quiet = None if progress is None else not progress  # tqdm: None hides the bar off a terminal
    for name, fn in tqdm(checks, desc=f"check {loss.name}", disable=quiet, leave=False):
        start = time.perf_counter()
        if elementwise:
            results.append(guarded(name, fn))
        else:
            results.append(CheckResult(name, "skip", "not run: f is not elementwise, so the loss of one margin "
                                       "(and everything built on it) is not defined"))
        if on_check is not None:
            on_check(results[-1], time.perf_counter() - start)
    pair = next(r for r in results if r.name == "pair_optimum")
    if pair.facts.get("infinite_below_certainty"):
        for r in results:
            if r.name.startswith("population:") and r.status == "fail":
                r.reason += ("; expected, since x*(p) is infinite for p < 1: no finite population optimum exists, "
                             "and the exact solver's finite answer is only a stationary point")
    optimum = pair.facts.get("optimum")
    curve = {"p": CURVE_P.tolist(), "optimum": optimum} if optimum is not None else {}
    return Report(loss.name, beta, results, curve)


def format_report(report: Report, *, width: int = 100) -> str:
    """The report as a table: check, status, reason (wrapped)."""
    import textwrap

    lines = [f"polopt check: {report.loss} at beta = {report.beta:g}", ""]
    name_w = max(len(r.name) for r in report.results) + 2
    indent = " " * (name_w + 8)
    lines.append(f"{'check':<{name_w}} status what it tests: finding")
    for r in report.results:
        wrapped = textwrap.wrap(f"{what_it_tests(r.name)}: {r.reason}", width=max(width - len(indent), 40)) or [""]
        lines.append(f"{r.name:<{name_w}} {r.status.upper():<6} {wrapped[0]}")
        lines += [indent + w for w in wrapped[1:]]
    n_warn = sum(r.status == "warn" for r in report.results)
    lines += ["", f"result: {report.status.upper()} ({len(report.failures)} failure(s), {n_warn} warning(s)); "
              "FAIL: the loss cannot do its job; WARN: it works, but not as one would likely assume"]
    return "\n".join(lines)
