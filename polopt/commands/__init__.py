"""The command layer: one module per ``polopt`` command, with their shared helpers.

- :mod:`polopt.commands.main`: the dispatcher (``polopt COMMAND ...``, ``python -m polopt``).
- one module per command, each with ``main(argv) -> exit code``: :mod:`~polopt.commands.train`
  (also the run folder of one training run), :mod:`~polopt.commands.check`, :mod:`~polopt.commands.compare`,
  :mod:`~polopt.commands.realign`, :mod:`~polopt.commands.demo`, :mod:`~polopt.commands.data`,
  :mod:`~polopt.commands.export`, :mod:`~polopt.commands.sft`, :mod:`~polopt.commands.checkpoints`,
  :mod:`~polopt.commands.losses`, :mod:`~polopt.commands.reward`.
- shared helpers: :mod:`~polopt.commands.config` (``key=value`` on the command line).

Everything below this package is the library; nothing in it imports a command.
"""
