"""The shape of the house: no import cycles, rooms import downward only, private names stay home,
every docstring example runs, and README's Python example works.

The import graph is read from the source with ``ast`` (every ``import`` statement, also those inside
functions), so a lazy import cannot hide a cycle.
"""

from __future__ import annotations

import ast
import doctest
import importlib
import os
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = ROOT / "pipeline"

#: Rooms above the stages: a room may import only rooms of a lower rank (and any stage).
RANK = {"cli": 3, "__main__": 3, "tools": 2, "chain": 1}


def _module_name(path: Path) -> str:
    rel = path.relative_to(ROOT).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _modules() -> dict[str, Path]:
    return {_module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def _imports(path: Path, name: str, known: set[str]) -> set[str]:
    """Modules of the package that ``path`` imports (absolute and relative, anywhere in the file).

    ``from package import submodule`` counts as an import of the submodule only.
    """
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            subs = {f"{mod}.{a.name}" for a in node.names} & known
            found.update(subs)
            if len(subs) < len(node.names):
                found.add(mod)
    return {m for m in found if m == "pipeline" or m.startswith("pipeline.")}


def _graph() -> dict[str, set[str]]:
    mods = _modules()
    graph = {}
    for name, path in mods.items():
        graph[name] = {m for m in _imports(path, name, set(mods)) if m in mods and m != name}
    return graph


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan), each a cycle or several."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on: set[str] = set()
    out: list[list[str]] = []
    counter = [0]

    def visit(v: str) -> None:
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in graph[v]:
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                out.append(sorted(comp))

    for v in graph:
        if v not in index:
            visit(v)
    return out


def test_the_cycle_finder_finds_a_cycle():
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert _cycles({"a": {"b"}, "b": set()}) == []


def test_no_import_cycles_in_the_package():
    graph = _graph()
    assert len(graph) > 50  # the walk found the package
    assert _cycles(graph) == []


def _room(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else ""


def test_rooms_import_downward_only():
    bad = []
    for mod, deps in _graph().items():
        rank = RANK.get(_room(mod), 0)
        for dep in deps:
            if dep == "pipeline":
                continue
            if RANK.get(_room(dep), 0) > rank:
                bad.append(f"{mod} imports {dep}")
    assert bad == []


def test_nothing_outside_the_chain_reaches_into_its_private_names():
    private = re.compile(r"pipeline\.chain\._[a-z]|from pipeline\.chain import [^\n]*\b_[a-z]")
    offenders = []
    for path in [*PACKAGE.rglob("*.py"), *(ROOT / "bench").glob("*.py")]:
        if PACKAGE / "chain" in path.parents:
            continue
        for i, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            if private.search(line):
                offenders.append(f"{path.relative_to(ROOT)}:{i}: {line.strip()}")
    assert offenders == []


def _doctest_modules() -> list[str]:
    names = []
    for name, path in _modules().items():
        if name.endswith("__main__") or ">>>" not in path.read_text(encoding="utf-8"):
            continue
        names.append(name)
    return names


@pytest.mark.parametrize("module", _doctest_modules())
def test_docstring_examples_run(module, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # examples that write files write here
    mod = importlib.import_module(module)
    finder = doctest.DocTestFinder(exclude_empty=True)
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    tests = [t for t in finder.find(mod, module) if t.examples]
    assert tests, f"{module} mentions '>>>' but has no runnable example"
    for t in tests:
        runner.run(t)
    result = runner.summarize(verbose=False)
    assert result.failed == 0, f"{result.failed} of {result.attempted} examples failed in {module}"


def test_readme_python_example_runs(tmp_path, monkeypatch):
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```python\n(.*?)```", text, flags=re.S)
    assert blocks, "README.md has no Python example"
    monkeypatch.chdir(tmp_path)
    for block in blocks:
        exec(compile(block, "README.md", "exec"), {"__name__": "__readme__"})  # noqa: S102
    assert os.listdir(tmp_path)  # the example wrote its output folder here


def _third_party_imports() -> set[str]:
    import sys

    names = set()
    for path in PACKAGE.rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                names.update(a.name.split(".")[0] for a in node.names)
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                names.add(node.module.split(".")[0])
    return {n for n in names if n not in sys.stdlib_module_names and n not in ("pipeline", "__future__")}


def test_runtime_dependencies_are_what_the_package_imports():
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10: tomli, a runtime dependency there
        import tomli as tomllib

    project = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["project"]

    def name(req: str) -> str:
        return re.split(r"[<>=;\[ ]", req, maxsplit=1)[0].strip().lower().replace("-", "_")

    runtime = {name(r) for r in project["dependencies"]}
    extras = {name(r) for reqs in project["optional-dependencies"].values() for r in reqs}
    imported = _third_party_imports()
    # every import is declared (dask only in its extra: `downlink batch` imports it on demand) ...
    assert imported - runtime <= {"dask"} and "dask" in extras
    # ... and every runtime dependency is imported by the package
    assert runtime == imported - {"dask"}
