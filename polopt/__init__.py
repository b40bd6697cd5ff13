"""polopt: offline preference optimisation on small models, checked against exact optima.

- :mod:`polopt.losses.margin`: the loss family f and its registry.
- :mod:`polopt.losses.reduce`: log-probabilities -> margins -> one reduced loss.
- :mod:`polopt.models.tabular`: tabular and log-linear policies for finite tasks.
- :mod:`polopt.models.transformer`: sequence models (a tiny causal transformer, a bigram table).
- :mod:`polopt.models.logprobs`: sequence log-probabilities with prompt masking and padding.
- :mod:`polopt.models.reference_cache`: the reference's log-probs over a dataset, computed once and cached.
- :mod:`polopt.pairs`, :mod:`polopt.training.optim`, :mod:`polopt.training.contracts`: the contract layer (pairs,
  the optimiser config, the train result, the task/session protocols).
- :mod:`polopt.training.loop`: the one training loop; :mod:`polopt.training.run_folder`: what a run leaves.
- :mod:`polopt.commands.train`, :mod:`polopt.commands.main`: the command line (``polopt train ...``).
"""

__version__ = "0.1.0"
