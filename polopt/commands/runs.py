"""The run folders of ``polopt train``: planned before Hydra runs, left behind only by runs that trained.

:func:`plan` checks the command line (:func:`polopt.commands.config.compose_all`) and fixes the run
folder (or a sweep's folder) once, so that Hydra and this module name the same path and know whether
this command created it; :func:`discard` removes a folder this command created for a run refused
before training (no ``metrics.jsonl``, no checkpoint); :func:`record` and :func:`sweep_table` give a
sweep (``-m``) one table of all its runs, named by their overrides (``hydra.sweep.subdir``).
"""

from __future__ import annotations

import json
import shutil
from dataclasses import dataclass, field
from pathlib import Path

from polopt.commands import config

# summary keys a sweep's table shows, where some run has them (the rest stay in each summary.json)
SWEEP_COLUMNS = ("tv_to_optimum", "tv_to_equilibrium", "reached_optimum", "loss_gap", "kl_to_reference",
                 "win_rate_over_reference", "expected_reward", "pair_accuracy", "steps", "seconds")
_HELP_FLAGS = ("-h", "--help", "--hydra-help", "--info", "-i", "--shell-completion", "-sc")


@dataclass
class Plan:
    argv: list[str]  # what Hydra is given: the user's arguments, the folder pinned
    multirun: bool = False
    folder: Path | None = None  # the run folder, or a sweep's folder
    created: Path | None = None  # the topmost folder this command creates (None: the folder exists already)
    configs: list = field(default_factory=list)  # every run's composed config (Hydra's settings under hydra)
    records: list[tuple[list[str], Path, dict]] = field(default_factory=list)  # (overrides, folder, summary)


_CURRENT = Plan(argv=[])


def wants_help(argv: list[str]) -> bool:
    return any(a in _HELP_FLAGS for a in argv)


def help_main(argv: list[str]) -> int:
    """``polopt train --help`` (Hydra's help with conf/hydra/help/polopt.yaml) without loading the kit."""
    import sys

    import hydra

    @hydra.main(version_base="1.3", config_path=str(config.CONFIG_DIR), config_name="config")
    def _show(cfg) -> None:  # never called: Hydra prints the help and exits
        pass

    sys.argv = ["polopt train", *argv]
    try:
        _show()
    except SystemExit as stop:
        return int(stop.code or 0)
    return 0


def _quoted(path: Path) -> str:
    text = str(path)
    return f"'{text}'" if "'" not in text else text


def _topmost_missing(folder: Path) -> Path | None:
    created = None
    for candidate in (folder, *folder.parents):
        if candidate.exists():
            break
        created = candidate
    return created


def plan(argv: list[str]) -> Plan:
    """Check ``polopt train ARGV`` and fix its folder; a mistake raises one ValueError line."""
    global _CURRENT
    from hydra._internal.utils import get_args_parser
    from hydra.core.hydra_config import HydraConfig

    args = get_args_parser().parse_args(argv)
    if args.config_path or args.config_name or args.config_dir:
        raise ValueError("polopt train reads the kit's own config folder; give settings as key=value "
                         "(or +experiment=NAME), not --config-path, --config-name or --config-dir")
    multirun = bool(args.multirun)
    for arg in args.overrides:
        if arg.partition("=")[0].lstrip("+~").partition(".")[0] == "reward":
            raise ValueError(f"polopt train does not read the reward block ({arg!r} would change nothing here): it "
                             "configures polopt reward; train against a fitted model with method.reward=PATH")
    configs = config.compose_all(args.overrides, sweep=multirun)
    argv = [a for a in argv if a not in args.overrides] + config.rewrite_overrides(args.overrides)
    if args.cfg or args.info or args.resolve:  # Hydra prints the config; nothing is run or written
        _CURRENT = Plan(argv=argv, configs=configs)
        return _CURRENT
    key = "hydra.sweep.dir" if multirun else "hydra.run.dir"
    HydraConfig.instance().set_config(configs[0])
    folder = Path(str(configs[0].hydra.sweep.dir if multirun else configs[0].hydra.run.dir))
    given = any(o.lstrip("+").startswith(f"{key}=") for o in args.overrides)
    pinned = list(argv) if given else [*argv, f"{key}={_quoted(folder)}"]
    _CURRENT = Plan(argv=pinned, multirun=multirun, folder=folder, created=_topmost_missing(folder),
                    configs=configs)
    return _CURRENT


def _trained(run_dir: Path) -> bool:
    return (run_dir / "metrics.jsonl").exists() or (run_dir / "checkpoints").exists()


def discard(run_dir: Path) -> None:
    """Remove ``run_dir`` (and the empty folders above it that this command created) when this command
    created it and the run never trained; a folder that existed before is never touched."""
    created = _CURRENT.created
    run_dir = Path(run_dir)
    if created is None or _trained(run_dir) or not run_dir.resolve().is_relative_to(created.resolve()):
        return
    shutil.rmtree(run_dir, ignore_errors=True)
    for folder in (run_dir, *run_dir.parents):
        if folder.exists() and {p.name for p in folder.iterdir()} - {"multirun.yaml"}:
            break
        shutil.rmtree(folder, ignore_errors=True)
        if folder.resolve() == created.resolve():
            break


def record(overrides: list[str], run_dir: Path, summary: dict) -> None:
    """One finished run of this command (a sweep's table row) and its command-line overrides."""
    _CURRENT.records.append((list(overrides), Path(run_dir), summary))


def collect(folder: Path) -> list[tuple[list[str], Path, dict]]:
    """The finished runs under a sweep's ``folder`` in Hydra's job order: each run folder's overrides (its
    ``.hydra/overrides.yaml``, which Hydra writes) and its summary.json. A launcher that runs jobs in other
    processes (``hydra/launcher=joblib``, submitit) leaves :func:`record` of this process empty."""
    from omegaconf import OmegaConf

    found = []
    for path in folder.rglob("summary.json"):
        hydra_dir = path.parent / ".hydra"
        if not (hydra_dir / "overrides.yaml").exists():
            continue
        overrides = [str(o) for o in OmegaConf.load(hydra_dir / "overrides.yaml")]
        number = int(OmegaConf.load(hydra_dir / "hydra.yaml").hydra.job.num)
        found.append((number, overrides, path.parent, json.loads(path.read_text(encoding="utf-8"))))
    return [(overrides, run_dir, summary) for _, overrides, run_dir, summary in sorted(found, key=lambda r: r[0])]


def check_sweep(cfg) -> None:
    """``sweep.objective`` and ``sweep.target`` are read by a tuned sweep (``-m hydra/sweeper=optuna``)
    only; elsewhere they would change nothing, so they are refused."""
    objective, target = cfg.sweep.objective, cfg.sweep.target
    tuned = "optuna" in str(cfg.hydra.sweeper.get("_target_", "")).lower()
    if objective is None and target is not None:
        raise ValueError(f"sweep.target={target} needs sweep.objective, the summary.json key to bring to it "
                         "(e.g. sweep.objective=kl_to_reference)")
    if objective is not None and not tuned:
        raise ValueError(f"sweep.objective={objective} is read by a tuned sweep only: polopt train -m "
                         "hydra/sweeper=optuna ... sweep.objective=KEY")
    if tuned and objective is None:
        raise ValueError("a tuned sweep (hydra/sweeper=optuna) needs sweep.objective, the summary.json key it "
                         "minimises (e.g. sweep.objective=kl_to_reference; with sweep.target=VALUE: |value - target|)")


def sweep_objective(cfg, summary: dict) -> float | None:
    """What a tuned sweep minimises for one run: ``summary[sweep.objective]``, or its distance to
    ``sweep.target``; None when no objective is set (Hydra's other sweepers read no return value)."""
    key, target = cfg.sweep.objective, cfg.sweep.target
    if key is None:
        return None
    value = summary.get(key)
    if not isinstance(value, (int, float)) or isinstance(value, bool):
        numeric = sorted(k for k, v in summary.items() if isinstance(v, (int, float)) and not isinstance(v, bool))
        raise ValueError(f"sweep.objective must name a numeric key of summary.json ({', '.join(numeric)}); "
                         f"got {key!r} ({value!r} in this run)")
    return float(value) if target is None else abs(float(value) - float(target))


def best_line(folder: Path) -> str | None:
    """The Optuna sweeper's best trial (its ``optimization_results.yaml`` in the sweep's folder), one line."""
    from omegaconf import OmegaConf

    path = folder / "optimization_results.yaml"
    if not path.exists():
        return None
    results = OmegaConf.to_container(OmegaConf.load(path))
    params = " ".join(f"{k}={v}" for k, v in results.get("best_params", {}).items())
    return f"best: {params} (sweep objective {results.get('best_value')})"


def _plain(value):
    """JSON's values: NaN and inf become null (as in summary.json)."""
    if isinstance(value, float) and (value != value or value in (float("inf"), float("-inf"))):
        return None
    return value if isinstance(value, (str, int, float, bool, type(None))) else str(value)


def _cell(value) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    return "-" if value is None else str(value)


def sweep_table(current: Plan | None = None) -> str:
    """One table of a sweep's runs (their overrides, then :data:`SWEEP_COLUMNS` where some run has them);
    written to ``runs.txt`` and ``runs.json`` in the sweep's folder."""
    current = current or _CURRENT
    records = current.records
    if not records and current.folder is not None and current.folder.is_dir():  # jobs ran in other processes
        records = collect(current.folder)
    columns = [c for c in SWEEP_COLUMNS if any(c in s for _, _, s in records)]
    common = set.intersection(*(set(o) for o, _, _ in records)) if records else set()
    names = [" ".join(o for o in overrides if o not in common) or " ".join(overrides) or "(defaults)"
             for overrides, _, _ in records]
    rows = [[name, *(_cell(s.get(c)) for c in columns)] for name, (_, _, s) in zip(names, records, strict=True)]
    header = ["run", *columns]
    widths = [max(len(r[i]) for r in [header, *rows]) for i in range(len(header))]
    lines = ["  ".join(cell.ljust(w) for cell, w in zip(row, widths, strict=True)).rstrip()
             for row in [header, *rows]]
    text = "\n".join([lines[0], "  ".join("-" * w for w in widths), *lines[1:]])
    if current.folder is not None and current.folder.is_dir():
        (current.folder / "runs.txt").write_text(text + "\n", encoding="utf-8")
        data = [{"run": name, "overrides": o, "folder": str(folder), **{c: _plain(s.get(c)) for c in columns}}
                for name, (o, folder, s) in zip(names, records, strict=True)]
        (current.folder / "runs.json").write_text(json.dumps(data, indent=1) + "\n", encoding="utf-8")
    best = best_line(current.folder) if current.folder is not None else None
    text = text if best is None else f"{text}\n{best}"
    return f"{text}\nsweep folder: {current.folder} ({len(rows)} runs; runs.txt, runs.json)"
