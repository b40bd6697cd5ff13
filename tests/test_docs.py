"""The front door and the docs: short, linked, and every short command runs as written.

- README.md is under 250 lines and carries the job paragraph, the two quick-start commands and the
  cautions the project promises (a toy-task result certifies maths, not a deployed model; a model
  judge is biased; defer to the deploying organisation).
- Every relative link of README.md and docs/ names a file that exists.
- Every ```bash block in README.md and docs/ runs as written, as one script, from a fresh folder that
  holds the repository's examples/ (the ```python blocks that start with ``# NAME.py`` written beside
  it, as a reader would save them), one block after the other, and exits 0; the long lines (several
  processes, an install) are listed in :data:`LONG` with the test that covers them. ``python`` and
  ``polopt`` are the ones beside the interpreter running the tests.
- Every config key of conf/ is in docs/reference/configuration.md.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PAGES = [ROOT / "README.md", *sorted((ROOT / "docs").rglob("*.md"))]
# commands of the docs not run here, and where they are tested instead
LONG = {
    "python3.11 -m venv": "the quick start's installs: .ci/run runs the second in a fresh environment",
    "torchrun": "several processes: tests/parallel/test_distributed.py and test_fsdp.py",
    "python bench/": "a benchmark (minutes of measuring): tests/test_bench*.py run the benches on small sizes",
    "PYTHONPATH=. python bench/": "a benchmark, as above",
}


def blocks(page: Path, language: str) -> list[str]:
    return re.findall(rf"```{language}\n(.*?)```", page.read_text(encoding="utf-8"), re.S)


def test_the_readme_is_a_front_door():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    assert len(text.splitlines()) < 250
    assert "pip install torch==2.13.0" in text and "python -m pytest" in text
    cautions = text.split("## Cautions", 1)[1]
    assert "certifies a loss's mathematics" in cautions and "model judge is biased" in cautions
    assert "defer to the deploying organisation" in cautions


@pytest.mark.parametrize("page", PAGES, ids=lambda p: p.relative_to(ROOT).as_posix())
def test_every_relative_link_names_a_file(page):
    text = page.read_text(encoding="utf-8")
    missing = [target for target in re.findall(r"\]\(([^)#\s]+)(?:#[^)]*)?\)", text)
               if "://" not in target and not (page.parent / target).exists()]
    assert missing == []


# a page whose commands continue another's (the evaluation reads the runs the training page made)
FOLLOWS = {"evaluate-your-model.md": "your-own-model.md"}


def scripts(page: Path) -> list[str]:
    """``page``'s bash blocks as scripts, without the lines of :data:`LONG`."""
    out = []
    for block in blocks(page, "bash"):
        lines = [line for line in block.splitlines() if not any(line.startswith(prefix) for prefix in LONG)]
        if any(line.strip() for line in lines):
            out.append("\n".join(lines))
    return out


def _run_page(page: Path, folder: Path, env: dict) -> None:
    """Save the page's ``# NAME.py`` blocks beside its commands, then run each bash block, stopping at the
    first command that fails (``set -e``)."""
    for block in blocks(page, "python"):
        name = re.match(r"# (\w+\.py)\n", block)
        if name:
            (folder / name.group(1)).write_text(block, encoding="utf-8")
    for script in scripts(page):
        done = subprocess.run(["bash", "-e", "-c", script], cwd=folder, env=env, capture_output=True, text=True,
                              timeout=900)
        assert done.returncode == 0, f"{page.name}:\n{script}\n{done.stdout[-2000:]}\n{done.stderr[-2000:]}"


@pytest.mark.slow
@pytest.mark.parametrize("page", [p for p in PAGES if scripts(p) and p.name not in FOLLOWS.values()],
                         ids=lambda p: p.relative_to(ROOT).as_posix())  # a continued page runs with its sequel
def test_every_short_command_runs_as_written(page, tmp_path):
    (tmp_path / "examples").symlink_to(ROOT / "examples")
    bin_dir = Path(sys.executable).parent  # polopt's console script and python beside this interpreter
    env = {**os.environ, "PATH": f"{bin_dir}{os.pathsep}{os.environ['PATH']}", "TQDM_DISABLE": "1",
           "PYTHONPATH": str(ROOT)}
    env.pop("POLOPT_DEBUG", None)
    if page.name in FOLLOWS:
        _run_page(page.parent / FOLLOWS[page.name], tmp_path, env)
    _run_page(page, tmp_path, env)


def test_every_config_key_is_in_the_configuration_reference():
    from omegaconf import OmegaConf

    reference = (ROOT / "docs" / "reference" / "configuration.md").read_text(encoding="utf-8")

    def leaves(node, prefix=""):
        for key, value in node.items():
            if key in ("defaults", "hydra", "_target_"):
                continue
            if isinstance(value, dict) and value:
                yield from leaves(value, f"{prefix}{key}.")
            else:
                yield f"{prefix}{key}"

    conf = ROOT / "conf"
    keys = set(leaves(OmegaConf.to_container(OmegaConf.load(conf / "config.yaml"))))
    for group in ("loss", "task", "model", "optim", "method"):
        for option in (conf / group).glob("*.yaml"):
            keys |= {f"{group}.{k}" for k in leaves(OmegaConf.to_container(OmegaConf.load(option)))
                     if k not in ("name", "kind")}
    missing = sorted(k for k in keys if f"`{k}`" not in reference)
    assert missing == [], f"keys without a row in docs/reference/configuration.md: {missing}"
