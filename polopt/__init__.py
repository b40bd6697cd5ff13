"""polopt: offline preference optimisation on small models, checked against exact optima.

- :mod:`polopt.losses`: the loss family f and its registry.
- :mod:`polopt.objective`: log-probabilities -> margins -> one reduced loss.
- :mod:`polopt.policies`: tabular and log-linear policies for finite tasks.
- :mod:`polopt.train`: the training loop.
- :mod:`polopt.app`, :mod:`polopt.cli`: the command line (``polopt train ...``).
"""

__version__ = "0.1.0"
