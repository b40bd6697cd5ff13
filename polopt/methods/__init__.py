"""Methods beyond the offline losses, chosen by the ``method`` config group.

- ``offline``: the offline losses on a task's pairs (the default path, :class:`polopt.training.loop.PairBatches`).
- ``rl``: KL-regularised REINFORCE (:mod:`polopt.methods.rl`); target pi_ref e^{r / beta}.
- ``selfplay``: pairs from the current policy (:mod:`polopt.methods.selfplay`); target the
  Nash equilibrium of the regularised preference game at tau = beta / 2.
- ``best_of_n``: distillation of best-of-n of the reference (:mod:`polopt.methods.distill`).
- ``group``: group-relative online updates (:mod:`polopt.methods.group`); target the update's exact
  stationary point, beside pi_ref e^{r / beta}.

Each method talks to a policy through log-probabilities and to a task through a
:class:`polopt.methods.environment.FiniteEnvironment`; the task computes each
method's exact target itself, independently of this code. A method is a per-step objective
``step(step) -> (scalar to minimise, metrics)``; it trains in the one training loop
(:func:`polopt.training.loop.optimise`, through :class:`polopt.training.loop.MethodBatches`);
:mod:`polopt.methods.dispatch` chooses one by name. The package itself imports nothing, so that a
module of it (the over-optimisation table of ``polopt compare``) loads without torch.
"""
