"""Draw the import graph of the schedforge package and list its cycles.

Run from the repository root::

    python tools/import_graph.py            # cycles and counts
    python tools/import_graph.py --edges    # also every edge

Every ``import`` and ``from ... import`` of a schedforge module counts, at module level
or inside a function (an import inside a function is still a dependency; it is marked
``(late)``). Imports under ``if TYPE_CHECKING:`` are left out: they do not run.

Upward imports are edges from a module to one of a higher layer (:data:`LAYERS`, from
the foundation up to the command line).  Imports of the package root (``from . import
__version__``) are counted apart: the root sits on top once it re-exports the API.
"""

from __future__ import annotations

import argparse
import ast
import sys
from pathlib import Path

__all__ = ["LAYERS", "cycles", "import_graph", "layer_of", "main", "upward_imports"]

PACKAGE = "schedforge"

#: Layers from the bottom up; a module belongs to the layer of the longest entry
#: naming it or a package above it.  Our reading of the code, not a rule the package enforces.
LAYERS: tuple[tuple[str, tuple[str, ...]], ...] = (
    ("foundation", ("errors", "units", "fileio", "progress", "executors", "checks")),
    (
        "model",
        (
            "spec_model",
            "spec",
            "schedules",
            "device",
            "device_curves",
            "device_table",
            "hamiltonian",
            "bath",
            "problem_families",
            "limits",
            "error_law",
            "control_noise",
            "breakpoints",
            "samples",
            "waveform",
            "metrics",
        ),
    ),
    (
        "dynamics core",
        (
            "davies",
            "symmetry",
            "system",
            "integrators.base",
            "integrators.collocation",
            "integrators.free_modes",
        ),
    ),
    ("integrators", ("integrators",)),
    ("simulation driver", ("dynamics",)),
    (
        "study",
        ("sweep", "store", "analysis", "prediction", "budget", "noise_ensemble"),
    ),
    ("outputs", ("plotting", "report", "noise_report")),
    ("command line", ("cli", "__main__")),
)


def _module_name(path: Path, root: Path) -> str:
    parts = list(path.relative_to(root).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _resolve(module: str, is_package: bool, node: ast.ImportFrom) -> list[str]:
    """Absolute module names a ``from`` import refers to (module or submodule)."""
    if node.level:
        base = module.split(".") if is_package else module.split(".")[:-1]
        base = base[: len(base) - (node.level - 1)]
        target = ".".join(base + ([node.module] if node.module else []))
    else:
        target = node.module or ""
    names = [target]
    names += [f"{target}.{alias.name}" for alias in node.names]
    return names


def _type_checking_nodes(tree: ast.AST) -> set[int]:
    skip: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If):
            test = node.test
            name = getattr(test, "id", None) or getattr(test, "attr", None)
            if name == "TYPE_CHECKING":
                for child in node.body:
                    skip.update(id(n) for n in ast.walk(child))
    return skip


def import_graph(root: Path) -> dict[str, dict[str, bool]]:
    """Edges ``{module: {imported module: late}}`` of the package under ``root``.

    ``late`` is True when every import of that module sits inside a function.
    """
    files = sorted((root / PACKAGE).rglob("*.py"))
    modules = {_module_name(f, root): f for f in files}
    graph: dict[str, dict[str, bool]] = {}
    for module, path in modules.items():
        tree = ast.parse(path.read_text(), filename=str(path))
        skip = _type_checking_nodes(tree)
        late_nodes: set[int] = set()
        for node in ast.walk(tree):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                late_nodes.update(id(n) for n in ast.walk(node))
        edges: dict[str, bool] = {}
        for node in ast.walk(tree):
            if id(node) in skip:
                continue
            if isinstance(node, ast.Import):
                targets = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom):
                targets = _resolve(module, path.name == "__init__.py", node)
            else:
                continue
            for target in targets:
                if target in modules and target != module:
                    late = id(node) in late_nodes
                    edges[target] = edges.get(target, True) and late
        graph[module] = edges
    return graph


def cycles(graph: dict[str, dict[str, bool]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan), sorted."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []
    counter = [0]

    def visit(v: str) -> None:
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on_stack.add(v)
        for w in graph.get(v, {}):
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
                found.append(sorted(component))

    sys.setrecursionlimit(10_000)
    for v in sorted(graph):
        if v not in index:
            visit(v)
    return sorted(found)


def layer_of(module: str) -> int | None:
    """Index into :data:`LAYERS` of a module (None: the package root or unknown)."""
    name = module.removeprefix(PACKAGE + ".")
    best: tuple[int, int] | None = None  # (length of the matched name, layer)
    for index, (_, members) in enumerate(LAYERS):
        for member in members:
            if name == member or name.startswith(member + "."):
                if best is None or len(member) > best[0]:
                    best = (len(member), index)
    return None if best is None else best[1]


def upward_imports(graph: dict[str, dict[str, bool]]) -> list[tuple[str, str, bool]]:
    """Edges (module, imported, late) into a higher layer; the package root left out."""
    out = []
    for module, edges in sorted(graph.items()):
        here = layer_of(module)
        for target, late in sorted(edges.items()):
            there = layer_of(target)
            if here is not None and there is not None and there > here:
                out.append((module, target, late))
    return out


def main(argv: list[str] | None = None) -> int:
    """Print the cycles (and optionally the edges); exit 1 when there is a cycle."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--root", type=Path, default=Path(__file__).resolve().parents[1])
    parser.add_argument("--edges", action="store_true", help="print every edge")
    args = parser.parse_args(argv)
    graph = import_graph(args.root)
    n_edges = sum(len(e) for e in graph.values())
    n_late = sum(late for e in graph.values() for late in e.values())
    print(f"{len(graph)} modules, {n_edges} import edges ({n_late} only inside functions)")
    if args.edges:
        for module in sorted(graph):
            for target, late in sorted(graph[module].items()):
                print(f"  {module} -> {target}{' (late)' if late else ''}")
    unplaced = sorted(m for m in graph if m != PACKAGE and layer_of(m) is None)
    if unplaced:
        print(f"modules in no layer: {', '.join(unplaced)}")
    up = upward_imports(graph)
    print(f"{len(up)} upward import(s)")
    for module, target, late in up:
        print(f"  {module} -> {target}{' (late)' if late else ''}")
    root = sorted(m for m, e in graph.items() if PACKAGE in e and m != PACKAGE)
    print(f"{len(root)} module(s) import the package root: {', '.join(root)}")
    found = cycles(graph)
    print(f"{len(found)} cycle(s)")
    for component in found:
        inner = [
            f"{a} -> {b}{' (late)' if graph[a][b] else ''}"
            for a in component
            for b in sorted(graph[a])
            if b in component
        ]
        print("  " + ", ".join(component))
        for edge in inner:
            print("    " + edge)
    return 1 if found else 0


if __name__ == "__main__":
    sys.exit(main())
