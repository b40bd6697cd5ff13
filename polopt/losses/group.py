"""The built-in group objectives: unpaired labels, rankings and scored groups.

A group objective is a plain function ``name(group, beta, *, params...) -> Tensor`` returning one
loss per group, shape (B,), where ``group`` is a :class:`polopt.losses.group_objective.GroupScores`: member
fields of shape (B, G) (policy and reference log-probabilities, lengths, a presence mask) and one
kind of feedback (``labels``, ``ranks`` or ``scores``). Each member below is pure and unreduced;
the weighted mean over groups is taken once, in :mod:`polopt.losses.reduce`. The registry that
names them for ``loss=...`` lives in :mod:`polopt.losses.registry`; the pairwise members of the
same papers' family (noise-corrected DPO, Cal-DPO, APO, DiscoPOP) are in
:mod:`polopt.losses.group_pairwise`.

Notation: ``h = log pi(y) - log pi_ref(y)`` (log-ratio) of each member, ``s = beta h`` (the implicit
reward of DPO), ``sigma`` the logistic function, ``softmax_G`` a softmax over a group's present
members, ``p = softmax_G(scores / temperature)`` the target of the scored members.

Where the formulas come from: the search tool's stored copies of these papers return their
abstracts and introductions only (and third-party summaries); no equation could be read from a
paper itself. Each docstring says what was confirmed and marks the rest "from memory". Two members
(KTO's reference point, BCO's reward shift) hold a statistic of the whole batch without gradient:
their training target is a stationary point, not a minimiser (``stop_gradient`` in the registry).
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from polopt.losses.group_objective import GroupScores

Tensor = torch.Tensor


def _present(group: GroupScores) -> Tensor:
    """The presence mask as the log-ratios' dtype, (B, G)."""
    return group.mask.to(group.logp.dtype)


def _member_mean(values: Tensor, group: GroupScores) -> Tensor:
    """Mean over each group's present members: (B, G) -> (B,)."""
    present = _present(group)
    return torch.where(group.mask, values, 0.0).sum(1) / present.sum(1)


def _masked(values: Tensor, mask: Tensor) -> Tensor:
    """``values`` with absent members at the dtype's lowest finite number, so that a softmax or a
    logsumexp gives them no mass without the NaN gradients that -inf brings. (B, G) -> (B, G)."""
    return torch.where(mask, values, torch.finfo(values.dtype).min)


def _batch_mean(values: Tensor, group: GroupScores, select: Tensor | None = None) -> Tensor:
    """``sum_b w_b sum_g m_bg v_bg / sum_b w_b sum_g m_bg`` over the batch, with the groups' weights
    w (exact mode: their population probabilities) and m the present (and ``select``-ed) members;
    0 where nothing is selected. (B, G) -> scalar."""
    m = _present(group) if select is None else _present(group) * select.to(group.logp.dtype)
    w = group.batch_weight()[:, None] * m  # (B, G)
    total = w.sum()
    return torch.where(total > 0, (w * values).sum() / total.clamp(min=torch.finfo(values.dtype).tiny), 0.0)


# ----------------------------------------------------------------------------
# Unpaired labels: KTO and BCO
# ----------------------------------------------------------------------------


def unpaired_prospect(group: GroupScores, beta: float, *, desirable_weight: float = 1.0,
                      undesirable_weight: float = 1.0) -> Tensor:
    """KTO: a prospect-theoretic value of each labelled response against a detached reference point.

    ``z0 = max(0, E[h])`` over the batch's members (weighted by the groups' weights), held fixed
    (no gradient); with ``z = beta (h - z0)`` each member's loss is ``lambda_D (1 - sigma(z))`` when
    desirable and ``lambda_U (1 - sigma(-z))`` when undesirable (``lambda_y - v(x, y)`` with the value
    ``v = lambda_D sigma(z)`` or ``lambda_U sigma(-z)``); a group's loss is its members' mean.

    The paper's z0 is KL(pi_theta || pi_ref), estimated in a batch by the mean log-ratio of
    responses paired with other prompts, clamped at 0 and not backpropagated; here the batch's own
    members (drawn from the sampling distribution mu) give ``E_mu[h]``, the same estimator on a
    population. Because z0 carries no gradient, training stops where the gradient with z0 held
    fixed vanishes: a stationary point, which the exact solver certifies as such.

    References:
        Ethayarajh et al., KTO: Model Alignment as Prospect Theoretic Optimization, 2024 (arXiv
        2402.01306). Confirmed in a third-party reproduction note: ``L_good = lambda_good (1 -
        sigma(beta (log_ratio - z_ref)))``, ``L_bad = lambda_bad (1 - sigma(-beta (log_ratio -
        z_ref)))``, z_ref the KL estimate, defaults lambda = 1. The clamp at 0 and the detachment
        are from memory.
    """
    h = group.logratio  # (B, G)
    reference_point = _batch_mean(h, group).clamp(min=0.0).detach()  # scalar, no gradient (the paper's z0)
    z = beta * (h - reference_point)  # (B, G)
    desirable = group.labels > 0.5
    values = torch.where(desirable, desirable_weight * torch.sigmoid(-z), undesirable_weight * torch.sigmoid(z))
    return _member_mean(values, group)


unpaired_prospect.stop_gradient = True


def unpaired_classifier(group: GroupScores, beta: float) -> Tensor:
    """BCO: a binary classifier of desirable against undesirable responses, logit ``beta h - delta``.

    ``loss = -log sigma(beta h - delta)`` for a desirable member and ``-log sigma(-(beta h -
    delta))`` for an undesirable one; ``delta = (E[beta h | desirable] + E[beta h | undesirable]) / 2``
    over the batch (weighted by the groups' weights), held fixed (no gradient). The paper keeps
    delta as a moving average over training steps; on a full population batch the average is its
    value. The paper's optional density-ratio weighting (its UDM) is not included. A stationary
    point, as for :func:`unpaired_prospect`.

    References:
        Jung et al., Binary Classifier Optimization for Large Language Model Alignment, 2024 (arXiv
        2404.04656). Confirmed in a summary of the paper: binary cross-entropy with the implicit
        reward ``beta log pi / pi_ref`` as logit, as an upper bound of the DPO loss. The reward shift
        delta (the mean of the two classes' mean rewards) is from memory.
    """
    s = beta * group.logratio  # (B, G)
    desirable = group.labels > 0.5
    shift = 0.5 * (_batch_mean(s, group, desirable) + _batch_mean(s, group, ~desirable)).detach()  # scalar
    z = s - shift  # (B, G)
    values = torch.where(desirable, F.softplus(-z), F.softplus(z))  # -log sigma(z), -log sigma(-z)
    return _member_mean(values, group)


unpaired_classifier.stop_gradient = True


# ----------------------------------------------------------------------------
# Rankings: Plackett–Luce
# ----------------------------------------------------------------------------


def ranking_likelihood(group: GroupScores, beta: float) -> Tensor:
    """Listwise DPO: the Plackett–Luce negative log-likelihood of the ranking under ``s = beta h``.

    With the members ordered best first, tau(1), ..., tau(G):
    ``loss = -sum_k [s_tau(k) - log sum_{j >= k} e^{s_tau(j)}]``. At G = 2 this is DPO's
    ``-log sigma(beta (h_w - h_l))``. On rankings drawn from the Plackett–Luce model of rewards r it
    is minimised by ``beta h = r + c`` (the cross-entropy of two Plackett–Luce models is smallest
    where they agree), so ``pi* ∝ pi_ref e^{r / beta}`` for any group size and sampling distribution.

    References:
        Rafailov et al., Direct Preference Optimization: Your Language Model is Secretly a Reward
        Model, 2023, appendix A.3 (the Plackett–Luce objective with the implicit reward
        ``beta log pi / pi_ref``). From memory; the G = 2 case equals eq. 7, which this kit's DPO
        tests check.
    """
    s = beta * group.logratio  # (B, G)
    ranks = group.ranks
    eye = torch.eye(group.size, dtype=torch.bool, device=s.device)
    # at_or_below[b, i, j]: member j is present and ranked at or below member i (i itself always, so
    # that every row of the logsumexp has a finite entry)
    at_or_below = (group.mask[:, None, :] & (ranks[:, None, :] >= ranks[:, :, None])) | eye  # (B, G, G)
    rest = torch.logsumexp(_masked(s[:, None, :].expand_as(at_or_below), at_or_below), dim=2)  # (B, G)
    return torch.where(group.mask, rest - s, 0.0).sum(1)


# ----------------------------------------------------------------------------
# Scored groups: InfoNCA, NCA, EXO
# ----------------------------------------------------------------------------


def _score_logits(group: GroupScores, temperature: float) -> Tensor:
    """``scores / temperature`` with absent members masked out (:func:`_masked`), (B, G)."""
    if not (isinstance(temperature, (int, float)) and temperature > 0):
        raise ValueError(f"loss.temperature must be a number > 0 (e.g. loss.temperature=1.0), got {temperature!r}")
    return _masked(group.scores.to(group.logp.dtype) / temperature, group.mask)


def _score_target(group: GroupScores, temperature: float) -> Tensor:
    """``p = softmax_G(scores / temperature)`` over each group's present members, (B, G)."""
    return torch.softmax(_score_logits(group, temperature), dim=1)


def score_cross_entropy(group: GroupScores, beta: float, *, temperature: float = 1.0) -> Tensor:
    """InfoNCA: the cross-entropy from the scores' softmax to the implicit rewards' softmax.

    ``loss = -sum_i p_i log softmax_G(beta h)_i`` with ``p = softmax_G(scores / temperature)``. It is
    smallest, for every group at once, where ``beta h = scores / temperature + c``: on a task whose
    scores are its rewards r, ``pi* ∝ pi_ref e^{r / (temperature beta)}``, for any group size.
    At G = 2 with p = (1, 0) it is DPO.

    References:
        Chen et al., Noise Contrastive Alignment of Language Models with Explicit Rewards, 2024
        (arXiv 2402.05369). Confirmed from the abstract: InfoNCA contains the DPO loss as the special
        case of pairwise preferences. The softmax target ``e^{r_i / alpha} / sum_j e^{r_j / alpha}``
        and the implicit reward ``beta log pi / pi_ref`` are from memory.
    """
    target = _score_target(group, temperature)  # (B, G)
    log_q = torch.log_softmax(_masked(beta * group.logratio, group.mask), dim=1)  # (B, G)
    return -torch.where(group.mask, target * log_q, 0.0).sum(1)


def score_binary_contrast(group: GroupScores, beta: float, *, temperature: float = 1.0) -> Tensor:
    """NCA: each member's implicit reward classified against noise, weighted by its score's softmax.

    ``loss = -sum_i [p_i log sigma(beta h_i) + (1 / G) log sigma(-beta h_i)]``, G the number of present
    members, ``p = softmax_G(scores / temperature)``. Unlike InfoNCA it fixes absolute log-ratios, not
    only their differences, so the simplex constraint binds: its optimum is found numerically.

    References:
        Chen et al., Noise Contrastive Alignment of Language Models with Explicit Rewards, 2024
        (arXiv 2402.05369). Confirmed from the abstract: NCA optimises the absolute likelihood of
        each response. The formula is from memory.
    """
    target = _score_target(group, temperature)  # (B, G)
    s = beta * group.logratio  # (B, G)
    count = _present(group).sum(1, keepdim=True)  # (B, 1)
    terms = target * F.logsigmoid(s) + F.logsigmoid(-s) / count  # (B, G)
    return -torch.where(group.mask, terms, 0.0).sum(1)


def score_reverse_kl(group: GroupScores, beta: float, *, temperature: float = 1.0) -> Tensor:
    """EXO: the reverse KL from the implicit rewards' softmax to the scores' softmax within a group.

    ``loss = sum_i q_i (log q_i - log p_i)`` with ``q = softmax_G(beta h)`` and ``p =
    softmax_G(scores / temperature)``: mode-seeking where InfoNCA's forward cross-entropy is
    mean-seeking. Its minimum 0 is reached in every group at once where ``beta h = scores /
    temperature + c``, so its optimum equals InfoNCA's: ``pi* ∝ pi_ref e^{r / (temperature beta)}``.

    References:
        Ji et al., Towards Efficient Exact Optimization of Language Model Alignment, 2024 (arXiv
        2402.00856). Confirmed from a summary: EXO minimises the reverse KL between the policy's
        and the optimal policy's distributions over sampled responses, where DPO corresponds to the
        forward KL. The per-group softmax form is from memory.
    """
    target_log = torch.log_softmax(_score_logits(group, temperature), dim=1)  # (B, G), finite everywhere
    log_q = torch.log_softmax(_masked(beta * group.logratio, group.mask), dim=1)  # (B, G)
    return torch.where(group.mask, log_q.exp() * (log_q - target_log), 0.0).sum(1)
