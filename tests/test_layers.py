"""The core stays pure: it imports no shell library (asyncio, MQTT, Redis, HTTP, files)."""

from __future__ import annotations

import ast
from pathlib import Path

CORE = Path(__file__).resolve().parent.parent / "livematch" / "core"
ALLOWED_THIRD_PARTY = {"numpy", "shapely", "networkx", "pyproj", "numba"}
ALLOWED_STDLIB = {"__future__", "bisect", "collections", "dataclasses", "functools", "heapq",
                  "itertools", "json", "math", "operator", "typing", "zlib", "enum", "re",
                  "struct",  # struct: bytes <-> numbers, no I/O (the tracker's kept answer)
                  "array"}  # array: unboxed numbers, no I/O (the tracker's fix times)
FORBIDDEN_CALLS = {"open", "print", "input"}


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    out: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out.update(a.name.split(".")[0] for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            out.add(node.module.split(".")[0])
    return out


def test_layers_core_imports_only_allowed_modules() -> None:
    """livematch/core/ imports numpy, shapely, networkx, pyproj, numba and plain stdlib only."""
    files = sorted(CORE.rglob("*.py"))
    assert files
    for path in files:
        extra = _imports(path) - ALLOWED_THIRD_PARTY - ALLOWED_STDLIB - {"livematch"}
        assert not extra, f"{path.relative_to(CORE.parent)} imports {sorted(extra)}"


def test_layers_core_reads_no_clock_and_opens_no_file() -> None:
    """No wall clock (time, datetime) and no file or console I/O in the core."""
    for path in sorted(CORE.rglob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
                assert node.func.id not in FORBIDDEN_CALLS, f"{path.name}: {node.func.id}()"
        assert not {"time", "datetime", "os", "asyncio", "socket"} & _imports(path), path.name
