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

from livematch.core.frechet import (
    discrete_frechet_distance,
    frechet_decide,
    frechet_distance,
    hausdorff_distance,
)

__version__ = "0.1.0"

__all__ = [
    "__version__",
    "discrete_frechet_distance",
    "frechet_decide",
    "frechet_distance",
    "hausdorff_distance",
]
