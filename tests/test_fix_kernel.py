"""The compiled fix-log checks (livematch.core._fix_kernel) against numpy's own expressions."""

from __future__ import annotations

import numpy as np

from livematch.core._fix_kernel import all_within


def test_all_within_answers_as_numpy() -> None:
    # reference: numpy's vectorised squared distances and max (the tracker's former lines)
    rng = np.random.default_rng(5)
    xy = rng.normal(0.0, 10.0, (40, 2))
    for lo in range(0, 40, 3):
        for hi in range(lo + 1, 41, 4):
            for hx, hy in ((0.0, 0.0), (5.0, -3.0), (30.0, 30.0)):
                for r2 in (25.0, 400.0, 2500.0, 9e4):
                    part = xy[lo:hi]
                    d2 = (part[:, 0] - hx) ** 2 + (part[:, 1] - hy) ** 2
                    want = not float(d2.max()) > r2
                    assert all_within(xy, lo, hi, hx, hy, r2) == want


def test_all_within_on_the_boundary_and_nan() -> None:
    xy = np.array([[3.0, 4.0], [0.0, 0.0]])
    assert all_within(xy, 0, 2, 0.0, 0.0, 25.0)  # 3-4-5: exactly on the circle is within
    assert not all_within(xy, 0, 2, 0.0, 0.0, 24.999)
    nan = np.array([[np.nan, 0.0], [0.0, 0.0]])
    d2 = (nan[:, 0]) ** 2 + (nan[:, 1]) ** 2
    assert all_within(nan, 0, 2, 0.0, 0.0, 1.0) == (not float(d2.max()) > 1.0)
