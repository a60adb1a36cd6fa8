"""The package's layout keeps its arrows pointing one way.

Source of the rules checked here: project convention (GUIDE.md, "No module imports the CLI;
kernels import nothing of ours; no import cycles, not even inside functions"), and issue 13
(``python -c "import madelung.sums.direct"``-style imports of every subpackage work).

The import graph is read from the source (every ``import`` and ``from ... import`` at any depth,
including inside functions and methods), so a cycle hidden in a function-local import is found
even though Python would only hit it at call time.
"""

import ast
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "madelung"


def _module_name(path):
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


MODULES = {_module_name(p): p for p in sorted(PACKAGE.rglob("*.py")) if "__pycache__" not in p.parts}
PACKAGES = sorted(name for name, path in MODULES.items() if path.name == "__init__.py")


def _imports(name, path):
    """Every module of the package that ``name`` imports, with the line of each import."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                found.append((alias.name, node.lineno))
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[:len(base) - (node.level - 1)]
                module = ".".join(base + ([node.module] if node.module else []))
            else:
                module = node.module or ""
            for alias in node.names:
                candidate = f"{module}.{alias.name}"
                found.append((candidate if candidate in MODULES else module, node.lineno))
    return [(target, line) for target, line in found if target in MODULES and target != name]


GRAPH = {name: _imports(name, path) for name, path in MODULES.items()}


def _find_cycle(graph):
    """One import cycle as a list of modules (first == last), or None."""
    state, stack = {}, []

    def visit(node):
        state[node] = "open"
        stack.append(node)
        for target, _ in graph[node]:
            if state.get(target) == "open":
                return stack[stack.index(target):] + [target]
            if target not in state:
                cycle = visit(target)
                if cycle:
                    return cycle
        stack.pop()
        state[node] = "done"
        return None

    for node in sorted(graph):
        if node not in state:
            cycle = visit(node)
            if cycle:
                return cycle
    return None


def test_the_module_walk_sees_the_package():
    # the checks below are only as good as the walk: it must see the known rooms and their edges
    assert {"madelung", "madelung.sums.direct", "madelung.sums._kernels.kernels", "madelung.cli"} <= set(MODULES)
    assert any(t == "madelung.sums.geometry" for t, _ in GRAPH["madelung.sums.plan"])
    # a function-local import is an edge too (madelung.structure.crystal looks up neighbours lazily)
    assert any(t == "madelung.sums.geometry" for t, _ in GRAPH["madelung.structure.crystal"])
    assert any(t == "madelung.sums._kernels.geometry_kernels" for t, _ in GRAPH["madelung.sums._kernels.kernels"])


def test_the_cycle_finder_finds_a_cycle():
    # a finder that never reports anything would make the next test pass vacuously
    assert _find_cycle({"a": [("b", 1)], "b": [("c", 1)], "c": [("a", 1)]}) == ["a", "b", "c", "a"]
    assert _find_cycle({"a": [("b", 1)], "b": []}) is None


def test_no_import_cycles_even_inside_functions():
    cycle = _find_cycle(GRAPH)
    assert cycle is None, "import cycle: " + " -> ".join(cycle)


def test_nothing_in_the_package_imports_the_command_line():
    offenders = [f"{name}:{line}" for name, edges in GRAPH.items() if not name.startswith("madelung.cli")
                 for target, line in edges if target == "madelung.cli" or target.startswith("madelung.cli.")]
    assert not offenders, "modules importing madelung.cli: " + ", ".join(offenders)


def _is_kernel_module(name):
    return "._kernels." in name + "." or name.rpartition(".")[2].endswith("_kernels")


def test_kernels_import_nothing_of_ours():
    # kernels may share the neighbour walker and erfc inside _kernels/, nothing outside it
    offenders = []
    for name, edges in GRAPH.items():
        if not _is_kernel_module(name):
            continue
        home = name.rpartition("._kernels")[0] + "._kernels" if "._kernels" in name else None
        for target, line in edges:
            if home is None or not (target == home or target.startswith(home + ".")):
                offenders.append(f"{name}:{line} imports {target}")
    assert not offenders, "; ".join(offenders)


@pytest.mark.parametrize("package", PACKAGES)
def test_every_module_of_a_subpackage_imports_in_a_fresh_interpreter(package):
    members = sorted(name for name in MODULES if name.rpartition(".")[0] == package
                     and MODULES[name].name != "__init__.py")
    members = [m for m in members if m != "madelung.__main__"] or [package]
    code = "\n".join(f"import {m}" for m in members)
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env, capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]


def test_madelung_ewald_is_the_function_and_sums_is_the_package():
    import madelung
    import madelung.sums.direct

    assert callable(madelung.ewald)
    assert madelung.sums.direct.__name__ == "madelung.sums.direct"
