"""The configuration every command reads: the config folder (conf/), the ``key=value`` overrides of the
command line checked against the composed config before Hydra runs (one line per mistake), and the one
place a task is built from config, by an allow-listed ``_target_``.

Configuration never executes code: a task's ``_target_`` must name a builder in :data:`TASK_PACKAGES`,
no other ``_target_`` is allowed outside Hydra's own ``hydra.*`` settings (which may name only Hydra's
classes and the launcher and sweeper plugins Hydra finds installed, e.g. ``hydra/launcher=joblib``,
``hydra/sweeper=optuna``, with the Optuna sweeper's sampler), and a user loss comes only from
``loss.name=pkg.module:name``.
"""

from __future__ import annotations

import difflib
import itertools
from pathlib import Path

CONFIG_DIR = Path(__file__).resolve().parents[1] / "conf"  # an installed package: polopt/conf
if not CONFIG_DIR.is_dir():  # a source checkout or editable install: conf/ beside the package
    CONFIG_DIR = Path(__file__).resolve().parents[2] / "conf"

TASK_RUN_KEYS = ("mode", "n_pairs", "feedback", "group_size")  # task keys for the run, not for the task's builder
TASK_PACKAGES = ("toy_tasks.", "polopt.")  # where a task's _target_ may point
HYDRA_PACKAGES = ("hydra.",)  # where a _target_ under hydra.* (launcher, sweeper) may point
SAMPLER_PACKAGES = ("optuna.samplers.",)  # where hydra.sweeper.sampler._target_ may point (the Optuna sweeper)


def groups() -> list[str]:
    """The config groups: the folders of conf/ (loss, task, model, optim, method, experiment)."""
    return sorted(p.name for p in CONFIG_DIR.iterdir() if p.is_dir() and p.name != "hydra")


def group_options(group: str) -> list[str]:
    return sorted(p.stem for p in (CONFIG_DIR / group).glob("*.yaml"))


def _check_option(group: str, value: str) -> None:
    if group == "loss" and ":" in value:
        return
    options = group_options(group)
    if value not in options:
        hint = "; or a dotted path pkg.module:name" if group == "loss" else ""
        raise ValueError(f"unknown {group} {value!r}; choose one of: {', '.join(options)}{hint}")


def rewrite_overrides(args: list[str]) -> list[str]:
    """Check ``group=option`` overrides before Hydra sees them, so that a typo gets one
    line listing the options, and turn ``loss=pkg.module:name`` into
    ``loss=custom loss.name=pkg.module:name``. With a loss of the user's own, ``loss.KEY=VALUE``
    sets a keyword parameter of that function (conf/loss/custom.yaml lists none: Hydra's
    ``+loss.KEY`` adds it)."""
    custom = any(a.startswith("loss=") and (":" in a or a == "loss=custom") for a in args)
    out = []
    for arg in args:
        key, eq, value = arg.partition("=")
        if custom and eq and key.startswith("loss.") and key not in ("loss.name", "loss.smoothing"):
            out.append(f"+{arg}")  # a parameter of the user's function, e.g. loss.weight=1.0
            continue
        group = key.lstrip("+")
        if eq and group in groups() and "," not in value:
            _check_option(group, value)
            if group == "loss" and ":" in value:
                out += ["loss=custom", f"loss.name={value}"]
                continue
        out.append(arg)
    return out


OUTPUT_KEY = "hydra.run.dir"  # where every command that writes a folder writes it, as polopt train takes it


def output_folder(overrides: list[str], command: str, default: str | None) -> tuple[Path | None, list[str]]:
    """The folder ``command`` writes: ``hydra.run.dir=DIR`` (the key polopt train takes), else ``default``
    under runs/ with the date and time (``runs/DEFAULT/DATE/TIME``; None: no folder given, the caller's
    own choice); and the other overrides. Any other ``hydra`` key is refused in one line: only polopt
    train runs under Hydra's own launcher."""
    import time

    folder, rest = None, []
    for arg in overrides:
        key, eq, value = arg.partition("=")
        bare = key.lstrip("+~")
        if bare == OUTPUT_KEY:
            if not eq or not value.strip():
                raise ValueError(f"{command}: {OUTPUT_KEY} needs a folder, e.g. {OUTPUT_KEY}=runs/mine")
            folder = Path(value)
        elif bare.startswith(("hydra.", "hydra/")):
            raise ValueError(f"{command} takes {OUTPUT_KEY}=DIR (its output folder) and no other hydra key; "
                             f"{arg!r} would change nothing here")
        else:
            rest.append(arg)
    if folder is None and default is not None:
        folder = Path("runs") / default / time.strftime("%Y-%m-%d/%H-%M-%S")
    return folder, rest


def only_keys(overrides: list[str], prefixes: tuple[str, ...], command: str) -> None:
    """Refuse a ``key=value`` that ``command`` would not read (its keys start with one of ``prefixes``,
    or equal one without the trailing dot)."""
    for arg in overrides:
        key = arg.partition("=")[0].lstrip("+~")
        if not any(key == p or p.endswith(".") and key.startswith(p) for p in prefixes):
            keys = ", ".join(f"{p}KEY" if p.endswith(".") else p for p in prefixes)
            raise ValueError(f"{command} reads {keys} only; {arg!r} would change nothing here")


def _parse(overrides: list[str]) -> list:
    from hydra.core.override_parser.overrides_parser import OverridesParser
    from hydra.errors import OverrideParseException

    parsed = []
    for arg in overrides:
        try:
            parsed += OverridesParser.create().parse_overrides([arg])
        except OverrideParseException as err:
            raise ValueError(f"cannot read {arg!r}: write key=value (a value with spaces or commas in quotes: "
                             f"key='a, b'); {' '.join(str(err).split()[:12])}") from None
    return parsed


def _values(override) -> list[str]:
    """The values of one override, a sweep's listed one by one (an interval sweep's two ends: a tuned sweep
    draws its values inside, so the ends are what can be checked before it runs)."""
    from hydra.core.override_parser.types import IntervalSweep

    if isinstance(override.value(), IntervalSweep):
        return [str(override.value().start), str(override.value().end)]
    if override.is_sweep_override():
        return [str(v) for v in override.sweep_string_iterator()]
    return [override.get_value_element_as_str()] if not override.is_delete() else []


def _keys(node, prefix: str = "") -> list[str]:
    """Every dotted leaf key of a config container (a group's own folder, e.g. ``optim``, is not a leaf)."""
    out = []
    for key, value in node.items():
        if isinstance(value, dict) and value:
            out += _keys(value, f"{prefix}{key}.")
        else:
            out.append(f"{prefix}{key}")
    return out


def _has_key(container: dict, dotted: str) -> bool:
    node = container
    for part in dotted.split("."):
        if not isinstance(node, dict) or part not in node:
            return False
        node = node[part]
    return True


def unknown_key_message(key: str, known: list[str]) -> str:
    """``unknown key 'train.stepz'; did you mean train.steps?`` (difflib's nearest keys, whole or by their last
    part), or the keys beside it when nothing is near. Never advises adding the typo as a new key."""
    pool = [k for k in known if k.startswith("hydra.") == key.startswith("hydra.")]
    near = difflib.get_close_matches(key, pool, n=3, cutoff=0.75)
    if not near:
        leaf = key.rpartition(".")[2]
        near = [k for k in pool if k.rpartition(".")[2] in difflib.get_close_matches(leaf, [
            p.rpartition(".")[2] for p in pool], n=3, cutoff=0.75)][:3]
    if near:
        return f"unknown key {key!r}; did you mean {' or '.join(near)}?"
    parent = key.rpartition(".")[0]
    beside = sorted({k for k in pool if k.startswith(f"{parent}.")} if parent else {k.partition(".")[0] for k in pool})
    if not beside:
        beside = sorted({k.partition(".")[0] for k in pool})
    where = f"under {parent}" if parent and f"{parent}." in "".join(beside) else "at the top"
    return f"unknown key {key!r}; the keys {where} are: {', '.join(beside)}"


def hydra_plugins() -> set[str]:
    """The dotted names of the launcher and sweeper plugins Hydra finds installed (its own included)."""
    from hydra.core.plugins import Plugins
    from hydra.plugins.launcher import Launcher
    from hydra.plugins.sweeper import Sweeper

    found = Plugins.instance()
    return {f"{cls.__module__}.{cls.__name__}" for kind in (Launcher, Sweeper) for cls in found.discover(kind)}


def _hydra_target(path: str, target) -> bool:
    """Whether ``target`` may stand at ``path`` under ``hydra``: Hydra's own classes, an installed launcher or
    sweeper plugin at hydra.launcher / hydra.sweeper, an Optuna sampler at hydra.sweeper.sampler."""
    target = str(target)
    if target.startswith(HYDRA_PACKAGES):
        return True
    if path in ("hydra.launcher", "hydra.sweeper"):
        return target in hydra_plugins()
    return path == "hydra.sweeper.sampler" and target.startswith(SAMPLER_PACKAGES)


def check_targets(container: dict, where: str = "") -> None:
    """Refuse any ``_target_`` a config could use to run code: only ``task._target_`` (a builder in
    :data:`TASK_PACKAGES`) and, under ``hydra.*``, Hydra's own classes and installed launcher and sweeper
    plugins (see :func:`_hydra_target`)."""
    stack = [(where, container)]
    while stack:
        path, node = stack.pop()
        if isinstance(node, dict):
            target = node.get("_target_")
            if path == "task":
                if not isinstance(target, str) or not target.startswith(TASK_PACKAGES):
                    raise ValueError(f"task._target_ must name a task builder in "
                                     f"{' or '.join(p[:-1] for p in TASK_PACKAGES)}, got {target!r}; "
                                     "a loss of your own goes in loss.name=pkg.module:name")
            elif "_target_" in node and path.startswith("task."):
                raise ValueError(f"task: a nested _target_ ({target!r}) is not allowed; task keys hold data only")
            elif "_target_" in node and not (path.startswith("hydra") and _hydra_target(path, target)):
                raise ValueError(f"{path or 'the config'}: a _target_ ({target!r}) is not allowed here; "
                                 "config keys hold data only (a task's builder goes in task._target_)")
            stack += [(f"{path}.{k}" if path else str(k), v) for k, v in node.items() if k != "_target_"]
        elif isinstance(node, list):
            stack += [(f"{path}[{i}]", v) for i, v in enumerate(node)]


def _combinations(parsed: list, sweep: bool, command: str = "polopt train") -> list[list[str]]:
    """Every combination of the overrides (a sweep's values one by one), checking comma lists and options."""
    axes = []
    for override in parsed:
        key = override.get_key_element()
        if override.is_sweep_override() and not sweep:
            line = override.input_line
            how = f"to sweep over them, add -m ({command} -m {line})" if command == "polopt train" else \
                f"{command} takes one value a key (polopt train -m and polopt compare sweep over lists)"
            raise ValueError(f"{line!r} is a list of values: {how}; to give a list as one value, write "
                             f"{key.lstrip('+~')}=[{line.partition('=')[2]}]")
        group = override.key_or_group
        values = _values(override)
        if group in groups() and not override.is_delete():
            for value in values:
                _check_option(group, value)
        axes.append([f"{key}={v}" for v in values] if values else [key])
    return [list(c) for c in itertools.product(*axes)]


def _group_key_message(key: str, container: dict) -> str | None:
    """For ``loss.delta`` under ``loss=logistic``: the chosen option's keys and the options that have it."""
    from omegaconf import OmegaConf

    group, _, rest = key.partition(".")
    choice = container.get("hydra", {}).get("runtime", {}).get("choices", {}).get(group)
    if group not in groups() or not rest or choice is None or "." in rest:
        return None
    having = [o for o in group_options(group) if rest in OmegaConf.load(CONFIG_DIR / group / f"{o}.yaml")]
    if not having:
        return None
    own = ", ".join(k for k in container[group] if k != "_target_")
    return (f"{group}={choice} has no key {rest!r} (its keys: {own}); {rest} belongs to "
            f"{', '.join(f'{group}={o}' for o in having)}: choose it first, e.g. {group}={having[0]} {key}=...")


def _check_keys(parsed: list, container: dict) -> None:
    known = _keys(container)
    for override in parsed:
        key = override.key_or_group
        if override.is_add() or override.is_force_add() or "/" in key or key in groups() or key.startswith("hydra/"):
            continue
        if not _has_key(container, key):
            raise ValueError(_group_key_message(key, container) or unknown_key_message(key, known))


def compose(overrides: list[str], *, command: str = "polopt train"):
    """The config of ``polopt train OVERRIDES`` (see :func:`compose_all`), without Hydra's settings."""
    from omegaconf import OmegaConf

    cfg = compose_all(overrides, command=command)[0]
    return OmegaConf.masked_copy(cfg, [k for k in cfg if k != "hydra"])


def compose_all(overrides: list[str], *, sweep: bool = False, command: str = "polopt train") -> list:
    """The configs of ``polopt train OVERRIDES`` (conf/config.yaml composed by Hydra's compose API, with
    Hydra's own settings under ``hydra``), every override checked first: a mistake is one ValueError line.
    ``sweep``: comma lists are allowed (``-m``) and give one config per combination."""
    from hydra import compose as hydra_compose
    from hydra import initialize_config_dir
    from omegaconf import OmegaConf

    combos = _combinations(_parse(overrides), sweep, command)
    configs = []
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        bases = {}
        for combo in combos:
            rewritten = rewrite_overrides(combo)
            choices = tuple(a for a in rewritten  # group choices, Hydra's own (hydra/launcher=...) included
                            if a.partition("=")[0].lstrip("+") in groups() or a.lstrip("+").startswith("hydra/"))
            if choices not in bases:
                bases[choices] = OmegaConf.to_container(hydra_compose("config", overrides=list(choices),
                                                                      return_hydra_config=True))
            _check_keys(_parse(rewritten), bases[choices])
            cfg = hydra_compose("config", overrides=rewritten, return_hydra_config=True)
            check_targets(OmegaConf.to_container(cfg))
            configs.append(cfg)
    return configs


def build_task(cfg):
    """The task object from the ``task`` group, by its allow-listed ``_target_`` (see :func:`check_targets`);
    the one place any command builds a task."""
    from hydra.utils import instantiate
    from omegaconf import OmegaConf

    builder = {k: v for k, v in OmegaConf.to_container(cfg, resolve=True).items() if k not in TASK_RUN_KEYS}
    check_targets({"task": builder})
    try:
        return instantiate(builder, _convert_="all", _recursive_=False)
    except Exception as err:  # Hydra wraps the builder's own error; show the builder's words
        cause = err.__cause__ or err
        if isinstance(cause, (ValueError, TypeError)):
            raise ValueError(str(cause)) from err
        raise
