"""A checksum of a kernel module's code, for numba's disk cache across files.

numba's disk cache notices a change to a cached function's own file only, not to a
compiled function it calls in another file. A kernel that calls into another file's
kernels is therefore made by a factory that takes :func:`code_key` of that file as an
argument and uses it as a closure constant, which numba's cache does key on: a changed
callee means a new compilation instead of a stale one. Pure: computed from the loaded
code objects, no file is read.
"""

from __future__ import annotations

import zlib
from typing import Any

_CodeType = type((lambda: 0).__code__)  # types.CodeType without the import (core layers)


def _code_bytes(code: Any) -> bytes:
    """A code object's bytecode, names and constants (nested code recursively), as bytes."""
    parts = [code.co_code, repr(code.co_names).encode()]
    for c in code.co_consts:
        parts.append(_code_bytes(c) if isinstance(c, _CodeType) else repr(c).encode())
    return b"\x00".join(parts)


def code_key(module: Any) -> int:
    """Checksum of a kernel module: its compiled functions' code and its number constants.

    Stable across processes (no addresses in it); changes when a compiled function's
    bytecode, names or constants change, or a module-level number does.

    >>> import livematch.core._sweep_kernel as k
    >>> code_key(k) == code_key(k), isinstance(code_key(k), int)
    (True, True)
    >>> import types
    >>> code_key(types.ModuleType("empty"))  # degenerate: nothing compiled, no numbers
    0
    """
    parts: list[bytes] = []
    for name, value in sorted(vars(module).items()):
        if hasattr(value, "py_func"):  # a numba dispatcher
            parts.append(name.encode() + b"=" + _code_bytes(value.py_func.__code__))
        elif isinstance(value, int | float) and not isinstance(value, bool):
            parts.append(f"{name}={value!r}".encode())
    return zlib.crc32(b"\x01".join(parts))
