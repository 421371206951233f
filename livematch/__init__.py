"""livematch: live map matching and alerts for vehicle position feeds.

The public API of the exact Fréchet toolkit, for polylines given as (n, 2) arrays in
metres::

    from livematch import frechet_decide, frechet_distance
    from livematch import discrete_frechet_distance, hausdorff_distance

The per-fix modules run compiled when the install compiled them (mypyc, ``setup.py``).
With ``LIVEMATCH_PURE_PYTHON=1`` in the environment of a process, that process imports
every livematch module from its ``.py`` source instead (same outputs, slower): for a
debugger, a profiler that reads Python frames, or a test that replaces a function
inside a compiled module (``livematch.native``).
"""

from __future__ import annotations

import os

if os.environ.get("LIVEMATCH_PURE_PYTHON", "") not in ("", "0"):
    from livematch.native import prefer_source

    prefer_source()

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from livematch.core.frechet import (
        discrete_frechet_distance,
        frechet_decide,
        frechet_distance,
        hausdorff_distance,
    )

__version__ = "0.1.0"

_TOOLKIT = frozenset({"discrete_frechet_distance", "frechet_decide", "frechet_distance",
                      "hausdorff_distance"})


def __getattr__(name: str) -> Any:
    """The toolkit's functions, imported on first use (PEP 562).

    The toolkit's kernels are numba's (JIT): a worker whose own kernels were compiled
    ahead of time (``livematch.core._jit``) then never imports numba by importing
    livematch.
    """
    if name in _TOOLKIT:
        from livematch.core import frechet

        return getattr(frechet, name)
    raise AttributeError(f"module 'livematch' has no attribute {name!r}")

__all__ = [
    "__version__",
    "discrete_frechet_distance",
    "frechet_decide",
    "frechet_distance",
    "hausdorff_distance",
]
