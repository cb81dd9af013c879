"""The import graph of closure/, worker/ and api/ has no cycles, and the science does not import
the service.

The graph is built from the source with ast (nothing imported): an edge A -> B for every
``import B`` / ``from B import ...`` in module A that names one of our modules, ``from P
import name`` counting as P.name when that is a module. Module-level imports (those that run
when A is imported, including under ``if``/``try`` at the top, not under ``if TYPE_CHECKING``)
must form no cycle; imports inside functions are listed too (``python tests/test_imports.py``
prints every cycle of both graphs). Importing a submodule also runs its package's
``__init__``; those implicit edges are left out (a package that re-exports its modules is the
usual shape, and Python runs it without trouble).
"""

from __future__ import annotations

import ast
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("closure", "worker", "api")


def module_files(root: Path = ROOT) -> dict[str, Path]:
    """``{dotted module name: file}`` of every module of our packages."""
    out = {}
    for pkg in PACKAGES:
        for path in sorted((root / pkg).rglob("*.py")):
            parts = list(path.relative_to(root).with_suffix("").parts)
            if parts[-1] == "__init__":
                parts = parts[:-1]
            out[".".join(parts)] = path
    return out


def _is_type_checking(test: ast.expr) -> bool:
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _imports(tree: ast.Module, module: str, is_package: bool):
    """(target, level) for each import: level 'module' or 'function'."""

    def walk(nodes, level):
        for node in nodes:
            if isinstance(node, ast.If) and _is_type_checking(node.test):
                yield from walk(node.orelse, level)
                continue
            if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef | ast.Lambda):
                yield from walk(ast.iter_child_nodes(node), "function")
                continue
            if isinstance(node, ast.Import):
                for alias in node.names:
                    yield alias.name, None, level
            elif isinstance(node, ast.ImportFrom):
                base = node.module or ""
                if node.level:
                    pkg = module.split(".") if is_package else module.split(".")[:-1]
                    pkg = pkg[:len(pkg) - (node.level - 1)]
                    base = ".".join([*pkg, base] if base else pkg)
                for alias in node.names:
                    yield base, alias.name, level
            yield from walk(ast.iter_child_nodes(node), level)

    yield from walk(tree.body, "module")


def import_graph(root: Path = ROOT) -> dict[str, dict[str, set[str]]]:
    """``{"module": {A: {B, ...}}, "function": {...}}``: the imports of each module of ours."""
    files = module_files(root)
    graph = {"module": {m: set() for m in files}, "function": {m: set() for m in files}}
    for mod, path in files.items():
        tree = ast.parse(path.read_text(encoding="utf-8"), str(path))
        for base, name, level in _imports(tree, mod, path.name == "__init__.py"):
            target = None
            if name is not None and f"{base}.{name}" in files:
                target = f"{base}.{name}"
            elif base in files:
                target = base
            else:  # import a.b.c of a module inside a package of ours
                parts = base.split(".")
                while parts and ".".join(parts) not in files:
                    parts.pop()
                target = ".".join(parts) if parts else None
            if target and target != mod and not mod.startswith(target + "."):
                graph[level][mod].add(target)
    return graph


def cycles(edges: dict[str, set[str]]) -> list[list[str]]:
    """The strongly connected components with more than one module (Tarjan), sorted."""
    index, low, stack, on, out = {}, {}, [], set(), []
    counter = [0]

    def strong(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in sorted(edges.get(v, ())):
            if w not in index:
                strong(w)
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

    sys.setrecursionlimit(max(10000, sys.getrecursionlimit()))
    for v in sorted(edges):
        if v not in index:
            strong(v)
    return sorted(out)


def _both(graph):
    return {m: graph["module"][m] | graph["function"][m] for m in graph["module"]}


def test_the_graph_sees_imports_at_every_level():
    # the checker itself, on a module whose imports are known
    graph = import_graph()
    assert "closure.errors" in graph["module"]["closure.spec"]
    assert "closure.model" in graph["module"]["closure.export"]
    assert cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert cycles({"a": {"b"}, "b": set()}) == []


def test_no_cycles_among_module_level_imports():
    found = cycles(import_graph()["module"])
    assert found == [], "import cycles: " + "; ".join(" <-> ".join(c) for c in found)


def test_no_cycles_at_any_level():
    # not even through imports inside functions: shared types go a floor down
    # (closure/fields.py, worker/context.py), dispatchers a floor up (worker/status.py)
    found = cycles(_both(import_graph()))
    assert found == [], "import cycles: " + "; ".join(" <-> ".join(c) for c in found)


def test_the_three_former_cycles_are_gone_at_every_level():
    # io <-> residuals, report.gather <-> report.page, worker.tasks/queue/aposteriori: not
    # even through imports inside functions
    graph = _both(import_graph())
    for group in (("closure.io", "closure.residuals"),
                  ("closure.report.gather", "closure.report.page"),
                  ("worker.tasks", "worker.queue", "worker.aposteriori")):
        for comp in cycles(graph):
            assert len(set(group) & set(comp)) < 2, f"{group} still in the cycle {comp}"


#: the commands that start the server processes (`closure api`, `closure worker`, `closure up`)
SERVER_COMMANDS = ("closure.cli.service",)


def test_science_imports_nothing_of_the_service_layers():
    graph = _both(import_graph())
    for mod, targets in graph.items():
        if mod.startswith("closure") and mod not in SERVER_COMMANDS:
            bad = sorted(t for t in targets if t.startswith(("api", "worker")))
            assert not bad, f"{mod} imports {bad}"


SERVICE = ("closure.service", "closure.store", "closure.localstack", "closure.client")


def test_the_science_imports_nothing_of_closure_service():
    # the tree shows the line: closure/service/ (store, local stack, client) sits beside the
    # science, which never reaches into it (the command line does, to talk to a server)
    graph = _both(import_graph())
    for mod, targets in graph.items():
        if mod.startswith("closure") and not mod.startswith(("closure.service", "closure.cli")) \
                and mod not in SERVICE:
            bad = sorted(t for t in targets if t.startswith(SERVICE))
            assert not bad, f"{mod} imports {bad}"


def test_the_old_service_paths_are_the_same_modules():
    import closure.client
    import closure.localstack
    import closure.service.client
    import closure.service.localstack
    import closure.service.store
    import closure.store

    assert closure.store is closure.service.store
    assert closure.localstack is closure.service.localstack
    assert closure.client is closure.service.client
    from closure.store import _record, iso_time  # private names too

    assert iso_time(0.0) == "1970-01-01T00:00:00Z" and callable(_record)


if __name__ == "__main__":
    g = import_graph()
    for level, edges in (("module-level", g["module"]), ("all", _both(g))):
        print(f"{level} import cycles:")
        for comp in cycles(edges):
            print("  " + " <-> ".join(comp))
