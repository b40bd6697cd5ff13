"""The shape of the code base, read from the source with ``ast`` (nothing is imported).

- No import cycle among the modules of polopt/ and toy_tasks/, counting imports inside
  functions (deferred imports) as well: a module reached from itself is a cycle.
- No function in polopt/ or toy_tasks/ is longer than 80 lines (``end_lineno - lineno + 1``).
- The training loop's module (polopt.training.loop) is imported by a handful of modules that run
  training; everything else takes its types from the contract modules.
- Dependencies point one way down the stages of DEVELOPERS.md's layout (:data:`STAGES`); at most five
  modules sit directly in polopt/, and every package's docstring says what it owns.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PACKAGES = ("polopt", "toy_tasks")
MAX_FUNCTION_LINES = 80
# the modules that run training (the composition root, `polopt check`, the walk-through, the methods)
TRAIN_IMPORTERS = {"polopt.commands.train", "polopt.checks.population", "polopt.demo.pipeline",
                   "polopt.methods.dispatch"}


def module_files() -> dict[str, Path]:
    """Dotted module name -> file, for every module of the two packages."""
    found = {}
    for package in PACKAGES:
        for path in sorted((ROOT / package).rglob("*.py")):
            parts = list(path.relative_to(ROOT).with_suffix("").parts)
            if parts[-1] == "__init__":
                parts = parts[:-1]
            found[".".join(parts)] = path
    return found


def imported_modules(name: str, path: Path, known: set[str]) -> set[str]:
    """The modules of ``known`` that ``name`` imports anywhere in its source (functions included).

    ``from a.b import c`` imports ``a.b.c`` when that is a module, else ``a.b``; a relative import
    is resolved against the module's package. A parent package imported implicitly (Python runs
    ``a/__init__`` before ``a.b``) is not an edge: that is how packages work, not a cycle of ours.
    """
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")[: len(package.split(".")) - node.level + 1]
                base = ".".join(anchor + ([base] if base else []))
            for alias in node.names:
                child = f"{base}.{alias.name}"
                found.add(child if child in known else base)
    return {m for m in found if m in known and m != name}


def import_graph() -> dict[str, set[str]]:
    files = module_files()
    return {name: imported_modules(name, path, set(files)) for name, path in files.items()}


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """The strongly connected components with more than one module (Tarjan, 1972), each sorted."""
    index, low, on_stack, stack, out = {}, {}, set(), [], []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                out.append(sorted(component))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def test_the_cycle_finder_finds_a_deferred_import_cycle(tmp_path):
    """The finder itself, on a made-up pair of modules whose cycle closes inside a function."""
    (tmp_path / "a.py").write_text("import b\n")
    (tmp_path / "b.py").write_text("def f():\n    from a import x\n")
    (tmp_path / "c.py").write_text("import a\n")
    known = {"a", "b", "c"}
    graph = {m: imported_modules(m, tmp_path / f"{m}.py", known) for m in known}
    assert graph == {"a": {"b"}, "b": {"a"}, "c": {"a"}}
    assert cycles(graph) == [["a", "b"]]


def test_no_import_cycles():
    found = cycles(import_graph())
    assert found == [], "import cycles (deferred imports count): " + "; ".join(" <-> ".join(c) for c in found)


@pytest.mark.parametrize("package", PACKAGES)
def test_no_function_is_longer_than_80_lines(package):
    long = {}
    for path in sorted((ROOT / package).rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                lines = node.end_lineno - node.lineno + 1
                if lines > MAX_FUNCTION_LINES:
                    long[f"{path.relative_to(ROOT).as_posix()} {node.name}"] = lines
    assert long == {}, f"functions over {MAX_FUNCTION_LINES} lines: {long}"


def test_the_training_loop_is_imported_only_by_the_modules_that_train():
    importers = {name for name, imported in import_graph().items() if "polopt.training.loop" in imported}
    assert importers <= TRAIN_IMPORTERS, f"import the types from polopt.training.contracts, polopt.pairs or " \
                                         f"polopt.training.optim instead: {sorted(importers - TRAIN_IMPORTERS)}"
    assert len(importers) <= 5


# The stages, lowest first: a module may import its own stage and the stages below it, never above
# (DEVELOPERS.md's layout). Tasks build on the library; the demo and the commands compose them.
STAGES = [
    ("polopt.losses", "polopt.data", "polopt.checkpoints", "polopt.parallel", "polopt.pairs", "polopt.groups"),
    ("polopt.models",),
    ("polopt.training",),
    ("polopt.methods", "polopt.checks", "polopt.testing"),
    ("polopt.pairfile", "toy_tasks"),
    ("polopt.demo",),
    ("polopt.commands", "polopt.__main__", "polopt"),
]


def stage_of(module: str) -> int:
    """The index in :data:`STAGES` of the longest prefix naming ``module``'s package."""
    best, rank = "", None
    for k, prefixes in enumerate(STAGES):
        for prefix in prefixes:
            if (module == prefix or module.startswith(prefix + ".")) and len(prefix) > len(best):
                best, rank = prefix, k
    assert rank is not None, f"{module} belongs to no stage: add its package to STAGES"
    return rank


def test_dependencies_point_one_way_down_the_stages():
    upward = sorted(f"{a} -> {b}" for a, imported in import_graph().items() for b in imported
                    if stage_of(b) > stage_of(a))
    assert upward == [], "imports that run up the stages: " + "; ".join(upward)


def test_at_most_five_modules_directly_in_polopt_and_every_package_says_what_it_owns():
    top = sorted(p.name for p in (ROOT / "polopt").glob("*.py") if p.name != "__init__.py")
    assert len(top) <= 5, top
    silent = []
    for package in PACKAGES:
        for init in sorted((ROOT / package).rglob("__init__.py")):
            if not ast.get_docstring(ast.parse(init.read_text(encoding="utf-8"))):
                silent.append(init.relative_to(ROOT).as_posix())
    assert silent == [], f"packages without a docstring saying what they own: {silent}"
