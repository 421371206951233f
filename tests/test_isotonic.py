"""``isotonic_fit``: the least-squares non-decreasing fit, with a constant lower bound.

Outside reference: SciPy's ``scipy.optimize.isotonic_regression`` (SciPy >= 1.12; its
own pool-adjacent-violators implementation) on the same random data.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import isotonic_regression

from livematch.core.isotonic import isotonic_fit


@pytest.mark.parametrize("seed", range(20))
def test_isotonic_fit_equals_scipy_on_random_data(seed: int) -> None:
    """The fit equals SciPy's isotonic regression (increasing, equal weights)."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 80))
    # a slow drive's distances with GPS-like jitter: many violations to pool
    y = np.cumsum(rng.uniform(0.0, 2.0, n)) + rng.normal(0.0, 4.0, n)
    expected = isotonic_regression(y, increasing=True).x  # scipy
    np.testing.assert_allclose(isotonic_fit(y), expected, rtol=0, atol=1e-9)


@pytest.mark.parametrize("seed", range(20))
def test_isotonic_fit_lower_bound_equals_the_bounded_optimum(seed: int) -> None:
    """Clipping the fit at the bound gives the least-squares non-decreasing fit bounded
    below: SciPy's fit with the bound prepended as an observation of overwhelming weight
    (which every fitted value then lies on or above)."""
    rng = np.random.default_rng(100 + seed)
    n = int(rng.integers(1, 60))
    y = np.cumsum(rng.uniform(0.0, 1.0, n)) + rng.normal(0.0, 5.0, n)
    free = isotonic_fit(y)
    lower = float(rng.uniform(free[0], free[-1] + 1.0))  # (may lie above every value)
    weights = np.concatenate([[1e12], np.ones(n)])
    bounded = isotonic_regression(np.concatenate([[lower], y]), weights=weights).x[1:]  # scipy
    got = isotonic_fit(y, lower)
    np.testing.assert_allclose(got, bounded, rtol=0, atol=1e-6)
    assert got.min() >= lower
    # and the bound did act on this data (the unconstrained fit went below it)
    assert free.min() < lower


def test_isotonic_fit_degenerate_inputs() -> None:
    """An empty input, one value, a non-decreasing input (unchanged) and a falling one
    (its mean everywhere)."""
    assert isotonic_fit([]).tolist() == []
    assert isotonic_fit([4.0]).tolist() == [4.0]
    assert isotonic_fit([1.0, 1.0, 2.0, 5.0]).tolist() == [1.0, 1.0, 2.0, 5.0]
    assert isotonic_fit([3.0, 2.0, 1.0]).tolist() == [2.0, 2.0, 2.0]
    assert isotonic_fit([3.0, 2.0, 1.0], lower=2.5).tolist() == [2.5, 2.5, 2.5]
