"""Every third-party module the package imports is installed by `pip install -e .` or named as an extra.

A fresh install of the README's first command once failed with `No module named 'PIL'`: Pillow came into the
test environment only through matplotlib. The distribution of each imported module is looked up with
importlib.metadata.packages_distributions (Python standard library), and the declared names are read from
pyproject.toml with tomllib (PEP 621 fields).
"""
from __future__ import annotations

import ast
import re
import sys
from importlib.metadata import packages_distributions
from pathlib import Path

import tomllib

ROOT = Path(__file__).resolve().parents[1]
# installed by a declared dependency, not named by us: onnx needs protobuf, scikit-learn threadpoolctl
TRANSITIVE = {"protobuf": "onnx", "threadpoolctl": "scikit-learn"}
OPTIONAL = {"plots", "cluster"}  # extras whose modules the package imports inside functions, with a message


def _names(requirements: list[str]) -> set[str]:
    """Distribution names of PEP 508 requirements; ``dask[distributed]`` also names ``distributed``."""
    names = set()
    for r in requirements:
        names.add(re.split(r"[<>=!~\[; ]", r, maxsplit=1)[0].lower())
        names |= {e.strip().lower() for e in re.findall(r"\[([^\]]*)\]", r)[:1] for e in e.split(",")}
    return names


def _imported_modules() -> set[str]:
    mods = set()
    for path in (ROOT / "swapper").rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Import):
                mods |= {a.name.split(".")[0] for a in node.names}
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                mods.add(node.module.split(".")[0])
    return {m for m in mods if m not in sys.stdlib_module_names and m != "swapper"}


def test_every_imported_module_comes_with_the_install_or_an_extra():
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    core = _names(project["dependencies"])
    extras = set().union(*(_names(project["optional-dependencies"][e]) for e in OPTIONAL))
    dists = packages_distributions()
    missing = {}
    for module in sorted(_imported_modules()):
        for dist in (d.lower() for d in dists.get(module, [module])):
            if dist not in core and dist not in extras and TRANSITIVE.get(dist) not in core:
                missing[module] = dist
    assert not missing, f"imported but not installed by `pip install -e .` nor an extra: {missing}"
    assert "torch" not in _imported_modules()  # the package never imports torch (demo rebuild only)
