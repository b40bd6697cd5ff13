"""The installed package carries every module and config file (pyproject.toml lists packages explicitly)."""

import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def test_every_python_package_is_listed_in_pyproject():
    listed = set(tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"])
    found = {str(p.parent.relative_to(ROOT)).replace("/", ".")
             for top in ("polopt", "toy_tasks") for p in (ROOT / top).rglob("__init__.py")}
    assert found <= listed, f"add {sorted(found - listed)} to [tool.setuptools] packages"


def test_config_files_are_shipped_as_package_data():
    cfg = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    assert cfg["package-dir"]["polopt.conf"] == "conf"
    depth = max(len(p.relative_to(ROOT / "conf").parts) for p in (ROOT / "conf").rglob("*.yaml"))
    patterns = cfg["package-data"]["polopt.conf"]
    assert len(patterns) >= depth, "conf/ is deeper than the package-data patterns reach"
