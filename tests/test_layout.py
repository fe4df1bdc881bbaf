"""The package layout: imports go down the data flow only, and no module imports itself back.

The layers are those of the contributor guide's map (DEVELOPERS.md); imports under
``if TYPE_CHECKING:`` are annotations only and are not counted.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import axiscope

PACKAGE = Path(axiscope.__file__).parent

#: Lower numbers are lower in the stack; a module may import its own layer or lower ones.
LAYERS = {
    "errors": 0,
    "defaults": 0,
    "io": 1,
    "core": 2,
    "model": 3,
    "fitting": 4,
    "explain": 5,
    "scoring": 5,
    "decide": 5,
    "report": 6,
    "estimator": 6,
    "demo": 6,
    "cli": 7,
}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _imports(path: Path) -> set[str]:
    """Modules of the package that ``path`` imports at run time (anywhere in the file)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = _module_name(path).split(".")
    if path.name != "__init__.py":
        package = package[:-1]
    skip: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            skip.update(id(n) for child in node.body for n in ast.walk(child))
    found = set()
    for node in ast.walk(tree):
        if id(node) in skip:
            continue
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[: len(package) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if target.split(".")[0] != "axiscope":
                continue
            for alias in node.names:  # "from . import x" may name a submodule
                candidate = f"{target}.{alias.name}"
                found.add(candidate if _exists(candidate) else target)
        elif isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.split(".")[0] == "axiscope")
    return {m for m in found if m != "axiscope"}


def _exists(module: str) -> bool:
    rel = Path(*module.split(".")[1:])
    return (PACKAGE / rel).with_suffix(".py").is_file() or (PACKAGE / rel / "__init__.py").is_file()


def _layer(module: str) -> int:
    parts = module.split(".")
    return LAYERS[parts[1]] if len(parts) > 1 else -1


def _graph() -> dict[str, set[str]]:
    return {_module_name(p): _imports(p) for p in sorted(PACKAGE.rglob("*.py"))}


def test_every_subpackage_has_a_layer():
    tops = {_module_name(p).split(".")[1] for p in PACKAGE.rglob("*.py") if p.parent != PACKAGE or p.name != "__init__.py"}
    assert tops <= set(LAYERS), f"modules without a layer: {sorted(tops - set(LAYERS))}"


def test_imports_go_down_the_stack():
    upward = [
        f"{module} → {target}"
        for module, targets in _graph().items()
        for target in targets
        if module != "axiscope" and _layer(target) > _layer(module)
    ]
    assert not upward, "imports going up the stack:\n" + "\n".join(upward)


def test_no_import_cycle():
    graph = _graph()
    graph.pop("axiscope", None)  # the top-level package only re-exports, lazily
    state: dict[str, int] = {}
    path: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        path.append(node)
        for nxt in sorted(graph.get(node, ())):
            if nxt == node or nxt not in graph or (nxt.startswith(node + ".")):
                continue  # a package importing its own submodules to re-export them
            if state.get(nxt) == 1:
                return path[path.index(nxt):] + [nxt]
            if nxt not in state and (cycle := visit(nxt)):
                return cycle
        state[node] = 2
        path.pop()
        return None

    for node in sorted(graph):
        if node not in state and (cycle := visit(node)):
            raise AssertionError("import cycle: " + " → ".join(cycle))


def test_importing_the_package_is_light():
    """``import axiscope`` and the command line's module load no numerical library."""
    code = (
        "import sys, axiscope, axiscope.cli\n"
        "heavy = sorted(m for m in ('numpy', 'dask', 'h5py', 'zarr', 'pandas', 'scipy', 'sklearn') if m in sys.modules)\n"
        "print(','.join(heavy))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
