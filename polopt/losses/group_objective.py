"""The group objective: its argument, its type, the pair adapter, and the probe that validates one.

A group objective is ``ell(group, beta) -> (B,)`` of a :class:`GroupScores`: member fields of shape
(B, G)

    logp, ref_logp         policy and reference log-probabilities of each member
    lengths                members' lengths in tokens (1 where a task gives none)
    mask                   True where a member is present (groups of fewer than G members are padded)
    labels                 1.0 desirable, 0.0 undesirable (unpaired feedback; G may be 1), or None
    ranks                  0 = best, 1 = next, ... (ranking feedback; a pair is the G = 2 case), or None
    scores                 a scalar per member (scored feedback), or None
    weight                 (B,) the groups' weights in the batch (exact mode: their population
                           probabilities), or None for equal weights: objectives with a statistic
                           of the whole batch (KTO's reference point) weight it by them

and one kind of feedback. :class:`GroupObjective` names one with its bound
``loss.KEY=`` parameters, the feedback it reads (found by :func:`validate_group` on probe groups) and
whether it holds a statistic without gradient (then its training target is a stationary point).

Every pair objective (and so every margin loss) is a group objective on ranking feedback through
:func:`ranked_pairs`: a group's loss is the mean of the pair loss over the ordered pairs its ranking
implies (best over worse), so at G = 2 it is the pair objective itself, value for value.

Feedback kinds (``task.feedback``) and the field each fills:

    pairs     ranks (G = 2: winner rank 0, loser rank 1)
    unpaired  labels (1 desirable, 0 undesirable)
    ranking   ranks (0 = best)
    scored    scores
"""

from __future__ import annotations

import dataclasses
import functools
from collections.abc import Callable
from dataclasses import dataclass, field

import torch

from polopt.losses.pair import PairScores, check_values

Tensor = torch.Tensor

FEEDBACK_FIELDS = {"pairs": "ranks", "unpaired": "labels", "ranking": "ranks", "scored": "scores"}
STOP_GRADIENT_TOLERANCE = 1e-6  # autograd and a finite difference of the value differ by more: a stop-gradient


@dataclass(frozen=True)
class GroupScores:
    """Log-probabilities, lengths and feedback of a batch of groups; member fields (B, G).

    Exactly one of ``labels``, ``ranks``, ``scores`` is given by a task's feedback kind; the
    others are None. Padded members (``mask`` False) carry log-probabilities 0 and are ignored by
    every built-in objective.
    """

    logp: Tensor
    ref_logp: Tensor
    lengths: Tensor
    mask: Tensor
    labels: Tensor | None = None
    ranks: Tensor | None = None
    scores: Tensor | None = None
    weight: Tensor | None = None

    @property
    def logratio(self) -> Tensor:
        """``h = log pi(y|x) - log pi_ref(y|x)`` of every member, (B, G)."""
        return self.logp - self.ref_logp

    @property
    def size(self) -> int:
        """G, the number of member slots per group."""
        return self.logp.shape[1]

    def batch_weight(self) -> Tensor:
        """The groups' weights normalised to sum to 1, (B,) (equal where ``weight`` is None)."""
        if self.weight is None:
            return torch.full(self.logp.shape[:1], 1.0 / self.logp.shape[0], dtype=self.logp.dtype,
                              device=self.logp.device)
        w = self.weight.to(self.logp.dtype)
        return w / w.sum()


@dataclass(frozen=True)
class GroupObjective:
    """A loss of a whole group: ``ell(group, beta, **params) -> (B,)``.

    Attributes:
        name: registry name or dotted path.
        fn: ``fn(group, beta, **params)``; or, when ``pairwise``, a pair objective's ``fn(pair,
            beta, **params)`` run over each group's ranked pairs (:func:`ranked_pairs`).
        params: keyword parameters bound into ``fn`` (from ``loss.<key>=``).
        source: the paper (built-ins) or "user-supplied".
        pairwise: whether ``fn`` is a pair objective.
        stop_gradient: whether the objective holds a statistic without gradient (declared by the
            function's ``stop_gradient`` attribute, or found by :func:`validate_group`).
        reads: the feedback fields it reads ("labels", "ranks", "scores"), found by
            :func:`validate_group`; empty until validated.
    """

    name: str
    fn: Callable[..., Tensor]
    params: dict = field(default_factory=dict)
    source: str = ""
    pairwise: bool = False
    stop_gradient: bool = False
    reads: tuple[str, ...] = ()

    def __call__(self, group: GroupScores, beta: float) -> Tensor:
        if self.pairwise:
            return ranked_pairs(functools.partial(self.fn, **self.params), group, beta)
        return self.fn(group, beta, **self.params)

    def reads_feedback(self, kind: str) -> bool:
        """Whether this objective reads the field that feedback ``kind`` fills."""
        return FEEDBACK_FIELDS[kind] in self.reads

    def __repr__(self) -> str:
        extra = "".join(f", {k}={v}" for k, v in self.params.items() if k != "loss")
        return f"GroupObjective({self.name!r}{extra})"


def ranked_pairs(pair_loss: Callable[[PairScores, float], Tensor], group: GroupScores, beta: float) -> Tensor:
    """The mean of ``pair_loss`` over the ordered pairs (i better than j) of each group's ranking.

    Every ordered pair of member slots is scored at once, (B, G (G - 1)), and the pairs that are
    not (present, present, rank_i < rank_j) are dropped by ``torch.where`` (never multiplied by 0,
    so a pair loss that is infinite on a dropped pair cannot make a NaN). At G = 2 each group has
    one such pair and the result is the pair loss itself, bit for bit. (B, G) -> (B,)."""
    b, g = group.logp.shape
    first, second = (t.reshape(-1) for t in torch.nonzero(~torch.eye(g, dtype=torch.bool), as_tuple=True))  # (P,)

    def pick(t: Tensor) -> tuple[Tensor, Tensor]:  # (B, G) -> the first and second members of every pair, (B P,)
        return t[:, first].reshape(-1), t[:, second].reshape(-1)

    (w, lo), (rw, rl), (nw, nl) = pick(group.logp), pick(group.ref_logp), pick(group.lengths)
    values = pair_loss(PairScores(w, lo, rw, rl, nw, nl), beta).reshape(b, len(first))  # (B, P)
    ranks = group.ranks
    ordered = group.mask[:, first] & group.mask[:, second] & (ranks[:, first] < ranks[:, second])  # (B, P)
    total = torch.where(ordered, values, 0.0).sum(1)  # (B,)
    return total / ordered.sum(1).clamp(min=1).to(values.dtype)


# ----------------------------------------------------------------------------
# Probe groups and validation: one line for an objective that cannot work
# ----------------------------------------------------------------------------


def probe_group(kind: str, *, at_reference: bool = False, dtype: torch.dtype = torch.float64) -> GroupScores:
    """Four ordinary groups of three members (probabilities 0.05..0.6, lengths 1..5) carrying the
    feedback field of ``kind`` (one of :data:`FEEDBACK_FIELDS`'s values) only; ``at_reference``: the
    policy equals the reference (every log-ratio 0, where training starts). The policy's
    log-ratios have a positive mean, so a reference point clamped at 0 is active."""
    t = functools.partial(torch.tensor, dtype=dtype)
    ref = t([[-1.0, -1.6, -2.3], [-0.7, -1.2, -3.0], [-2.0, -0.9, -1.4], [-0.5, -2.5, -1.1]])
    logp = ref if at_reference else ref + t([[0.3, -0.2, 0.5], [0.4, 0.1, -0.3], [-0.1, 0.6, 0.2], [0.2, 0.3, -0.4]])
    feedback = {
        "labels": t([[1.0, 0.0, 1.0], [0.0, 1.0, 0.0], [1.0, 1.0, 0.0], [0.0, 0.0, 1.0]]),
        "ranks": torch.tensor([[0, 1, 2], [2, 0, 1], [1, 2, 0], [0, 2, 1]]),
        "scores": t([[1.5, -0.2, 0.4], [0.0, 0.9, -1.1], [0.3, 0.3, 2.0], [-0.5, 1.2, 0.8]]),
    }
    return GroupScores(logp, ref, t([[1.0, 2.0, 3.0], [2.0, 1.0, 5.0], [3.0, 3.0, 1.0], [4.0, 2.0, 2.0]]),
                       torch.ones(4, 3, dtype=torch.bool), **{kind: feedback[kind]})


def _try_feedback(objective: GroupObjective, kind: str, beta: float) -> str | None:
    """None when ``objective`` returns finite (4,) losses on the probe groups of ``kind`` (and at the
    reference); else why not, in a few words. A wrong shape raises at once: no feedback fixes that."""
    for at_reference in (False, True):
        try:
            values = objective(probe_group(kind, at_reference=at_reference), beta)
        except Exception as err:  # a function that cannot read this feedback fails in any way
            return f"{type(err).__name__}: {err}"
        check_values(objective.name, values, 4, unit="group")
        if not torch.isfinite(values.detach()).all():
            where = "at the reference" if at_reference else "on probe groups"
            return f"non-finite values {values.detach().tolist()} {where}"
    return None


def _detaches(objective: GroupObjective, kind: str, beta: float) -> bool:
    """Whether autograd's directional derivative of the summed loss differs from a central finite
    difference of its value (float64): a statistic held without gradient."""
    probe = probe_group(kind)
    # every component positive: a batch mean's derivative along a direction of mean 0 would vanish
    direction = torch.linspace(0.2, 1.0, probe.logp.numel(), dtype=torch.float64).reshape(probe.logp.shape)
    logp = probe.logp.clone().requires_grad_(True)
    (grad,) = torch.autograd.grad(objective(dataclasses.replace(probe, logp=logp), beta).sum(), logp)
    step = 1e-5
    with torch.no_grad():
        up = objective(dataclasses.replace(probe, logp=probe.logp + step * direction), beta).sum()
        down = objective(dataclasses.replace(probe, logp=probe.logp - step * direction), beta).sum()
    numeric, analytic = float((up - down) / (2 * step)), float((grad * direction).sum())
    return abs(numeric - analytic) > STOP_GRADIENT_TOLERANCE * (1.0 + abs(numeric))


def validate_group(objective: GroupObjective, beta: float = 0.5) -> GroupObjective:
    """``objective`` with the feedback fields it reads and its stop-gradient flag filled in, found on
    :func:`probe_group`: a ValueError (one line) when it reads none of them, or returns a wrong shape."""
    failures = {kind: _try_feedback(objective, kind, beta) for kind in ("labels", "ranks", "scores")}
    reads = tuple(kind for kind, failure in failures.items() if failure is None)
    if not reads:
        why = "; ".join(f"with {kind}: {failure}" for kind, failure in failures.items())
        raise ValueError(f"loss {objective.name!r} failed on probe groups of every feedback kind ({why}); a group "
                         "objective reads group.labels, group.ranks or group.scores and returns finite losses")
    stop = objective.stop_gradient or _detaches(objective, reads[0], beta)
    return dataclasses.replace(objective, reads=reads, stop_gradient=stop)
