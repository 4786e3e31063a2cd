"""The architecture's import rules, checked on the source of every module of the package.

Every ``import`` statement is read with :mod:`ast` (at module level and inside functions, since a
deferred import still ties two modules together), mapped to the module it loads, and checked:

- no cycle between modules of ``swathmill``;
- the engine (``swathmill.tiles``) never imports the science side (``swathmill.workflows``);
- the science modules (``methods``, ``inputs``, ``spectral``) never import the application layer
  (``swathmill.workflows.app``);
- nothing imports the old top-level names ``tiles`` or ``workflows``.
"""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

# source folder -> the package it is installed as (pyproject.toml, [tool.setuptools.package-dir])
PACKAGE_DIRS = {"workflows/_package": "swathmill", "tiles": "swathmill.tiles", "workflows": "swathmill.workflows"}

__all__: list[str] = []


def _module_files() -> dict[str, Path]:
    """Module name -> source file, for every ``.py`` file of the package."""
    found: dict[str, Path] = {}
    for folder, pkg in PACKAGE_DIRS.items():
        base = ROOT / folder
        for path in sorted(base.rglob("*.py")):
            rel = path.relative_to(base)
            if folder == "workflows" and rel.parts[0] == "_package":
                continue
            if any(p.startswith(".") or p == "__pycache__" for p in rel.parts):
                continue
            parts = list(rel.with_suffix("").parts)
            if parts[-1] == "__init__":
                parts = parts[:-1]
            found[".".join([pkg, *parts])] = path
    return found


MODULES = _module_files()


def _is_package(name: str) -> bool:
    return MODULES[name].name == "__init__.py"


def _imported(module: str, path: Path) -> list[tuple[str, int]]:
    """(imported name, line) for every import statement of the file, relative imports made absolute.

    ``from a.b import c`` yields ``a.b.c`` when that is a module of the package, else ``a.b``.
    """
    tree = ast.parse(path.read_text(), filename=str(path))
    here = module if _is_package(module) else module.rsplit(".", 1)[0]
    out: list[tuple[str, int]] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out += [(a.name, node.lineno) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base_parts = here.split(".")
                base_parts = base_parts[: len(base_parts) - (node.level - 1)]
                base = ".".join(base_parts + ([node.module] if node.module else []))
            else:
                base = node.module or ""
            subs = [f"{base}.{a.name}" for a in node.names if f"{base}.{a.name}" in MODULES]
            out += [(s, node.lineno) for s in subs]
            if len(subs) < len(node.names):
                out.append((base, node.lineno))
    return out


def _edges() -> dict[str, dict[str, int]]:
    """module -> {imported module of the package: line}; only the most specific module is kept."""
    graph: dict[str, dict[str, int]] = {}
    for mod, path in MODULES.items():
        deps: dict[str, int] = {}
        for name, line in _imported(mod, path):
            target = name
            while target and target not in MODULES:
                target = target.rpartition(".")[0]
            if target and target != mod:
                deps.setdefault(target, line)
        graph[mod] = deps
    return graph


def _cycles(graph: dict[str, dict[str, int]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan's algorithm)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on: set[str] = set()
    comps: list[list[str]] = []
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
                comps.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return comps


def _all_imports() -> list[tuple[str, str, int]]:
    return [(mod, name, line) for mod, path in MODULES.items() for name, line in _imported(mod, path)]


def test_every_module_is_found():
    # the scan must see the whole package, or the checks below would pass on nothing
    for name in ("swathmill", "swathmill.errors", "swathmill.tiles.run", "swathmill.workflows.app.pipeline",
                 "swathmill.workflows.params", "swathmill.workflows.roles"):
        assert name in MODULES, name
    assert len(MODULES) > 30


def test_no_import_cycle():
    graph = _edges()
    cycles = _cycles(graph)
    detail = []
    for comp in cycles:
        members = set(comp)
        detail.append("; ".join(f"{a} -> {b} (line {graph[a][b]})" for a in comp for b in graph[a] if b in members))
    assert not cycles, "import cycles between modules:\n  " + "\n  ".join(detail)


def test_engine_never_imports_the_science_side():
    bad = [f"{m} line {ln}: {n}" for m, n, ln in _all_imports()
           if m.startswith("swathmill.tiles") and (n == "swathmill.workflows" or n.startswith("swathmill.workflows."))]
    assert not bad, "swathmill.tiles must not import swathmill.workflows:\n  " + "\n  ".join(bad)


def test_science_never_imports_the_app_layer():
    science = ("swathmill.workflows.methods", "swathmill.workflows.inputs", "swathmill.workflows.spectral")
    bad = [f"{m} line {ln}: {n}" for m, n, ln in _all_imports()
           if m.startswith(science) and n.startswith("swathmill.workflows.app")]
    assert not bad, "science modules must not import the application layer:\n  " + "\n  ".join(bad)


def test_no_old_top_level_names():
    bad = [f"{m} line {ln}: {n}" for m, n, ln in _all_imports() if n.split(".")[0] in ("tiles", "workflows")]
    assert not bad, "imports of the old top-level names (use swathmill.tiles / swathmill.workflows):\n  " + \
        "\n  ".join(bad)


def test_the_checks_catch_a_cycle():
    # the cycle finder itself, on a made-up graph: a -> b -> c -> a and d alone
    graph = {"a": {"b": 1}, "b": {"c": 1}, "c": {"a": 1}, "d": {"a": 1}}
    assert _cycles(graph) == [["a", "b", "c"]]
    assert _cycles({"a": {"b": 1}, "b": {}}) == []


@pytest.mark.parametrize("module", sorted(MODULES))
def test_every_module_imports(module):
    # importing each module on its own (in module order) must work: no hidden order dependence
    import importlib

    importlib.import_module(module)
