"""Layering of the package: no import cycles between its modules, and every module imports on its own.

The contract (ARCHITECTURE.md, "Lower rooms never import higher ones"): a module never imports, at top level or
inside a function, a module that imports it back, directly or through others. A lazy import inside a function
hides such a cycle from the interpreter (nothing fails at import time) but not from this test, which reads the
import statements with :mod:`ast`. The package ``__init__`` files are façades that re-export their submodules;
they are not nodes of the graph: an import of a name from a package is followed to the submodule that defines it.
Imports under ``if TYPE_CHECKING:`` never run and are left out.
"""
from __future__ import annotations

import ast
import subprocess
import sys
import textwrap
from pathlib import Path

import calcium

PACKAGE_DIR = Path(calcium.__file__).resolve().parent

# Upward imports kept for one release inside a deprecated function: (importer, imported) -> the function.
# Each must stay inside that function, and the function must warn; remove the entry with the function.
DEPRECATED_UPWARD_IMPORTS = {
    ("calcium.indicators", "calcium.kernel"): "IndicatorKinetics.kernel",
}


# ------------------------------------------------------------------ the import graph
def _modules(package_dir: Path) -> dict[str, Path]:
    """Dotted name -> file, for the package's modules one and two levels deep (``__init__`` named as its package)."""
    found = {}
    for path in sorted(package_dir.glob("*.py")) + sorted(package_dir.glob("*/*.py")):
        parts = list(path.relative_to(package_dir.parent).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts.pop()
        found[".".join(parts)] = path
    return found


def _is_type_checking_block(node: ast.AST) -> bool:
    test = getattr(node, "test", None)
    return isinstance(node, ast.If) and (
        (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING")
        or (isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"))


def _import_nodes(tree: ast.AST):
    """Every import statement with the chain of enclosing function/class names, skipping TYPE_CHECKING blocks."""
    def walk(node, where):
        for child in ast.iter_child_nodes(node):
            if _is_type_checking_block(child):
                for grandchild in child.orelse:
                    yield from walk(ast.Module(body=[grandchild], type_ignores=[]), where)
                continue
            if isinstance(child, (ast.Import, ast.ImportFrom)):
                yield child, where
            inner = (*where, child.name) if isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef,
                                                               ast.ClassDef)) else where
            yield from walk(child, inner)
    yield from walk(tree, ())


class ImportGraph:
    """Who imports whom inside one package, read from the source with :mod:`ast`."""

    def __init__(self, package_dir: Path):
        self.package = package_dir.name
        self.modules = _modules(package_dir)
        self._trees = {name: ast.parse(path.read_text(encoding="utf-8")) for name, path in self.modules.items()}
        # (importer, imported) -> [(line, enclosing function/class chain)]
        self.edges: dict[tuple[str, str], list[tuple[int, tuple[str, ...]]]] = {}
        for name in self.modules:
            if self._is_package(name):
                continue
            for node, where in _import_nodes(self._trees[name]):
                for target in self._targets(name, node):
                    place = (node.lineno, where)
                    if target != name and target in self.modules and not self._is_package(target):
                        places = self.edges.setdefault((name, target), [])
                        if place not in places:  # one statement can import several names of one module
                            places.append(place)

    def _is_package(self, name: str) -> bool:
        return self.modules[name].name == "__init__.py"

    def _raw_targets(self, name: str, node) -> list[tuple[str | None, str]]:
        """(imported name or None, module) pairs of one import statement, before following re-exports."""
        if isinstance(node, ast.Import):
            return [(None, alias.name) for alias in node.names if alias.name.split(".")[0] == self.package]
        if node.level:
            base = name.split(".") if self._is_package(name) else name.split(".")[:-1]
            base = base[:len(base) - (node.level - 1)]
            module = ".".join(base + ([node.module] if node.module else []))
        else:
            module = node.module or ""
        if module.split(".")[0] != self.package:
            return []
        return [(alias.name, f"{module}.{alias.name}" if f"{module}.{alias.name}" in self.modules else module)
                for alias in node.names]

    def _reexported_from(self, package: str, attribute: str) -> str | None:
        """The module a package's ``__init__`` takes ``attribute`` from (its TYPE_CHECKING imports included: a
        façade that loads its names lazily lists them there)."""
        for node in ast.walk(self._trees[package]):
            if isinstance(node, ast.ImportFrom):
                for alias, (_, module) in zip(node.names, self._raw_targets(package, node)):
                    if (alias.asname or alias.name) == attribute:
                        return module
        return None

    def _targets(self, name: str, node) -> list[str]:
        targets = []
        for attribute, module in self._raw_targets(name, node):
            for _ in range(5):  # follow re-exports through nested packages
                if attribute is None or module not in self.modules or not self._is_package(module):
                    break
                source = self._reexported_from(module, attribute)
                if source is None or source == module:
                    break
                module = source
            targets.append(module)
        return targets

    def cycles(self, *, ignore=()) -> list[list[str]]:
        """Groups of modules that import one another (strongly connected components), ignoring some edges."""
        graph: dict[str, set[str]] = {name: set() for name in self.modules}
        for (source, target) in self.edges:
            if (source, target) not in ignore:
                graph[source].add(target)
        index, low, stack, on_stack, groups = {}, {}, [], set(), []

        def visit(v):  # Tarjan (1972), recursive: the graph has a few dozen nodes
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
                group = []
                while True:
                    w = stack.pop()
                    on_stack.discard(w)
                    group.append(w)
                    if w == v:
                        break
                if len(group) > 1:
                    groups.append(sorted(group))

        for v in sorted(graph):
            if v not in index:
                visit(v)
        return groups

    def describe(self, group: list[str]) -> str:
        lines = []
        for (source, target), where in sorted(self.edges.items()):
            if source in group and target in group:
                for line, chain in where:
                    inside = f" inside {'.'.join(chain)}" if chain else " at top level"
                    lines.append(f"{source} imports {target} (line {line}{inside})")
        return "; ".join(lines)


# ------------------------------------------------------------------ the detector on small invented packages
def _write_package(root: Path, files: dict[str, str]) -> Path:
    for relative, text in files.items():
        path = root / relative
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(textwrap.dedent(text), encoding="utf-8")
    return root / "pkg"


def test_the_cycle_detector_finds_a_cycle_hidden_by_an_import_inside_a_function(tmp_path):
    package = _write_package(tmp_path, {
        "pkg/__init__.py": "",
        "pkg/low.py": """
            def shim():
                from .high import thing  # lazy: the interpreter never notices the cycle
                return thing
            """,
        "pkg/high.py": "from .low import shim\nthing = 1\n",
        "pkg/other.py": "import pkg.low\n",
    })
    graph = ImportGraph(package)
    assert graph.cycles() == [["pkg.high", "pkg.low"]]
    assert "pkg.low imports pkg.high (line 3 inside shim)" in graph.describe(["pkg.high", "pkg.low"])
    assert graph.cycles(ignore={("pkg.low", "pkg.high")}) == []


def test_the_cycle_detector_follows_names_through_a_subpackage_facade(tmp_path):
    package = _write_package(tmp_path, {
        "pkg/__init__.py": "",
        "pkg/sub/__init__.py": "from .inner import helper\n",
        "pkg/sub/inner.py": "from ..top import value\ndef helper():\n    return value\n",
        "pkg/top.py": "value = 2\ndef use():\n    from .sub import helper\n    return helper()\n",
        "pkg/typed.py": "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from .top import value\n",
        "pkg/plain.py": "from . import top\n",
    })
    graph = ImportGraph(package)
    assert graph.cycles() == [["pkg.sub.inner", "pkg.top"]]
    assert ("pkg.typed", "pkg.top") not in graph.edges  # type-checking imports never run
    assert ("pkg.plain", "pkg.top") in graph.edges


# ------------------------------------------------------------------ the package itself
def test_no_module_of_calcium_imports_a_module_that_imports_it_back():
    graph = ImportGraph(PACKAGE_DIR)
    assert len(graph.modules) > 20 and graph.edges  # the graph was really read
    cycles = graph.cycles(ignore=set(DEPRECATED_UPWARD_IMPORTS))
    assert not cycles, "import cycles: " + " | ".join(graph.describe(group) for group in cycles)


def test_the_only_upward_imports_left_are_inside_their_deprecated_functions():
    graph = ImportGraph(PACKAGE_DIR)
    for (source, target), function in DEPRECATED_UPWARD_IMPORTS.items():
        places = graph.edges.get((source, target))
        assert places, f"{source} no longer imports {target}: remove the entry from DEPRECATED_UPWARD_IMPORTS"
        assert {chain for _, chain in places} == {tuple(function.split("."))}, places
        tree = graph._trees[source]
        owner, method = function.split(".")
        body = next(node for node in tree.body if isinstance(node, ast.ClassDef) and node.name == owner)
        shim = next(node for node in body.body if isinstance(node, ast.FunctionDef) and node.name == method)
        names = {node.id for node in ast.walk(shim) if isinstance(node, ast.Name)}
        assert "DeprecationWarning" in names, f"{function} imports {target} upwards but does not warn"


def test_kernel_imports_the_indicator_table_and_the_table_does_not_import_kernel_at_module_level():
    graph = ImportGraph(PACKAGE_DIR)
    assert [chain for _, chain in graph.edges[("calcium.kernel", "calcium.indicators")]] == [()]  # top level
    assert all(chain for _, chain in graph.edges.get(("calcium.indicators", "calcium.kernel"), []))
    # the shape mathematics both need lives below them, and imports neither
    low = "calcium._double_exponential"
    assert ("calcium.indicators", low) in graph.edges and ("calcium.kernel", low) in graph.edges
    assert not [target for (source, target) in graph.edges if source == low and target != "calcium._checks"]


def test_every_module_imports_first_in_a_fresh_set_of_package_modules():
    # One interpreter; before each module its package's modules are dropped from sys.modules, so each is the
    # first of the package to be imported (third-party modules stay loaded: they do not change the order).
    names = sorted(name for name in _modules(PACKAGE_DIR) if name != "calcium.__main__")
    script = textwrap.dedent(f"""
        import importlib, sys, traceback
        failed = []
        for name in {names!r}:
            for loaded in [m for m in sys.modules if m == "calcium" or m.startswith("calcium.")]:
                del sys.modules[loaded]
            try:
                importlib.import_module(name)
            except Exception:
                failed.append(name + ": " + traceback.format_exc(limit=-2))
        print("\\n".join(failed))
        sys.exit(1 if failed else 0)
        """)
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stdout + done.stderr


def test_the_indicator_table_and_kernel_each_import_first_in_a_fresh_interpreter():
    for first, second in (("calcium.indicators", "calcium.kernel"), ("calcium.kernel", "calcium.indicators")):
        script = (f"import {first}, {second}, calcium; "
                  "assert calcium.kernel.Kernel.from_indicator('GCaMP6s').amplitude == "
                  "calcium.indicators.get_indicator('GCaMP6s').dff_single_spike; "
                  "assert calcium.time_constants_from_half_times is calcium.kernel.time_constants_from_half_times")
        done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=300)
        assert done.returncode == 0, done.stderr
