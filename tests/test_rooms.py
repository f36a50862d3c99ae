"""The package's rooms and the direction of their imports (see DEVELOPERS.md, Architecture).

Every module's imports are read with the standard library's ``ast`` (module-level and
inside functions alike); no module is imported for it. The rules:
- no import cycle between modules;
- each room imports only the rooms before it (``ROOM_IMPORTS``);
- third-party libraries only where ``LIBRARIES`` allows them: above all, ``core`` holds
  numerics on numpy arrays and imports no xarray, netCDF4, matplotlib or dask.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import upscale

PACKAGE = Path(upscale.__file__).parent
BASE = {"upscale._runtime", "upscale.errors", "upscale.about"}
ROOMS = ("core", "io", "scale", "checks", "report", "gallery", "cli")
ROOM_IMPORTS = {
    "base": {"base"},
    "core": {"base", "core"},
    "io": {"base", "core", "io"},
    "scale": {"base", "core", "io", "scale"},
    "checks": {"base", "core", "io", "checks"},
    "report": {"base", "core", "io", "checks", "report"},
    "gallery": {"base", "core", "io", "gallery"},
    "cli": {"base", *ROOMS},
    "api": {"base", *ROOMS},  # upscale/__init__.py: the public names, loaded lazily
}
NUMERIC = {"numpy", "scipy", "numba", "pyamg"}
LIBRARIES = {
    "base": set(),
    "core": NUMERIC,
    "io": NUMERIC | {"xarray", "netCDF4", "dask"},  # dask: lazily read fields, checked slab by slab
    "scale": NUMERIC | {"xarray", "netCDF4", "dask", "distributed", "cloudpickle"},
    "checks": NUMERIC | {"xarray", "threadpoolctl"},  # threadpoolctl: one BLAS thread per fine solve
    "report": NUMERIC | {"xarray", "matplotlib"},
    "gallery": NUMERIC | {"xarray", "dask"},
    "cli": None,  # anything
    "api": set(),
}


def module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def modules() -> dict[str, Path]:
    return {module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def imports(name: str, path: Path, known: set[str]) -> tuple[set[str], set[str]]:
    """(modules of the package, top-level third-party packages) that ``path`` imports."""
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    inside, outside = set(), set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                stem = ".".join(base + ([node.module] if node.module else []))
            else:
                stem = node.module
            # "from .pkg import module" names a module; "from .module import name" does not
            targets = [f"{stem}.{a.name}" if f"{stem}.{a.name}" in known else stem for a in node.names]
        else:
            continue
        for target in targets:
            if target.split(".")[0] == "upscale":
                inside.add(target)
            elif target.split(".")[0] not in sys.stdlib_module_names and target != "__future__":
                outside.add(target.split(".")[0])
    inside.discard(name)
    return inside, outside


def room(name: str) -> str:
    if name == "upscale":
        return "api"
    if name in BASE:
        return "base"
    parts = name.split(".")
    assert len(parts) >= 2 and parts[1] in ROOMS, f"{name} is in no room: move it into one of {ROOMS}"
    return parts[1]


def graph() -> dict[str, set[str]]:
    found = modules()
    known = set(found)
    return {name: imports(name, path, known)[0] for name, path in found.items()}


def cycles(edges: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan 1972)."""
    index, low, stack, on_stack, out = {}, {}, [], set(), []

    def visit(v):
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in edges.get(v, ()):
            if w not in edges:
                continue
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
                out.append(sorted(component))

    for v in sorted(edges):
        if v not in index:
            visit(v)
    return out


def test_no_import_cycles():
    found = cycles(graph())
    assert not found, f"import cycles: {found}"


def test_rooms_import_only_the_rooms_before_them():
    wrong = []
    for name, targets in graph().items():
        allowed = ROOM_IMPORTS[room(name)]
        wrong += [f"{name} imports {t}" for t in sorted(targets)
                  if t not in ("upscale",) and room(t) not in allowed]
    assert not wrong, "\n".join(wrong)


def test_third_party_libraries_only_where_allowed():
    found = modules()
    wrong = []
    for name, path in found.items():
        allowed = LIBRARIES[room(name)]
        if allowed is None:
            continue
        _, outside = imports(name, path, set(found))
        wrong += [f"{name} imports {lib}" for lib in sorted(outside - allowed)]
    assert not wrong, "\n".join(wrong)


def test_the_checks_above_see_a_cycle_and_a_wrong_direction():
    """Positive controls: the rules catch what they are for."""
    assert cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert room("upscale.core.partition") == "core" and "io" not in ROOM_IMPORTS["core"]


def test_core_imports_without_xarray_or_plotting():
    """Importing every core module in a fresh interpreter loads none of the outer libraries."""
    core = [n for n in modules() if n.startswith("upscale.core")]
    code = ("import sys\n" + "".join(f"import {n}\n" for n in core)
            + "print(','.join(sorted(m for m in ('xarray', 'netCDF4', 'matplotlib', 'dask') if m in sys.modules)))")
    loaded = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert len(core) >= 10
    assert loaded == "", f"importing upscale.core loaded {loaded}"
