"""``polopt losses``: list the built-in losses with f'(0), f''(0), convexity and their papers.

The list is :data:`CATALOGUE`, written out so that the command prints at once without loading torch;
tests/test_commands.py recomputes every row from the registry (:meth:`polopt.losses.margin.MarginLoss.derivatives_at`,
autograd) and fails when the two differ, so the catalogue cannot drift from :mod:`polopt.losses.margin`.
"""

from __future__ import annotations

import argparse

# name: (f'(0), f''(0), convex, source), as polopt.losses.margin computes and declares them
CATALOGUE = {
    "logistic": (-0.5, 0.25, True, "Rafailov et al. 2023 (DPO)"),
    "squared": (-2.0, 2.0, True, "Azar et al. 2023 (IPO)"),
    "hinge": (-1.0, 0.0, True, "Zhao et al. 2023 (SLiC)"),
    "huber": (-2.0, 0.0, True, "Huber 1964, on the squared loss"),
    "exponential": (-1.0, 1.0, True, "Tang et al. 2024 (GPO)"),
    "truncated_quadratic": (-2.0, 2.0, True, "Tang et al. 2024 (GPO)"),
    "savage": (-0.25, 0.125, False, "Tang et al. 2024 (GPO)"),
}


# pair objectives (polopt.losses.registry): name, keyword parameters with their defaults, source
PAIR_CATALOGUE = [
    ("divergence_reverse_kl", "-", "Wang et al. 2023 (f-DPO, reverse KL = DPO)"),
    ("divergence_forward_kl", "-", "Wang et al. 2023 (f-DPO, forward KL)"),
    ("divergence_jensen_shannon", "-", "Wang et al. 2023 (f-DPO, Jensen-Shannon)"),
    ("divergence_alpha", "alpha=0.5", "Wang et al. 2023 (f-DPO, alpha-divergence)"),
    ("chi_squared_link", "clip=None", "Huang et al. 2024 (chi-PO)"),
    ("length_normalised_free", "gamma=0.5", "Meng et al. 2024 (SimPO)"),
    ("length_regularised", "alpha=0.05", "Park et al. 2024 (R-DPO)"),
    ("winner_anchored", "penalty=50.0", "Pal et al. 2024 (DPO-Positive)"),
    ("reference_free_logistic", "-", "Xu et al. 2024 (CPO's preference term)"),
    ("plus_winner_nll", "base=reference_free_logistic, weight=1.0, per_token=False",
     "Xu et al. 2024 (CPO: a loss plus the winner's NLL)"),
    ("odds_ratio_with_nll", "weight=0.1", "Hong et al. 2024 (ORPO)"),
]


# group objectives (polopt.losses.registry, kind "group"): name, the feedback each reads (task.feedback), keyword
# parameters with their defaults, whether its target is a stationary point (a statistic held without gradient), source
GROUP_CATALOGUE = [
    ("unpaired_prospect", "unpaired", "desirable_weight=1.0, undesirable_weight=1.0", True,
     "Ethayarajh et al. 2024 (KTO)"),
    ("unpaired_classifier", "unpaired", "-", True, "Jung et al. 2024 (BCO)"),
    ("ranking_likelihood", "pairs, ranking", "-", False, "Rafailov et al. 2023, appendix (Plackett-Luce listwise DPO)"),
    ("score_cross_entropy", "scored", "temperature=1.0", False, "Chen et al. 2024 (InfoNCA)"),
    ("score_binary_contrast", "scored", "temperature=1.0", False, "Chen et al. 2024 (NCA)"),
    ("score_reverse_kl", "scored", "temperature=1.0", False, "Ji et al. 2024 (EXO)"),
    ("flip_corrected_logistic", "pairs, ranking", "flip_rate=0.1", False,
     "Chowdhury et al. 2024 (robust DPO, known flip rate)"),
    ("calibrated_logistic", "pairs, ranking", "-", False, "Xiao et al. 2024 (Cal-DPO)"),
    ("anchored_raise_lower", "pairs, ranking", "-", False, "D'Oosterlinck et al. 2024 (APO-zero)"),
    ("anchored_lower_both", "pairs, ranking", "-", False, "D'Oosterlinck et al. 2024 (APO-down)"),
    ("logistic_exponential_blend", "pairs, ranking", "tau=0.05", False, "Lu et al. 2024 (DiscoPOP)"),
]


def main(argv: list[str]) -> int:
    """The ``polopt losses`` subcommand."""
    argparse.ArgumentParser(prog="polopt losses", description="List the built-in losses: f'(0), f''(0) at the "
                            "default parameters, convexity and the paper each comes from. Use one with "
                            "polopt train loss=NAME; your own with loss=pkg.module:name.").parse_args(argv)
    for name, (d1, d2, convex, source) in CATALOGUE.items():
        word = {True: "convex", False: "not convex", None: "convexity unknown"}[convex]
        print(f"{name:<20} f'(0)={d1:+.3f} f''(0)={d2 + 0.0:.3f}  {word:<12} {source}")
    print("\npair objectives (functions of both log-ratios and the lengths, not of the margin alone):")
    for name, takes, source in PAIR_CATALOGUE:
        print(f"{name:<26} {takes:<54} {source}")
    print("\ngroup objectives (unpaired labels, rankings, scored groups; train with task.feedback=KIND; every pair "
          "objective above also trains on pairs and rankings):")
    for name, feedback, takes, stationary, source in GROUP_CATALOGUE:
        target = "stationary point" if stationary else "minimiser"
        print(f"{name:<26} {feedback:<15} {takes:<45} {target:<16} {source}")
    return 0


def _keyword_defaults(fn) -> dict:
    import inspect

    return {k: p.default for k, p in inspect.signature(fn).parameters.items() if p.kind is p.KEYWORD_ONLY}
