"""livematch: live map matching and alerts for vehicle position feeds.

The public API of the exact Fréchet toolkit, for polylines given as (n, 2) arrays in
metres::

    from livematch import frechet_decide, frechet_distance
    from livematch import discrete_frechet_distance, hausdorff_distance
"""

from __future__ import annotations

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
