"""Exact Fréchet distance between polylines, its decision procedure, and two bounds.

Curves are (n, 2) float arrays in metres (any projected CRS), validated by
:func:`livematch.core.geometry.as_polyline`. A single point is a valid curve, and repeated
points (zero-length segments) are allowed everywhere.

- :func:`frechet_decide` — is the continuous Fréchet distance at most ``eps``? The
  free-space sweep of Alt & Godau (1995), O(mn) at worst.
- :func:`frechet_distance` — the continuous Fréchet distance, exact up to a relative
  1e-10: the smallest critical value the decision accepts.
- :func:`discrete_frechet_distance` — Eiter & Mannila (1994): couplings of vertices only.
  An upper bound on the continuous distance.
- :func:`hausdorff_distance` — the symmetric vertex-to-polyline Hausdorff distance (the
  value GEOS computes). A lower bound on the continuous Fréchet distance.

So, for any two curves: hausdorff <= frechet <= discrete frechet.

References:
    H. Alt, M. Godau, "Computing the Fréchet distance between two polygonal curves",
    Int. J. Computational Geometry & Applications 5 (1995) 75–91.
    T. Eiter, H. Mannila, "Computing discrete Fréchet distance", Tech. Report
    CD-TR 94/64, TU Vienna (1994).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
import numpy.typing as npt

from livematch.core import _frechet_kernels as _k
from livematch.core.geometry import FloatArray, as_polyline

__all__ = [
    "discrete_frechet_distance",
    "frechet_decide",
    "frechet_distance",
    "hausdorff_distance",
]

# A candidate value c counts as feasible when the decision accepts c * (1 + _REL_TOL).
# Candidates are computed with rounding, so the exact critical value may sit an ulp
# above its computed copy; this slack keeps the search from skipping past it. The
# result is therefore exact up to this relative tolerance.
_REL_TOL = 1e-10

# Step 2 of frechet_distance narrows the bracket by bisection down to this relative width
# before collecting candidates from it.
_BRACKET_TOL = 1e-4

# Above this many (segment, vertex pair) combinations to inspect for type-c critical
# values, frechet_distance bisects on eps instead (see its docstring).
_MAX_PAIRS = 20_000_000


def _prepare(p: npt.ArrayLike, q: npt.ArrayLike) -> tuple[FloatArray, FloatArray]:
    """Validate both curves and shift them to p's first vertex as the origin.

    Fréchet distances are translation invariant; working near the origin keeps the
    rounding error relative to the distances, not to the magnitude of projected
    coordinates (UTM northings are ~5e6 m).
    """
    a = as_polyline(p)
    b = as_polyline(q)
    origin = a[0].copy()
    return np.ascontiguousarray(a - origin), np.ascontiguousarray(b - origin)


def frechet_decide(p: npt.ArrayLike, q: npt.ArrayLike, eps: float) -> bool:
    """Whether the continuous Fréchet distance between p and q is at most ``eps`` metres.

    The free space {(s, t) : |P(s) - Q(t)| <= eps} meets every cell (segment of p times
    segment of q) in a convex set, so each cell boundary carries one free interval,
    found by solving a quadratic. The answer is yes exactly when a path monotone in both
    parameters joins the two corners inside the free space; a row-by-row sweep of the
    reachable parts of the boundaries decides that in O(mn) time and O(m) memory (only
    the reachable band of cells is visited). See Alt & Godau (1995). It compares squared
    distances, so gaps below ~1e-154 m (far below any physical meaning) count as 0.

    Args:
        p: the first curve, an (n, 2) array in metres; a single point is a curve.
        q: the second curve, the same way.
        eps: the threshold in metres, finite and >= 0.

    Raises:
        ValueError: a curve is not an (n >= 1, 2) finite array, or eps is negative/NaN.

    Examples:
        >>> frechet_decide([[0, 0], [10, 0]], [[0, 3], [10, 3]], 3.0)
        True
        >>> frechet_decide([[0, 0], [10, 0]], [[0, 3], [10, 3]], 2.999)
        False
        >>> frechet_decide([[5, 0]], [[0, 0], [10, 0]], 5.0)  # one point: farthest vertex
        True
    """
    eps_f = float(eps)
    if not (math.isfinite(eps_f) and eps_f >= 0.0):
        raise ValueError(f"eps must be a finite distance >= 0 in metres, got {eps!r}")
    a, b = _prepare(p, q)
    return bool(_k.decide(a, b, eps_f))


def discrete_frechet_distance(p: npt.ArrayLike, q: npt.ArrayLike) -> float:
    """Return the discrete Fréchet distance of the vertex sequences of p and q, in metres.

    The smallest, over couplings of the two vertex sequences (monotone in both, each
    vertex used), of the largest distance between coupled vertices; the dynamic program
    of Eiter & Mannila (1994), O(mn). It ignores the segments between vertices, so it is
    an upper bound on the continuous Fréchet distance, and it converges to it as both
    curves are densified. It is what ``shapely.frechet_distance`` (GEOS) without
    ``densify`` computes, except that GEOS 3.14.1 returns a larger value on some inputs
    (about 2 % of random pairs of 2-11 vertices, never a smaller one; see the tests).

    Examples:
        >>> discrete_frechet_distance([[0, 0], [10, 0]], [[0, 3], [10, 3]])
        3.0
        >>> discrete_frechet_distance([[0, 0], [1, 1], [2, 0]], [[0, 0], [2, 0]])  # vs 1.0
        1.4142135623730951
        >>> discrete_frechet_distance([[0, 4]], [[3, 0], [3, 0]])  # single point
        5.0
    """
    a, b = _prepare(p, q)
    return float(_k.discrete_frechet(a, b))


def hausdorff_distance(p: npt.ArrayLike, q: npt.ArrayLike) -> float:
    """Symmetric vertex-to-polyline Hausdorff distance between p and q, in metres.

    The largest distance from a vertex of either curve to the other curve taken as a
    point set (all its segments). This is the value GEOS computes
    (``shapely.hausdorff_distance`` without ``densify``). It can fall short of the
    Hausdorff distance of the two polylines as continuous point sets, whose maximum may
    lie inside a segment (at a point equidistant from two parts of the other curve); it
    is still a lower bound on the Fréchet distance, because every point of one curve,
    vertices included, is matched to a point of the other within that distance.

    Examples:
        >>> hausdorff_distance([[0, 0], [10, 0]], [[10, 0], [0, 0]])  # same set, reversed
        0.0
        >>> hausdorff_distance([[0, 0], [4, 0]], [[0, 0], [2, 2], [4, 0]])
        2.0
        >>> hausdorff_distance([[3, 4]], [[0, 0]])
        5.0
    """
    a, b = _prepare(p, q)
    return float(math.sqrt(max(_max_vertex_dist2(a, b), _max_vertex_dist2(b, a))))


def _max_vertex_dist2(a: FloatArray, b: FloatArray) -> float:
    """Largest squared distance from a vertex of a to the polyline b."""
    if b.shape[0] == 1:
        return float(np.max(np.sum((a - b[0]) ** 2, axis=1)))
    return float(np.max(_k.vertex_polyline_dist2(a, b)))


def frechet_distance(p: npt.ArrayLike, q: npt.ArrayLike) -> float:
    """Return the continuous Fréchet distance between polylines p and q, in metres.

    The smallest eps at which :func:`frechet_decide` says yes ("a man and his dog on a
    leash of length eps, both walking forward"). It is one of the critical values of
    Alt & Godau (1995): (a) a distance between the start points or the end points,
    (b) a distance from a vertex of one curve to a segment of the other, (c) the
    distance from two vertices of one curve to the point of a segment of the other that
    is equidistant from both. This function finds it as follows:

    1. Lower bound: max(endpoint distances, vertex-to-polyline distances both ways)
       (every point must be matched within eps). It is itself a critical value, and
       for similar curves often the answer: one decision settles that.
    2. Bracket with the decision alone: double from the lower bound until accepted,
       then bisect until the bracket (lo, hi] is within a relative 1e-4. (The diagonal
       of the two curves' bounding box is always accepted.)
    3. All type (a)/(b) values in (lo, hi] are sorted (numpy) and binary-searched with
       the decision, giving consecutive values b_lo (rejected) < b_hi (accepted).
    4. If the answer is below b_hi it is of type (c) in (b_lo, b_hi). Those candidates
       are enumerated exactly, but only for vertex pairs k < l lying in one run of
       consecutive vertices all within b_hi of the segment (a monotone path that crosses
       the segment's row from column k to column l must pass every column between),
       then sorted and searched with the decision like step 3.
    5. Only if step 4 would inspect more than 20 million (segment, pair) combinations
       (curves bunched within b_hi of each other over long stretches) does it bisect on
       eps between b_lo and b_hi instead, until the bracket is within a relative 1e-10.

    A candidate c is accepted when the decision accepts c * (1 + 1e-10), to absorb the
    rounding in computing c, so the result is exact up to a relative 1e-10. The scans
    for candidates are O(mn) at worst but skip blocks of 16 segments whose bounding box
    is out of range; a decision visits only the reachable band of the free space.

    Args:
        p: the first curve, an (n, 2) array in metres; a single point is a curve.
        q: the second curve, the same way.

    Raises:
        ValueError: a curve is not an (n >= 1, 2) finite array.

    Examples:
        >>> frechet_distance([[0, 0], [10, 0]], [[0, 3], [10, 3]])  # parallel, 3 m apart
        3.0
        >>> frechet_distance([[0, 0], [10, 0]], [[10, 0], [0, 0]])  # reversed: ends 10 apart
        10.0
        >>> frechet_distance([[0, 0], [6, 0], [4, 0], [10, 0]], [[0, 0], [10, 0]])  # backtrack
        1.0
        >>> frechet_distance([[2, 0]], [[0, 0], [0, 0], [5, 0]])  # one point, repeated vertex
        3.0
    """
    a, b = _prepare(p, q)
    m, n = a.shape[0], b.shape[0]
    if m == 1 or n == 1:
        # The point is matched to all of the other curve; the farthest point is a vertex.
        diff = a[:, None, :] - b[None, :, :]
        return float(math.sqrt(float(np.max(np.sum(diff * diff, axis=2)))))

    ends = max(math.dist(a[0], b[0]), math.dist(a[-1], b[-1]))
    lower = max(ends, math.sqrt(_max_vertex_dist2(a, b)), math.sqrt(_max_vertex_dist2(b, a)))

    def feasible(eps: float) -> bool:
        return bool(_k.decide(a, b, eps * (1.0 + _REL_TOL)))

    # Similar curves often end here: the farthest vertex from the other curve (or an
    # endpoint pair) is the answer, and one decision proves it.
    if feasible(lower):
        return lower

    # Step 2: bracket (lo, hi] by the decision alone (decisions are cheap: the reachable
    # band of the free space is narrow near the answer).
    span = np.concatenate((a, b))
    top = math.hypot(*(span.max(axis=0) - span.min(axis=0)))  # any matching stays within
    lo = lower
    hi = 2.0 * lower if lower > 0.0 else top * 2.0**-20
    while hi < top and not feasible(hi):
        lo = hi
        hi *= 2.0
    hi = min(hi, top)
    while hi - lo > _BRACKET_TOL * hi:
        mid = 0.5 * (lo + hi)
        if feasible(mid):
            hi = mid
        else:
            lo = mid

    # Step 3: types (a) and (b) within (lo, hi]; hi closes the list as a value known to
    # be feasible (it is >= the answer, up to the tolerance).
    b_ab = _collect(_k.vertex_segment_values, a, b, lo, hi)
    b_ba = _collect(_k.vertex_segment_values, b, a, lo, hi)
    assert b_ab is not None and b_ba is not None  # this kernel never declines
    values = np.unique(np.concatenate((b_ab, b_ba)))
    b_lo, b_hi = _search(np.append(values[values < hi], hi), feasible, lo)

    # Step 4: type (c) strictly between the two.
    cand_ab = _collect(_k.equidistant_values, a, b, b_lo, b_hi, _MAX_PAIRS)
    cand_ba = _collect(_k.equidistant_values, b, a, b_lo, b_hi, _MAX_PAIRS)
    if cand_ab is not None and cand_ba is not None:
        c = np.unique(np.concatenate((cand_ab, cand_ba)))
        c = c[c < b_hi]
        if c.size == 0:
            return b_hi
        return _search(np.append(c, b_hi), feasible, b_lo)[1]

    # Step 5: bisection fallback.
    lo, hi = b_lo, b_hi
    while hi - lo > _REL_TOL * hi:
        mid = 0.5 * (lo + hi)
        if not lo < mid < hi:
            break
        if _k.decide(a, b, mid):
            hi = mid
        else:
            lo = mid
    return hi


def _collect(kernel: Callable[..., int], *args: object) -> FloatArray | None:
    """Run a candidate kernel with an output buffer, once more if it was too small.

    Returns the values, or None when the kernel declined (returned -1).
    """
    out = np.empty(4096)
    count = kernel(*args, out)
    if count < 0:
        return None
    if count > out.size:
        out = np.empty(count)
        count = kernel(*args, out)
    return out[:count]


def _search(
    values: FloatArray, feasible: Callable[[float], bool], below: float
) -> tuple[float, float]:
    """Binary search of sorted ``values`` whose last entry is known to be feasible.

    Returns (largest rejected value, or ``below`` if none; smallest accepted value).
    """
    lo, hi = -1, values.size - 1
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if feasible(float(values[mid])):
            hi = mid
        else:
            lo = mid
    return (float(values[lo]) if lo >= 0 else below), float(values[hi])
