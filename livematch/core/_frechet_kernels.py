"""Compiled inner loops for :mod:`livematch.core.frechet` (numba, CPU only).

Private: callers go through :mod:`livematch.core.frechet`, which validates the input and
shifts both curves to a local origin first. Every kernel takes C-contiguous float64
(n, 2) arrays in metres. Empty free intervals are written as ``(2.0, -1.0)`` (lo > hi).

Each kernel is compiled on first use and cached on disk (``cache=True``), so the first
call in a fresh environment pays the compile time once.
"""

from __future__ import annotations

import math

import numba
import numpy as np

# Sentinels for an empty interval on a cell boundary: lo > hi.
_EMPTY_LO = 2.0
_EMPTY_HI = -1.0


@numba.njit(cache=True)
def free_interval(
    ax: float, ay: float, bx: float, by: float, px: float, py: float, eps2: float
) -> tuple[float, float]:
    """Parameters x in [0, 1] with ``|a + x (b - a) - p|^2 <= eps2``, as (lo, hi).

    The same interval as :func:`livematch.core.geometry.segment_param_interval`, computed
    for robustness rather than from the raw quadratic: the endpoint tests are exact
    comparisons of squared distances (so the four boundaries meeting at a cell corner
    agree about that corner), and the half-width comes from the perpendicular distance
    (a cross product), which avoids the cancellation in ``b^2 - 4ac`` near tangency.
    """
    dx = bx - ax
    dy = by - ay
    fx = px - ax
    fy = py - ay
    gx = px - bx
    gy = py - by
    in0 = fx * fx + fy * fy <= eps2
    in1 = gx * gx + gy * gy <= eps2
    if in0 and in1:
        return 0.0, 1.0  # a disc is convex: both ends inside means all of it
    a = dx * dx + dy * dy
    if a <= 0.0:
        return _EMPTY_LO, _EMPTY_HI  # zero-length segment with its point outside
    cross = dx * fy - dy * fx
    r = eps2 - cross * cross / a
    if r < 0.0:
        if not (in0 or in1):
            return _EMPTY_LO, _EMPTY_HI
        r = 0.0  # rounding: an endpoint is inside, so the line is within eps
    t0 = (fx * dx + fy * dy) / a
    w = math.sqrt(r / a)
    if in0:
        lo = 0.0
        hi = min(max(t0 + w, 0.0), 1.0)
        return lo, hi
    if in1:
        return min(max(t0 - w, 0.0), 1.0), 1.0
    lo = t0 - w
    hi = t0 + w
    # Neither end is inside, so a non-empty interval lies inside (0, 1); clamp rounding.
    if hi < 0.0 or lo > 1.0:
        return _EMPTY_LO, _EMPTY_HI
    return max(lo, 0.0), min(hi, 1.0)


@numba.njit(cache=True)
def decide(p: np.ndarray, q: np.ndarray, eps: float) -> bool:
    """Decide whether the Fréchet distance of p and q is at most eps (Alt & Godau).

    Row-by-row sweep over the free-space diagram. Row j is segment j of q; cell (i, j)
    pairs segment i of p with segment j of q. ``blo/bhi[i]`` hold the reachable part of
    the bottom boundary of cell (i, j) (a parameter along p's segment i), and
    ``llo/lhi`` the reachable part of the left boundary of the current cell (a parameter
    along q's segment j). Only the band of cells that can be reached is visited, so a
    call costs O(m + n + reachable cells), at most O(mn).
    """
    m = p.shape[0]
    n = q.shape[0]
    if not eps >= 0.0:  # also rejects NaN
        return False
    eps2 = eps * eps
    dx0 = p[0, 0] - q[0, 0]
    dy0 = p[0, 1] - q[0, 1]
    dx1 = p[m - 1, 0] - q[n - 1, 0]
    dy1 = p[m - 1, 1] - q[n - 1, 1]
    if dx0 * dx0 + dy0 * dy0 > eps2 or dx1 * dx1 + dy1 * dy1 > eps2:
        return False
    if m == 1 or n == 1:
        # A single point against a curve: every vertex of the curve must be within eps
        # (the farthest point of a polyline from a point is one of its vertices).
        for i in range(m):
            for j in range(n):
                dx = p[i, 0] - q[j, 0]
                dy = p[i, 1] - q[j, 1]
                if dx * dx + dy * dy > eps2:
                    return False
        return True

    blo = np.empty(m - 1)
    bhi = np.empty(m - 1)
    # Bottom row boundary (q's vertex 0): reachable only as one run from the start corner.
    bmin = m
    bmax = -1
    chain = True
    for i in range(m - 1):
        blo[i] = _EMPTY_LO
        bhi[i] = _EMPTY_HI
        if chain:
            lo, hi = free_interval(
                p[i, 0], p[i, 1], p[i + 1, 0], p[i + 1, 1], q[0, 0], q[0, 1], eps2
            )
            if lo == 0.0 and hi >= 0.0:
                blo[i] = 0.0
                bhi[i] = hi
                bmin = min(bmin, i)
                bmax = i
                chain = hi >= 1.0
            else:
                chain = False

    lchain = True  # left edge of the diagram (p's vertex 0) still reachable from the start
    last_right_hi = -1.0
    for j in range(n - 1):
        llo = _EMPTY_LO
        lhi = _EMPTY_HI
        if lchain:
            lo, hi = free_interval(
                q[j, 0], q[j, 1], q[j + 1, 0], q[j + 1, 1], p[0, 0], p[0, 1], eps2
            )
            if lo == 0.0 and hi >= 0.0:
                llo = 0.0
                lhi = hi
                lchain = hi >= 1.0
            else:
                lchain = False
        left = llo <= lhi
        if not left and bmax < 0:
            return False  # nothing reachable in this row, nor above it
        start = 0 if left else bmin
        nbmin = m
        nbmax = -1
        i = start
        finished = False
        while i < m - 1:
            if i > bmax and not left:
                break  # no reachable input for any cell further right in this row
            bottom = blo[i] <= bhi[i]
            if left or bottom:
                tlo, thi = free_interval(
                    p[i, 0], p[i, 1], p[i + 1, 0], p[i + 1, 1], q[j + 1, 0], q[j + 1, 1], eps2
                )
                if not left:
                    tlo = max(tlo, float(blo[i]))
                rlo, rhi = free_interval(
                    q[j, 0], q[j, 1], q[j + 1, 0], q[j + 1, 1], p[i + 1, 0], p[i + 1, 1], eps2
                )
                if not bottom:
                    rlo = max(rlo, llo)
                if tlo <= thi:
                    blo[i] = tlo
                    bhi[i] = thi
                    nbmin = min(nbmin, i)
                    nbmax = i
                else:
                    blo[i] = _EMPTY_LO
                    bhi[i] = _EMPTY_HI
                llo = rlo
                lhi = rhi
                left = llo <= lhi
            else:
                blo[i] = _EMPTY_LO
                bhi[i] = _EMPTY_HI
                llo = _EMPTY_LO
                lhi = _EMPTY_HI
                left = False
            i += 1
            if i == m - 1:
                finished = True
        last_right_hi = lhi if (finished and left) else -1.0
        bmin = nbmin
        bmax = nbmax
    # The end corner is reached through the top edge of the last column or the right edge
    # of the last row (its distance was checked above, so "contains 1" is exact).
    return bhi[m - 2] >= 1.0 or last_right_hi >= 1.0


@numba.njit(cache=True)
def discrete_frechet(p: np.ndarray, q: np.ndarray) -> float:
    """Eiter–Mannila dynamic program over vertex couplings, O(mn) time, O(n) memory."""
    m = p.shape[0]
    n = q.shape[0]
    prev = np.empty(n)
    cur = np.empty(n)
    for i in range(m):
        for j in range(n):
            dx = p[i, 0] - q[j, 0]
            dy = p[i, 1] - q[j, 1]
            d2 = dx * dx + dy * dy
            if i == 0 and j == 0:
                best = d2
            elif i == 0:
                best = cur[j - 1]
            elif j == 0:
                best = prev[0]
            else:
                best = min(float(prev[j]), float(prev[j - 1]), float(cur[j - 1]))
            cur[j] = max(best, d2)
        prev, cur = cur, prev
    # Squared distances throughout: sqrt is monotone, so one root at the end suffices.
    return math.sqrt(prev[n - 1])


@numba.njit(cache=True)
def _segments(
    q: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Segments of q as separate arrays: ax, ay, bx, by, dx, dy, 1/length^2 (0 if none).

    Separate contiguous arrays keep the inner loops below simple for the compiler.
    """
    ax = q[:-1, 0].copy()
    ay = q[:-1, 1].copy()
    bx = q[1:, 0].copy()
    by = q[1:, 1].copy()
    dx = bx - ax
    dy = by - ay
    inv = np.zeros(ax.shape[0])
    for j in range(ax.shape[0]):
        a = dx[j] * dx[j] + dy[j] * dy[j]
        if a > 0.0:
            inv[j] = 1.0 / a
    return ax, ay, bx, by, dx, dy, inv


@numba.njit(cache=True)
def _point_segment_dist2(
    px: float,
    py: float,
    ax: float,
    ay: float,
    bx: float,
    by: float,
    dx: float,
    dy: float,
    inv: float,
) -> float:
    """Squared distance from p to segment a->b (d = b - a, inv = 1/|d|^2 or 0).

    Beyond an end it is the exact squared distance to that end; alongside, the squared
    perpendicular distance from a cross product, which is exactly 0 for a point on the
    segment (a projection parameter would leave a rounding residue there).
    """
    fx = px - ax
    fy = py - ay
    dot = fx * dx + fy * dy
    if dot <= 0.0:
        return fx * fx + fy * fy
    if dot * inv >= 1.0:
        gx = px - bx
        gy = py - by
        return gx * gx + gy * gy
    cross = dx * fy - dy * fx
    return cross * cross * inv


# Runs of this many consecutive segments (or vertices) share a bounding box, so that the
# O(mn) scans below can skip a whole run that is provably too far away.
_BLOCK = 16


@numba.njit(cache=True)
def _block_boxes(x: np.ndarray, y: np.ndarray, npts: int, step: int) -> np.ndarray:
    """Bounding boxes (xmin, xmax, ymin, ymax) of points b*step .. b*step + step (incl.).

    With ``x, y`` the vertices of a polyline, block b covers segments b*step .. b*step +
    step - 1 (whose end points are those vertices); for plain vertex blocks the one
    extra point only enlarges the box, which keeps every test conservative.
    """
    nb = (npts + step - 1) // step
    out = np.empty((nb, 4))
    for b in range(nb):
        i0 = b * step
        i1 = min(i0 + step, x.shape[0] - 1)
        out[b, 0] = x[i0]
        out[b, 1] = x[i0]
        out[b, 2] = y[i0]
        out[b, 3] = y[i0]
        for i in range(i0 + 1, i1 + 1):
            out[b, 0] = min(out[b, 0], x[i])
            out[b, 1] = max(out[b, 1], x[i])
            out[b, 2] = min(out[b, 2], y[i])
            out[b, 3] = max(out[b, 3], y[i])
    return out


@numba.njit(cache=True)
def _box_dist2(box: np.ndarray, b: int, px: float, py: float) -> float:
    """Squared distance from p to box b (0 inside): a lower bound for anything in it."""
    ex = max(box[b, 0] - px, 0.0, px - box[b, 1])
    ey = max(box[b, 2] - py, 0.0, py - box[b, 3])
    return ex * ex + ey * ey


@numba.njit(cache=True)
def vertex_polyline_dist2(p: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Squared distance from each vertex of p to the polyline q (>= 2 points), shape (m,).

    Exact minimum over all segments; blocks of segments whose bounding box is no closer
    than the best distance so far are skipped, and each vertex starts from the segment
    that was nearest to the previous vertex (consecutive vertices are near each other).
    """
    ax, ay, bx, by, dx, dy, inv = _segments(q)
    ns = ax.shape[0]
    box = _block_boxes(q[:, 0].copy(), q[:, 1].copy(), ns, _BLOCK)
    m = p.shape[0]
    out = np.empty(m)
    jbest = 0
    for k in range(m):
        px = p[k, 0]
        py = p[k, 1]
        j = jbest
        best = _point_segment_dist2(px, py, ax[j], ay[j], bx[j], by[j], dx[j], dy[j], inv[j])
        for b in range(box.shape[0]):
            if _box_dist2(box, b, px, py) >= best:
                continue
            for j in range(b * _BLOCK, min((b + 1) * _BLOCK, ns)):
                d2 = _point_segment_dist2(px, py, ax[j], ay[j], bx[j], by[j], dx[j], dy[j], inv[j])
                if d2 < best:
                    best = d2
                    jbest = j
        out[k] = best
    return out


@numba.njit(cache=True)
def vertex_segment_values(
    p: np.ndarray, q: np.ndarray, lo: float, hi: float, out: np.ndarray
) -> int:
    """Type-b critical values: distances from p's vertices to q's segments, in (lo, hi].

    Writes as many as fit into ``out`` and returns how many there are in all; when that
    is more than ``out`` holds, the caller calls again with a big enough buffer. (A
    buffer passed in keeps the hot loop free of reallocation, which numba compiles
    poorly.) Blocks of segments farther than ``hi`` are skipped.
    """
    ax, ay, bx, by, dx, dy, inv = _segments(q)
    ns = ax.shape[0]
    box = _block_boxes(q[:, 0].copy(), q[:, 1].copy(), ns, _BLOCK)
    m = p.shape[0]
    cap = out.shape[0]
    lo2 = lo * lo
    hi2 = hi * hi
    count = 0
    for k in range(m):
        px = p[k, 0]
        py = p[k, 1]
        for b in range(box.shape[0]):
            if _box_dist2(box, b, px, py) > hi2:
                continue
            for j in range(b * _BLOCK, min((b + 1) * _BLOCK, ns)):
                d2 = _point_segment_dist2(px, py, ax[j], ay[j], bx[j], by[j], dx[j], dy[j], inv[j])
                if lo2 <= d2 and d2 <= hi2:  # cheap prefilter on squares, exact on roots
                    v = math.sqrt(d2)
                    if lo < v <= hi:
                        if count < cap:
                            out[count] = v
                        count += 1
    return count


@numba.njit(cache=True)
def equidistant_values(
    p: np.ndarray, q: np.ndarray, lo: float, hi: float, max_pairs: int, out: np.ndarray
) -> int:
    """Type-c critical values of segments of q against pairs of vertices of p, in (lo, hi].

    For segment j of q and vertices k < l of p, the candidate is the distance from p_k
    (equal to that from p_l) of the point of segment j equidistant from both. It can
    only be the Fréchet distance eps* if a monotone path crosses row j from column k to
    column l, so every vertex p_k..p_l lies within eps* <= hi of segment j: only pairs
    inside one run of consecutive vertices within ``hi`` of segment j are tried.
    Writes and counts like :func:`vertex_segment_values`; returns -1 once more than
    ``max_pairs`` pairs would have to be tried (the caller then bisects instead).
    """
    ax, ay, bx, by, dx, dy, inv = _segments(q)
    m = p.shape[0]
    vbox = _block_boxes(p[:, 0].copy(), p[:, 1].copy(), m, _BLOCK)
    nb = vbox.shape[0]
    hi2 = hi * hi
    near = np.empty(m, dtype=np.bool_)
    far = np.empty(nb, dtype=np.bool_)
    count = 0
    pairs = 0
    for j in range(ax.shape[0]):
        sx = ax[j]
        sy = ay[j]
        ux = dx[j]
        uy = dy[j]
        # Box of the segment: the gap between it and a block's box bounds the distance
        # from the segment to any vertex of the block from below.
        sxmin = min(sx, bx[j])
        sxmax = max(sx, bx[j])
        symin = min(sy, by[j])
        symax = max(sy, by[j])
        for b in range(nb):
            gx = max(vbox[b, 0] - sxmax, 0.0, sxmin - vbox[b, 1])
            gy = max(vbox[b, 2] - symax, 0.0, symin - vbox[b, 3])
            far[b] = gx * gx + gy * gy > hi2
        b = 0
        while b < nb:
            if far[b]:
                b += 1
                continue
            # A stretch of blocks that may hold vertices within hi; runs cannot cross
            # a far block, so each stretch is scanned on its own.
            b_end = b
            while b_end + 1 < nb and not far[b_end + 1]:
                b_end += 1
            r0 = b * _BLOCK
            r1 = min((b_end + 1) * _BLOCK, m)
            b = b_end + 1
            for k in range(r0, r1):
                d2 = _point_segment_dist2(p[k, 0], p[k, 1], sx, sy, bx[j], by[j], ux, uy, inv[j])
                near[k] = d2 <= hi2
            k0 = r0
            while k0 < r1:
                if not near[k0]:
                    k0 += 1
                    continue
                k1 = k0
                while k1 + 1 < r1 and near[k1 + 1]:
                    k1 += 1
                run = k1 - k0 + 1
                pairs += run * (run - 1) // 2
                if pairs > max_pairs:
                    return -1
                count = _equidistant_run(p, k0, k1, sx, sy, ux, uy, lo, hi, out, count)
                k0 = k1 + 1
    return count


@numba.njit(cache=True)
def _equidistant_run(
    p: np.ndarray,
    k0: int,
    k1: int,
    sx: float,
    sy: float,
    ux: float,
    uy: float,
    lo: float,
    hi: float,
    out: np.ndarray,
    count: int,
) -> int:
    """Type-c values in (lo, hi] for the pairs of p_k0..p_k1 on segment s -> s + u.

    Appends to ``out`` while there is room; returns the new total count.
    """
    cap = out.shape[0]
    for k in range(k0, k1 + 1):
        pkx = p[k, 0] - sx
        pky = p[k, 1] - sy
        sk = pkx * pkx + pky * pky
        for ll in range(k + 1, k1 + 1):
            plx = p[ll, 0] - sx
            ply = p[ll, 1] - sy
            den = 2.0 * (ux * (plx - pkx) + uy * (ply - pky))
            if den == 0.0:
                continue  # no single equidistant point: covered by types a/b
            t = (plx * plx + ply * ply - sk) / den
            if t < 0.0 or t > 1.0:
                continue
            ex = t * ux - pkx
            ey = t * uy - pky
            v = math.sqrt(ex * ex + ey * ey)
            if lo < v <= hi:
                if count < cap:
                    out[count] = v
                count += 1
    return count
