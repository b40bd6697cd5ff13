"""The configuration every command reads: the config folder (conf/) and the ``key=value`` overrides of the
command line, checked before Hydra sees them."""

from __future__ import annotations

from pathlib import Path

CONFIG_DIR = Path(__file__).resolve().parents[1] / "conf"  # an installed package: polopt/conf
if not CONFIG_DIR.is_dir():  # a source checkout or editable install: conf/ beside the package
    CONFIG_DIR = Path(__file__).resolve().parents[2] / "conf"

_GROUPS = ("loss", "task", "model", "optim", "method")


def group_options(group: str) -> list[str]:
    return sorted(p.stem for p in (CONFIG_DIR / group).glob("*.yaml"))


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
        if eq and key in _GROUPS and "," not in value:
            options = group_options(key)
            if key == "loss" and ":" in value:
                out += ["loss=custom", f"loss.name={value}"]
                continue
            if value not in options:
                hint = "; or a dotted path pkg.module:name" if key == "loss" else ""
                raise ValueError(f"unknown {key} {value!r}; choose one of: {', '.join(options)}{hint}")
        out.append(arg)
    return out
