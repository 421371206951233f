"""Least-squares fits under a non-decreasing constraint (isotonic regression).

A vehicle's true position only moves forward along the path it drives, so the final
answers of a committed stretch, read as distances along its committed path, are a noisy
non-decreasing sequence. Their least-squares non-decreasing fit is the most likely such
sequence under independent Gaussian error of one spread: it pools the jitter of a
standing or slow vehicle instead of reporting it as driving back and forth.
(``MatchSettings.monotone_final``; :meth:`livematch.core.tracker.Tracker._monotone_final`.)
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt


def isotonic_fit(values: npt.ArrayLike, lower: float = -np.inf,
                 weights: npt.ArrayLike | None = None) -> npt.NDArray[np.float64]:
    """The non-decreasing sequence nearest ``values`` in least squares, none below ``lower``.

    Pool adjacent violators: walk the values keeping a stack of blocks (sum, count);
    a new value that lies below the mean of the block before it is merged into it, and
    merging goes on while the merged mean lies below the block before. Every block's
    fitted value is its mean. O(n): each value is pushed once and merged at most once.

    The constant lower bound is met by clipping the unconstrained fit: for the weighted
    L2 fit, clipping the isotonic fit at a constant is the isotonic fit under that
    bound (the blocks whose mean lies below the bound all move to it; checked against
    SciPy in ``tests/test_isotonic.py``).

    Args:
        values: the observations in order (metres along a path); any length.
        lower: no fitted value below this (``-inf``: no bound).
        weights: a positive weight per value (``None``: all 1).

    Returns:
        The fitted values, as float64, the same length as ``values``.

    Example (a standing vehicle's jitter is pooled; an empty input stays empty):
        >>> isotonic_fit([0.0, 3.0, 1.0, 2.0, 6.0]).tolist()
        [0.0, 2.0, 2.0, 2.0, 6.0]
        >>> isotonic_fit([0.0, 3.0, 1.0], lower=2.5).tolist()
        [2.5, 2.5, 2.5]
        >>> isotonic_fit([]).tolist()
        []
    """
    y = np.asarray(values, dtype=np.float64).ravel()
    n = len(y)
    w = [1.0] * n if weights is None else np.asarray(weights, dtype=np.float64).tolist()
    sums: list[float] = []  # per block: weighted sum, total weight, values
    totals: list[float] = []
    counts: list[int] = []
    for v, wv in zip(y.tolist(), w, strict=True):
        s, tw, c = v * wv, wv, 1
        # merge while the new block's mean lies below the previous block's mean
        while sums and s * totals[-1] < sums[-1] * tw:
            s += sums.pop()
            tw += totals.pop()
            c += counts.pop()
        sums.append(s)
        totals.append(tw)
        counts.append(c)
    out = np.repeat(np.asarray([s / tw for s, tw in zip(sums, totals, strict=True)],
                               dtype=np.float64), np.asarray(counts, dtype=np.int64))
    if n and lower > -np.inf:
        np.maximum(out, lower, out=out)
    return out
