"""The import structure of msmkit: imports run one way and private names stay in their module.

Checks are made on the source (``ast``), function-level imports included, so a lazy import
that closes a circle is caught as well. Source: common practice (an acyclic module graph and
underscore names private to their module, PEP 8 "Public and internal interfaces").
"""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

import msmkit as mk

PACKAGE = Path(__file__).resolve().parent.parent / "msmkit"


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


MODULES = {_module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def _is_package(name: str) -> bool:
    return MODULES[name].name == "__init__.py"


def _resolve(module: str, level: int, target: str | None) -> str:
    """Absolute name of ``from <level dots><target> import ...`` written in ``module``."""
    if level == 0:
        return target or ""
    base = module.split(".")
    if not _is_package(module):
        base = base[:-1]
    if level > 1:
        base = base[:len(base) - (level - 1)]
    return ".".join(base + ([target] if target else []))


def imports_of(module: str):
    """``(imported module, imported names)`` for every import statement of ``module``, at any
    depth (function bodies too); only msmkit modules."""
    tree = ast.parse(MODULES[module].read_text(), filename=str(MODULES[module]))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name == "msmkit" or alias.name.startswith("msmkit."):
                    yield alias.name, []
        elif isinstance(node, ast.ImportFrom):
            source = _resolve(module, node.level, node.module)
            if source != "msmkit" and not source.startswith("msmkit."):
                continue
            names = [a.name for a in node.names]
            submodules = [n for n in names if f"{source}.{n}" in MODULES]
            for n in submodules:
                yield f"{source}.{n}", []
            rest = [n for n in names if n not in submodules]
            if rest:
                yield source, rest


def import_graph() -> dict[str, set[str]]:
    graph = {m: set() for m in MODULES}
    for m in MODULES:
        for target, _ in imports_of(m):
            if target != m and target in MODULES:
                graph[m].add(target)
    return graph


def find_cycle(graph):
    """One import cycle as a list of modules, or None (depth-first search)."""
    state, stack = {}, []

    def visit(node):
        state[node] = "open"
        stack.append(node)
        for nxt in sorted(graph[node]):
            if state.get(nxt) == "open":
                return stack[stack.index(nxt):] + [nxt]
            if nxt not in state:
                found = visit(nxt)
                if found:
                    return found
        stack.pop()
        state[node] = "done"
        return None

    for node in sorted(graph):
        if node not in state:
            found = visit(node)
            if found:
                return found
    return None


def test_the_parser_sees_the_modules_and_their_imports():
    # the test must not pass by seeing nothing: these imports exist today
    assert {"msmkit", "msmkit.counts", "msmkit.model", "msmkit.widgets"} <= set(MODULES)
    graph = import_graph()
    assert "msmkit.counts" in graph["msmkit.model"]
    assert "msmkit.model" in graph["msmkit"]


def test_find_cycle_finds_a_planted_cycle():
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": set()}) is None


def test_no_import_cycle_among_msmkit_modules():
    cycle = find_cycle(import_graph())
    assert cycle is None, "import cycle: " + " -> ".join(cycle)


@pytest.mark.parametrize("module", sorted(MODULES))
def test_no_private_name_imported_from_another_module(module):
    # a name another module needs is a documented public function of its owner; private
    # submodules of a package (``_checks``, ``widgets._render``) are fine to import whole
    bad = [f"{source}.{name}" for source, names in imports_of(module) for name in names
           if name.startswith("_") and not name.startswith("__")]
    assert not bad, f"{module} imports private names of other modules: {bad}"


def _external_imports(module: str) -> set[str]:
    """Top-level names of the packages outside msmkit that ``module`` imports (any depth)."""
    tree = ast.parse(MODULES[module].read_text())
    names = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names |= {a.name.split(".")[0] for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            names.add(node.module.split(".")[0])
        elif (isinstance(node, ast.Call) and getattr(node.func, "id", None) == "require_optional"
              and node.args and isinstance(node.args[0], ast.Constant)):
            names.add(str(node.args[0].value).split(".")[0])  # optional packages imported on demand
    return names - {"msmkit"}


def test_the_cluster_layers_sit_below_the_numerics():
    # distributed.py holds the dask specifics only and _execution.py maps kernels it is given:
    # neither may reach up into a numeric module (that was the old circle)
    graph = import_graph()
    assert graph["msmkit.distributed"] <= {"msmkit.errors", "msmkit._checks"}
    assert graph["msmkit._execution"] <= {"msmkit.errors", "msmkit._checks", "msmkit.distributed"}
    # and the numeric modules reach the cluster through the execution layer
    for numeric in ("counts", "io", "reduce", "states", "lagscan", "validate"):
        assert "msmkit._execution" in graph[f"msmkit.{numeric}"], numeric


def test_only_the_dask_module_imports_dask():
    users = {m for m in MODULES if _external_imports(m) & {"dask", "distributed", "dask_ml"}}
    assert users == {"msmkit.distributed"}, users


def test_numerics_never_import_the_user_interface():
    ui = {"msmkit.plots", "msmkit.report", "msmkit.cli"} | {m for m in MODULES if m.startswith("msmkit.widgets")}
    graph = import_graph()
    for m in MODULES:
        if m in ui or m == "msmkit":
            continue
        assert not graph[m] & ui, f"{m} imports {sorted(graph[m] & ui)}"


def test_star_import_gives_every_public_name():
    # every name listed in __all__ must exist (Python reference, "The import statement")
    namespace = {}
    exec("from msmkit import *", namespace)
    assert set(mk.__all__) <= set(namespace)
