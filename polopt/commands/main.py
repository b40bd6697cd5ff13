"""``polopt``: the command line. ``python -m polopt`` does the same.

    polopt train [GROUP=OPTION ...] [KEY=VALUE ...]   train one loss on one task (Hydra overrides)
    polopt losses                                      list the registered losses
    polopt export TASK OUT.json [KEY=VALUE ...]        write a built-in task out as a task file
    polopt data FILE [task.KEY=VALUE ...]              check and summarise a preference-pair file
    polopt compare [GROUP=A,B ...] [KEY=VALUE ...]     several losses / methods side by side
    polopt reward [KEY=VALUE ...]                      fit a Bradley–Terry reward model to a task's pairs
    polopt realign [KEY=VALUE ...] [--lambdas L,...]   realignment by lambda against retraining at beta / lambda
    polopt checkpoints RUN_DIR                         verify a run folder's checkpoints (sizes, SHA-256, loading)
    polopt check LOSS [KEY=VALUE ...] [--json]         unit-test a loss against the analytic optimum
    polopt demo [KEY=VALUE ...] [--quick]              the end-to-end walk-through
    polopt sft FILE [KEY=VALUE ...]                    supervised fine-tuning of a reference model
    polopt evaluate RUN [KEY=VALUE ...]                a local_lm run's policy against its reference on held-out prompts

Every command takes polopt train's config keys as KEY=VALUE; flags only for what is not a config key.
Every command that writes a folder (train, reward, compare, sft, realign, demo, data, evaluate) takes it
as hydra.run.dir=DIR (default under runs/; evaluate: the run folder).

``polopt train --help`` lists the config groups and every key.
"""

from __future__ import annotations

import sys

COMMANDS = {  # name: what it does (its module is polopt/commands/NAME.py, see _command)
    "train": "train one loss on one task; Hydra overrides, see 'polopt train --help'",
    "losses": "list the registered losses with f'(0), f''(0) and their papers",
    "export": "write a built-in task out as a finite-task JSON file",
    "data": "check and summarise a preference-pair file (JSONL, CSV, Parquet, folder) without training",
    "sft": "train the tiny transformer on plain text; save it as a reference (task.reference_checkpoint)",
    "demo": "the end-to-end walk-through: SFT, sampled pairs, a biased judge, training, win-rates, plots",
    "compare": "several losses / methods on one task: one table and one plot",
    "reward": "fit a Bradley–Terry reward model to a task's pairs (method.reward=PATH optimises it)",
    "realign": "decoding-time realignment against retraining over a grid of lambda: table and plot",
    "checkpoints": "verify a run folder's checkpoints and show the resume point",
    "check": "unit-test a loss against the analytic optimum; exit code 1 on any failure",
    "evaluate": "a model=local_lm run's policy against its reference on held-out prompts: win-rate, lengths, examples",
}


def _command(name: str):
    """The ``main`` of command ``name``, imported only when it runs (torch loads in seconds); plain import
    statements, so that nothing is imported by a name read at run time."""
    if name == "train":
        from polopt.commands.train import main
    elif name == "losses":
        from polopt.commands.losses import main
    elif name == "export":
        from polopt.commands.export import main
    elif name == "data":
        from polopt.commands.data import main
    elif name == "sft":
        from polopt.commands.sft import main
    elif name == "demo":
        from polopt.commands.demo import main
    elif name == "compare":
        from polopt.commands.compare import main
    elif name == "reward":
        from polopt.commands.reward import main
    elif name == "realign":
        from polopt.commands.realign import main
    elif name == "checkpoints":
        from polopt.commands.checkpoints import main
    elif name == "evaluate":
        from polopt.commands.evaluate import main
    else:
        from polopt.commands.check import main
    return main


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if not argv or argv[0] in ("-h", "--help") or argv[0] not in COMMANDS:
        lines = ["usage: polopt COMMAND [ARGS ...]", "",
                 "Offline preference optimisation on small models, checked against exact optima.", "",
                 "commands:"]
        lines += [f"  {name:<11} {text}" for name, text in COMMANDS.items()]
        lines += ["", "'polopt COMMAND --help' explains each command."]
        known = not argv or argv[0] in ("-h", "--help")
        print("\n".join(lines), file=sys.stdout if known else sys.stderr)
        if not known:
            print(f"polopt: error: unknown command {argv[0]!r}", file=sys.stderr)
        return 0 if known else 2
    from polopt.commands.errors import run_command

    name = argv[0]
    if name == "train" and any(a in ("-h", "--help", "--hydra-help") for a in argv[1:]):
        from polopt.commands import runs  # Hydra's help without loading torch

        return runs.help_main(argv[1:])

    def command(args: list[str]) -> int:
        return _command(name)(args)

    hint = "the newest good checkpoint is kept: rerun the same command to resume" if name == "train" else ""
    return run_command(name, command, argv[1:], os_hint=hint)


if __name__ == "__main__":
    sys.exit(main())
