"""Compiled point-in-fence probe of :class:`livematch.core.monitors.fences.FenceSet`.

Private. One call per fix finds the fences whose outer polygon holds the point (boundary
included) and, for each, whether its inner polygon holds it: the grid cell of the point,
the bounding boxes listed there, then a point-in-polygon test on the polygons' rings.
It replaces two vectorised shapely calls per fix (shapely's per-call overhead, several
µs, was most of the fence monitor's time; ``bench/breakdown.py``).

Same answers as shapely (GEOS), by construction rather than by luck: the test counts the
ring edges crossed by a ray from the point (even-odd over every ring of a valid polygon
or multipolygon, holes included), and every orientation it relies on is computed in
floating point with a forward error bound (Shewchuk's ``ccwerrboundA``, "Adaptive
Precision Floating-Point Arithmetic and Fast Robust Geometric Predicates", 1997): when
the sign is not certain, or the point lies on a vertex, the answer is "undecided" and
the caller asks shapely. An exactly computed location is the one GEOS computes. Polygons
that are invalid (even-odd and GEOS may disagree on them) or have more than
``MAX_VERTICES`` vertices (GEOS's indexed test beats a linear scan there) are always
"undecided".

Tables, built once per fence set by :func:`build_tables` (``F`` fences, ``C`` grid cells,
``R`` rings):

``fi`` (int64): a header ``F, C, E, keys0, ptr0, ids0, every0, pband0, bptr0, bedge0``
    of offsets, then ``keys[C]`` (sorted cell keys, :func:`cell_key`), ``ptr[C + 1]`` and
    ``ids[...]`` (CSR: the fences listed in each cell, ascending), ``every[E]`` (fences
    too large for the grid, tested at every point, ascending), ``pband[2F + 1]`` (CSR:
    the horizontal bands of polygon ``2i`` (outer of fence ``i``) and ``2i + 1``
    (inner); none when the polygon is left to shapely), ``bptr[B + 1]`` and
    ``bedge[...]`` (CSR: the edges whose height range meets each band, an edge named by
    the index of its first vertex, the next vertex of its ring being the next one).
``ff`` (float64): ``box[2F * 4]`` (each polygon's ``minx, miny, maxx, maxy``),
    ``band_h[2F]`` (each polygon's band height), then the vertices ``x, y`` interleaved,
    ring after ring (each ring closed: its last vertex repeats its first).

A point at height ``y`` lies in band ``floor((y - miny) / band_h)`` of its polygon, and
an edge is listed in every band from that of its lower end to that of its upper end:
the formula is monotone in ``y`` under rounding, so every edge whose height range holds
the point's is in the point's band (edges that do not are skipped by the test anyway).
This is the y-interval index GEOS keeps for the same job, flattened.

Output rows in ``out`` (int64, at least ``3F``): ``fence, outer, inner`` with a location
``INSIDE`` (interior or boundary), ``OUTSIDE`` or ``UNDECIDED``; only fences whose outer
polygon is not certainly outside are listed, ascending. The count returned is negated
when any location is ``UNDECIDED``, so the common case needs no scan for them.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Final

import numpy as np
import numpy.typing as npt
import shapely
from shapely.geometry.base import BaseGeometry

from livematch.core import _jit

OUTSIDE: Final = 0
INSIDE: Final = 1
UNDECIDED: Final = 2
#: A polygon with more vertices is left to shapely (GEOS indexes its edges).
MAX_VERTICES = 2048
#: Edges per horizontal band of a polygon's edge index (a disc of 64 edges: 16 bands).
EDGES_PER_BAND = 4
#: Shewchuk's ccwerrboundA, (3 + 16 eps) eps with eps = 2^-53: |det| above this times the
#: sum of the magnitudes of its two products has the sign of the exact determinant.
CCW_ERRBOUND = (3.0 + 16.0 * 2.0 ** -53) * 2.0 ** -53
N_HEAD = 10
_KEY_BASE = 2 ** 31  # cell keys: cx * base + cy, |cx|, |cy| < 2^30 (cells of 250 m)
KEY_LIMIT = 2 ** 30
#: Metres taken off a computed clearance (:func:`fence_clearance`): far more than the
#: rounding of a point-to-segment distance in projected metres (below a nanometre).
CLEARANCE_SLACK_M = 1e-3


def cell_key(cx: int, cy: int) -> int:
    """The grid key of cell (cx, cy) (|cx|, |cy| < ``KEY_LIMIT``).

    >>> cell_key(0, 0), cell_key(-1, 2) < cell_key(0, -5)
    (0, True)
    """
    return cx * _KEY_BASE + cy


def build_tables(polygons: Sequence[tuple[BaseGeometry, BaseGeometry]],
                 grid: Mapping[tuple[int, int], Sequence[int]], everywhere: Sequence[int],
                 ) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.float64]]:
    """The kernel's tables for ``(outer, inner)`` polygons per fence and the fence grid.

    ``grid`` maps a cell (cx, cy) to the ascending fences it lists, ``everywhere`` lists
    the fences tested at every point. A cell beyond ``KEY_LIMIT`` cannot be keyed: its
    fences move to ``everywhere`` (never happens with projected metres and 250 m cells).
    """
    cells: dict[int, list[int]] = {}
    every = set(everywhere)
    for (cx, cy), ids in grid.items():
        if abs(cx) >= KEY_LIMIT or abs(cy) >= KEY_LIMIT:
            every.update(ids)
            continue
        cells[cell_key(cx, cy)] = list(ids)
    for key in list(cells):
        cells[key] = [i for i in cells[key] if i not in every]
    keys = sorted(cells)
    ptr = np.zeros(len(keys) + 1, dtype=np.int64)
    np.cumsum([len(cells[k]) for k in keys], out=ptr[1:])
    ids = [i for k in keys for i in cells[k]]
    pband = [0]
    bptr = [0]
    bedge: list[int] = []
    boxes: list[float] = []
    band_h: list[float] = []
    coords: list[npt.NDArray[np.float64]] = []
    n_vertices = 0
    for pair in polygons:
        for g in pair:
            boxes.extend(g.bounds)
            rings = [shapely.get_coordinates(r) for p in getattr(g, "geoms", [g])
                     for r in (p.exterior, *p.interiors)]
            n_edges = sum(len(c) - 1 for c in rings)
            miny, maxy = g.bounds[1], g.bounds[3]
            if not (g.is_valid and n_edges <= MAX_VERTICES and maxy > miny):
                band_h.append(1.0)
                pband.append(pband[-1])  # no bands: always undecided
                continue
            n_bands = max(1, n_edges // EDGES_PER_BAND)
            h = (maxy - miny) / n_bands
            band_h.append(h)
            lists: list[list[int]] = [[] for _ in range(n_bands)]
            for c in rings:
                ys = c[:, 1].tolist()
                for q in range(len(c) - 1):
                    lo, hi = min(ys[q], ys[q + 1]), max(ys[q], ys[q + 1])
                    b0 = min(n_bands - 1, max(0, math.floor((lo - miny) / h)))
                    b1 = min(n_bands - 1, max(0, math.floor((hi - miny) / h)))
                    for b in range(b0, b1 + 1):
                        lists[b].append(n_vertices + q)
                coords.append(c)
                n_vertices += len(c)
            for edges in lists:
                bedge.extend(edges)
                bptr.append(len(bedge))
            pband.append(len(bptr) - 1)
    n_f = len(polygons)
    head = [n_f, len(keys), len(every)]
    parts = [keys, ptr.tolist(), ids, sorted(every), pband, bptr, bedge]
    offsets = []
    at = N_HEAD
    for p in parts:
        offsets.append(at)
        at += len(p)
    fi = np.array(head + offsets + [v for p in parts for v in p], dtype=np.int64)
    flat = np.concatenate(coords).ravel() if coords else np.empty(0)
    ff = np.concatenate([np.array(boxes + band_h, dtype=np.float64), flat])
    return fi, ff


@_jit.njit(cache=True, error_model="numpy", inline="always")
def _locate(ff: np.ndarray, bedge: np.ndarray, e0: int, e1: int, v0: int,
            x: float, y: float) -> int:
    """Location of (x, y) given the edges ``bedge[e0:e1]`` of its band (even-odd).

    ``v0`` is where the vertices start in ``ff``. ``INSIDE`` includes the boundary;
    ``UNDECIDED`` when an orientation's sign is not certain (the point on or within
    rounding of an edge or a vertex).
    """
    crossings = 0
    for e in range(e0, e1):
        q = v0 + 2 * bedge[e]
        ax = ff[q]
        ay = ff[q + 1]
        bx = ff[q + 2]
        by = ff[q + 3]
        if (ay < y and by < y) or (ay > y and by > y) or (ax < x and bx < x):
            continue  # wholly above, below or left of the point: no crossing
        if ay == by:  # horizontal at the point's height: on it or beside it
            if (ax <= x <= bx) or (bx <= x <= ax):
                return INSIDE
            continue
        crosses = (ay > y) != (by > y)  # half-open, so a vertex counts once
        if ax > x and bx > x:
            if crosses:
                crossings += 1
            continue
        left = (ax - x) * (by - y)
        right = (ay - y) * (bx - x)
        det = left - right
        if not abs(det) > CCW_ERRBOUND * (abs(left) + abs(right)):
            return UNDECIDED
        if crosses and ((det > 0.0) == (by > ay)):
            crossings += 1
    return INSIDE if crossings % 2 == 1 else OUTSIDE


@_jit.njit(cache=True, error_model="numpy", inline="always")
def _polygon(fi: np.ndarray, ff: np.ndarray, p: int, x: float, y: float) -> int:
    """Location of (x, y) in polygon ``p`` (``2 * fence`` outer, ``+ 1`` inner)."""
    b = 4 * p
    if not (ff[b] <= x <= ff[b + 2] and ff[b + 1] <= y <= ff[b + 3]):
        return OUTSIDE  # a bounding box holds its polygon, boundary included
    pband = fi[7]
    band0 = fi[pband + p]
    n_bands = fi[pband + p + 1] - band0
    if n_bands == 0:
        return UNDECIDED
    n_f = fi[0]
    band = math.floor((y - ff[b + 1]) / ff[8 * n_f + p])
    if band > n_bands - 1:
        band = n_bands - 1
    if band < 0:
        band = 0
    bptr = fi[8] + band0 + band
    return _locate(ff, fi[fi[9]:], fi[bptr], fi[bptr + 1], 10 * n_f, x, y)


@_jit.njit(cache=True, error_model="numpy")
def fence_probe(x: float, y: float, cell_m: float, fi: np.ndarray, ff: np.ndarray,
                out: np.ndarray) -> int:
    """Rows ``fence, outer, inner`` in ``out`` for the fences near (x, y); their number.

    The number is negated when a row holds an ``UNDECIDED`` location.

    ``cell_m`` is the grid's cell side (metres); the cell is ``floor(x / cell_m)``,
    ``floor(y / cell_m)``, as the grid was built.
    """
    n_c = fi[1]
    n_e = fi[2]
    keys = fi[fi[3]:fi[3] + n_c]
    ptr = fi[fi[4]:fi[4] + n_c + 1]
    ids = fi[fi[5]:fi[6]]
    every = fi[fi[6]:fi[6] + n_e]
    lo = 0
    hi = 0
    cx = math.floor(x / cell_m)
    cy = math.floor(y / cell_m)
    if -KEY_LIMIT < cx < KEY_LIMIT and -KEY_LIMIT < cy < KEY_LIMIT and n_c > 0:
        key = cx * _KEY_BASE + cy
        c = np.searchsorted(keys, key)
        if c < n_c and keys[c] == key:
            lo = ptr[c]
            hi = ptr[c + 1]
    n = 0
    unsure = False
    j = lo
    e = 0
    while j < hi or e < n_e:  # merge the cell's fences and the everywhere ones, ascending
        if e >= n_e or (j < hi and ids[j] < every[e]):
            i = ids[j]
            j += 1
        else:
            i = every[e]
            e += 1
        outer = _polygon(fi, ff, 2 * i, x, y)
        if outer == OUTSIDE:
            continue
        inner = _polygon(fi, ff, 2 * i + 1, x, y)
        out[3 * n] = i
        out[3 * n + 1] = outer
        out[3 * n + 2] = inner
        n += 1
        if outer == UNDECIDED or inner == UNDECIDED:
            unsure = True
    return -n if unsure else n


@_jit.njit(cache=True, error_model="numpy", inline="always")
def _segment_distance2(ax: float, ay: float, bx: float, by: float, x: float,
                       y: float) -> float:
    """Squared distance from (x, y) to the segment from (ax, ay) to (bx, by)."""
    dx = bx - ax
    dy = by - ay
    length2 = dx * dx + dy * dy
    t = 0.0
    if length2 > 0.0:
        t = ((x - ax) * dx + (y - ay) * dy) / length2
        if t < 0.0:
            t = 0.0
        elif t > 1.0:
            t = 1.0
    px = ax + t * dx - x
    py = ay + t * dy - y
    return px * px + py * py


@_jit.njit(cache=True, error_model="numpy", inline="always")
def _polygon_distance2(fi: np.ndarray, ff: np.ndarray, p: int, x: float, y: float,
                       best: float) -> float:
    """The smaller of ``best`` and a bound below the squared distance to polygon ``p``.

    The bound is of the distance from (x, y) to the polygon's boundary: the distance to
    its bounding box when the point lies outside the box; else the distance to the
    nearest of its edges, found by walking the horizontal bands outwards from the
    point's band while a band can still hold a nearer edge (every edge is listed in
    each band its height range meets, so an edge farther than a band's edge is also
    listed in the bands between); 0 when the polygon is left to shapely (no bands).
    """
    b = 4 * p
    x0 = ff[b]
    y0 = ff[b + 1]
    x1 = ff[b + 2]
    y1 = ff[b + 3]
    if not (x0 <= x <= x1 and y0 <= y <= y1):
        ex = x0 - x if x < x0 else (x - x1 if x > x1 else 0.0)
        ey = y0 - y if y < y0 else (y - y1 if y > y1 else 0.0)
        d2 = ex * ex + ey * ey
        return d2 if d2 < best else best
    pband = fi[7]
    band0 = fi[pband + p]
    n_bands = fi[pband + p + 1] - band0
    if n_bands == 0:
        return 0.0
    h = ff[8 * fi[0] + p]
    k = math.floor((y - y0) / h)
    if k > n_bands - 1:
        k = n_bands - 1
    if k < 0:
        k = 0
    bptr = fi[8] + band0
    bedge = fi[fi[9]:]
    v0 = 10 * fi[0]
    down = True
    up = True
    off = 0
    while down or up:
        for side in range(2):
            if side == 0:
                if not down:
                    continue
                band = k - off
                if band < 0:
                    down = False
                    continue
                gap = y - (y0 + (band + 1) * h) if off > 0 else 0.0
                if gap > 0.0 and gap * gap >= best:
                    down = False
                    continue
            else:
                if not up or off == 0:
                    continue
                band = k + off
                if band > n_bands - 1:
                    up = False
                    continue
                gap = (y0 + band * h) - y
                if gap > 0.0 and gap * gap >= best:
                    up = False
                    continue
            for e in range(fi[bptr + band], fi[bptr + band + 1]):
                q = v0 + 2 * bedge[e]
                d2 = _segment_distance2(ff[q], ff[q + 1], ff[q + 2], ff[q + 3], x, y)
                if d2 < best:
                    best = d2
        off += 1
    return best


@_jit.njit(cache=True, error_model="numpy")
def fence_clearance(x: float, y: float, cell_m: float, fi: np.ndarray,
                    ff: np.ndarray) -> float:
    """Metres (x, y) can move without :func:`fence_probe`'s answer changing; 0: unknown.

    A point closer to (x, y) than this lies in the same outer and inner polygons of
    every fence: no polygon boundary is that close. The fences the probe lists for the
    point's grid cell (and those tested everywhere) are measured (:func:`_polygon_distance2`);
    every other fence's bounding box lies outside the cell, so farther than the cell's
    edges, which bound the answer too. The exact distance is at most a micrometre
    larger than the computed one for coordinates below 1e7 m; ``CLEARANCE_SLACK_M`` is
    taken off, so the bound holds. 0 for a point that is not finite, in a cell the
    probe cannot key, or inside the box of a polygon left to shapely.
    """
    if not (math.isfinite(x) and math.isfinite(y)):
        return 0.0
    cx = math.floor(x / cell_m)
    cy = math.floor(y / cell_m)
    if not (-KEY_LIMIT < cx < KEY_LIMIT and -KEY_LIMIT < cy < KEY_LIMIT):
        return 0.0
    d = x - cx * cell_m
    d = min(d, (cx + 1) * cell_m - x, y - cy * cell_m, (cy + 1) * cell_m - y)
    if not d > CLEARANCE_SLACK_M:
        return 0.0
    d2 = d * d
    n_c = fi[1]
    n_e = fi[2]
    lo = 0
    hi = 0
    if n_c > 0:
        keys = fi[fi[3]:fi[3] + n_c]
        key = cx * _KEY_BASE + cy
        c = np.searchsorted(keys, key)
        if c < n_c and keys[c] == key:
            ptr = fi[fi[4]:fi[4] + n_c + 1]
            lo = ptr[c]
            hi = ptr[c + 1]
    ids = fi[fi[5]:fi[6]]
    every = fi[fi[6]:fi[6] + n_e]
    for j in range(hi - lo + n_e):  # the cell's fences, then those tested everywhere
        i = ids[lo + j] if j < hi - lo else every[j - (hi - lo)]
        d2 = _polygon_distance2(fi, ff, 2 * i, x, y, d2)
        d2 = _polygon_distance2(fi, ff, 2 * i + 1, x, y, d2)
        if d2 == 0.0:
            return 0.0
    clear = math.sqrt(d2) - CLEARANCE_SLACK_M
    return clear if clear > 0.0 else 0.0


@_jit.njit(cache=True, error_model="numpy")
def fence_probe_clear(x: float, y: float, cell_m: float, fi: np.ndarray, ff: np.ndarray,
                      out: np.ndarray, clear: bool) -> tuple[int, float]:
    """:func:`fence_probe`, and :func:`fence_clearance` when ``clear`` (else 0).

    The clearance is 0 too when the probe's answer is not certain (a negative count).

    One call for both (each call from Python pays numba's dispatch).
    """
    n = fence_probe(x, y, cell_m, fi, ff, out)
    if n < 0 or not clear:
        return n, 0.0
    return n, fence_clearance(x, y, cell_m, fi, ff)


def warm_up() -> None:
    """Compile (or load from numba's cache) the probe with one square fence.

    >>> warm_up()   # nothing to return
    """
    box = shapely.box(0.0, 0.0, 10.0, 10.0)
    fi, ff = build_tables([(box, box)], {(0, 0): [0]}, [])
    out = np.zeros(3, dtype=np.int64)
    assert fence_probe(5.0, 5.0, 250.0, fi, ff, out) == 1 and out[1] == INSIDE
    assert fence_probe_clear(5.0, 4.0, 250.0, fi, ff, out, True) == (1, 4.0 - CLEARANCE_SLACK_M)
