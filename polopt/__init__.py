"""polopt: offline preference optimisation on small models, checked against exact optima.

- :mod:`polopt.losses`: the loss family f and its registry.
- :mod:`polopt.objective`: log-probabilities -> margins -> one reduced loss.
- :mod:`polopt.policies`: tabular and log-linear policies for finite tasks.
- :mod:`polopt.models`: sequence models (a tiny causal transformer, a bigram table).
- :mod:`polopt.logprobs`: sequence log-probabilities with prompt masking and padding.
- :mod:`polopt.reference_cache`: the reference's log-probs over a dataset, computed once and cached.
- :mod:`polopt.pair_set`, :mod:`polopt.optim`, :mod:`polopt.contracts`: the contract layer (pairs,
  the optimiser config, the train result, the task/session protocols).
- :mod:`polopt.train`: the one training loop; :mod:`polopt.run_folder`: what a run leaves.
- :mod:`polopt.commands.train`, :mod:`polopt.commands.main`: the command line (``polopt train ...``).
"""

__version__ = "0.1.0"
