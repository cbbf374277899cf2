"""The package's shape: imports only point down the pipeline, no cycles, no private names across modules.

The pipeline order is the order of the subpackages below (load -> find sites ->
plan -> rewrite -> calibrate -> check -> report -> commands); a module may
import from its own layer or a lower one, never a higher one. Imports are read
with ``ast`` from the source (function-level imports included), so a cycle
cannot hide behind a late import.
"""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "swapper"

# lowest first; each entry is one layer (a top-level module or a subpackage)
LAYERS = [
    ("errors", "progress"),
    ("options",),
    ("core",),
    ("functions",),
    ("fit",),
    ("data",),
    ("scan",),
    ("targets",),
    ("plan",),
    ("rewrite",),
    ("calibrate",),
    ("check",),
    ("report",),
    ("sweep",),
    ("api", "autoplan"),
    ("bench",),
    ("cli",),
]
RANK = {name: i for i, layer in enumerate(LAYERS) for name in layer}
LEAVES = {"swapper.functions.params"}  # imported by fit and plan alike: must import nothing of ours


def _module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _modules() -> dict[str, Path]:
    return {_module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def _imports(path: Path) -> list[tuple[str, list[str], int]]:
    """(imported swapper module, names imported from it, line) for every import in ``path``."""
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and node.level == 0 and node.module \
                and node.module.split(".")[0] == "swapper":
            found.append((node.module, [a.name for a in node.names], node.lineno))
        elif isinstance(node, ast.ImportFrom) and node.level > 0:
            found.append(("<relative>", [a.name for a in node.names], node.lineno))
        elif isinstance(node, ast.Import):
            found += [(a.name, [], node.lineno) for a in node.names if a.name.split(".")[0] == "swapper"]
    return found


def _target(module: str, names: list[str], modules: dict[str, Path]) -> list[str]:
    """The modules an import statement reaches: ``from pkg import sub`` reaches pkg.sub."""
    reached = [module]
    reached += [f"{module}.{n}" for n in names if f"{module}.{n}" in modules]
    return reached


def _layer(module: str) -> str | None:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else None


def _graph() -> dict[str, set[str]]:
    modules = _modules()
    edges: dict[str, set[str]] = {m: set() for m in modules}
    for name, path in modules.items():
        for module, names, _ in _imports(path):
            edges[name].update(t for t in _target(module, names, modules) if t in modules and t != name)
    return edges


def test_every_module_is_in_a_layer():
    missing = sorted(m for m in _modules() if m != "swapper" and _layer(m) not in RANK)
    assert not missing, f"add these to LAYERS: {missing}"


def test_no_relative_imports():
    # absolute imports say where a name comes from without knowing the file's place in the tree
    bad = [f"{p.relative_to(PACKAGE.parent)}:{line}" for m, p in _modules().items()
           for module, _, line in _imports(p) if module == "<relative>"]
    assert not bad, bad


def test_imports_point_down_the_pipeline():
    upward = []
    for name, path in _modules().items():
        if name == "swapper":
            continue  # the package facade re-exports the API lazily
        here = RANK[_layer(name)]
        for module, _, line in _imports(path):
            layer = _layer(module)
            if layer is not None and layer in RANK and RANK[layer] > here:
                upward.append(f"{path.relative_to(PACKAGE.parent)}:{line} imports {module}")
    assert not upward, "\n".join(upward)


def test_leaf_modules_import_nothing_of_ours():
    modules = _modules()
    for leaf in LEAVES:
        assert not [m for m, _, _ in _imports(modules[leaf])], leaf


def test_no_import_cycles():
    edges = _graph()
    state: dict[str, int] = {}
    cycles = []

    def visit(node: str, stack: list[str]) -> None:
        state[node] = 1
        for nxt in sorted(edges[node]):
            if nxt == "swapper" or nxt not in edges:
                continue
            if state.get(nxt) == 1:
                cycles.append(" -> ".join(stack[stack.index(nxt):] + [nxt]))
            elif nxt not in state:
                visit(nxt, stack + [nxt])
        state[node] = 2

    for node in sorted(edges):
        if node not in state and node != "swapper":
            visit(node, [node])
    assert not cycles, "\n".join(cycles)


def test_no_private_names_across_modules():
    bad = [f"{p.relative_to(PACKAGE.parent)}:{line} imports {n} from {module}"
           for m, p in _modules().items() for module, names, line in _imports(p)
           for n in names if n.startswith("_") and not n.startswith("__")]
    assert not bad, "\n".join(bad)


@pytest.mark.parametrize("name", sorted(_modules()))
def test_modules_stay_small(name):
    # one job per module; ~400 lines is where a module starts holding two (common practice, no source)
    lines = _modules()[name].read_text(encoding="utf-8").count("\n")
    assert lines <= 420, f"{name}: {lines} lines"
