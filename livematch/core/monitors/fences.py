"""Geofences: enter, exit and dwell alerts for polygons, with margins against flapping.

A :class:`Fence` is a polygon (or multipolygon) in projected metres with an id, a name,
an optional dwell time and an optional vehicle filter (vehicle ids and/or group names).
:class:`FenceSet` prepares every fence once for the whole fleet: an *inner* polygon
(shrunk by ``fence_inner_m``) that a vehicle must reach to enter, an *outer* polygon
(grown by ``fence_outer_m``) that it must leave to exit, and a grid over the outer
polygons so a fix is tested only against the few fences near it. The per-fix test is one
compiled call (:mod:`livematch.core.monitors._fence_kernel`) that gives shapely's answer
and asks shapely itself only for a point on or within rounding of a polygon's edge.

:class:`FenceMonitor` is one vehicle's state: the fences it is inside and the counts of
consecutive fixes beyond a margin (``fence_fixes`` are needed to change state, so one
outlier never flips a fence). A point on a polygon's boundary counts as inside it
(shapely's ``intersects``, i.e. ``covers`` for a point).
"""

from __future__ import annotations

import math
from collections.abc import Collection, Iterable, Mapping, Sequence
from dataclasses import dataclass
from itertools import compress
from typing import Any, Final

import numpy as np
import shapely
from shapely.geometry.base import BaseGeometry

from livematch.core._direct import Direct
from livematch.core.events import Alert
from livematch.core.fix import Fix
from livematch.core.monitors import _fence_kernel as _fk
from livematch.core.monitors.settings import AlertSettings


@dataclass(frozen=True, eq=False)
class Fence:
    """One geofence.

    Attributes:
        id: its id (copied into alerts; unique within a set).
        geometry: a shapely Polygon or MultiPolygon in projected metres.
        name: a human name, if any.
        dwell_s: this fence's dwell time, seconds (None: the settings' default).
        vehicles: vehicle ids it applies to (None with ``groups`` None: every vehicle).
        groups: vehicle group names it applies to.
    """

    id: str
    geometry: BaseGeometry
    name: str | None = None
    dwell_s: float | None = None
    vehicles: frozenset[str] | None = None
    groups: frozenset[str] | None = None

    def applies_to(self, vehicle: str, groups: Iterable[str] = ()) -> bool:
        """Whether the fence watches ``vehicle`` (member of ``groups``).

        >>> f = Fence("depot", shapely.box(0, 0, 1, 1), groups=frozenset({"night"}))
        >>> f.applies_to("bus1"), f.applies_to("bus1", ["night"])
        (False, True)
        """
        if self.vehicles is None and self.groups is None:
            return True
        if self.vehicles is not None and vehicle in self.vehicles:
            return True
        return self.groups is not None and not self.groups.isdisjoint(groups)


# the probes, once or twice a fix, at their compiled code (livematch.core._direct)
_CALLS: Final = Direct(fence_probe=_fk.fence_probe, fence_probe_clear=_fk.fence_probe_clear)

GRID_CELL_M: Final = 250.0  # side of a cell of the fence grid, metres
GRID_MAX_CELLS: Final = 4096  # a fence covering more cells is tested at every fix instead


class FenceSet:
    """Every fence, prepared: inner/outer polygons and a spatial index over the outer ones.

    Args:
        fences: the fences (ids unique).
        settings: the margins come from ``fence_inner_m`` / ``fence_outer_m``.

    Raises:
        ValueError: on a repeated fence id or a geometry that is not a (multi)polygon.

    Example (a point 10 m inside a 100 m square, margins 15 m: only near the fence):
        >>> fs = FenceSet([Fence("a", shapely.box(0, 0, 100, 100))], AlertSettings())
        >>> fs.near(10.0, 50.0), fs.inside_inner(0, 10.0, 50.0), fs.inside_outer(0, 10.0, 50.0)
        ([0], False, True)
        >>> FenceSet([], AlertSettings()).near(0.0, 0.0)   # degenerate: no fences
        []
    """

    def __init__(self, fences: Sequence[Fence], settings: AlertSettings) -> None:
        seen: set[str] = set()
        for f in fences:
            if f.id in seen:
                raise ValueError(f"fence id {f.id!r} is used twice")
            seen.add(f.id)
            if f.geometry.geom_type not in ("Polygon", "MultiPolygon") or f.geometry.is_empty:
                raise ValueError(f"fence {f.id!r} must be a non-empty Polygon or "
                                 f"MultiPolygon, got {f.geometry.geom_type}")
        self.fences = list(fences)
        self.settings = settings
        self.index = {f.id: i for i, f in enumerate(self.fences)}
        # whether any fence watches only some vehicles (else every fence applies to all)
        self.filtered = any(f.vehicles is not None or f.groups is not None
                            for f in self.fences)
        self.inner = []
        self.outer = []
        for f in self.fences:
            inner = f.geometry.buffer(-settings.fence_inner_m) if settings.fence_inner_m else \
                f.geometry
            self.inner.append(f.geometry if inner.is_empty else inner)
            self.outer.append(f.geometry.buffer(settings.fence_outer_m)
                              if settings.fence_outer_m else f.geometry)
        for g in (*self.inner, *self.outer):
            shapely.prepare(g)
        # A uniform grid over the outer polygons' bounding boxes: a fix looks up one cell
        # and tests the few fences listed there, with no geometry object built per fix
        # (an STRtree query needs a Point, which costs more than the tests themselves).
        self._outer = np.array(self.outer, dtype=object)  # for one vectorised test per fix
        self._inner = np.array(self.inner, dtype=object)
        grid: dict[tuple[int, int], list[int]] = {}
        self._everywhere: list[int] = []  # fences too large for the grid: always tested
        for i, g in enumerate(self.outer):
            x0, y0, x1, y1 = g.bounds
            cx0, cy0 = math.floor(x0 / GRID_CELL_M), math.floor(y0 / GRID_CELL_M)
            cx1, cy1 = math.floor(x1 / GRID_CELL_M), math.floor(y1 / GRID_CELL_M)
            if (cx1 - cx0 + 1) * (cy1 - cy0 + 1) > GRID_MAX_CELLS:
                self._everywhere.append(i)
                continue
            for cx in range(cx0, cx1 + 1):
                for cy in range(cy0, cy1 + 1):
                    grid.setdefault((cx, cy), []).append(i)
        self._grid = {cell: np.array(ids, dtype=np.int64) for cell, ids in grid.items()}
        # The same lists with each fence's bounding box: a point outside every box of its
        # cell (most fixes in a cell with fences) needs no geometry test at all.
        self._boxes = {cell: tuple((i, *self.outer[i].bounds) for i in ids)
                       for cell, ids in grid.items()}
        self._inner_bounds = [g.bounds for g in self.inner]
        # The same grid, the polygons' rings and boxes as flat tables for the compiled
        # probe (one call per fix, shapely only where it cannot be sure: _fence_kernel).
        self._fi, self._ff = _fk.build_tables(list(zip(self.outer, self.inner, strict=True)),
                                              grid, self._everywhere)
        self._out = np.zeros(3 * max(1, len(self.fences)), dtype=np.int64)  # scratch
        self.ids = [f.id for f in self.fences]  # fence index -> id (the monitors' keys)
        # fences the probe tests at every point (too large for the grid, or in a cell the
        # kernel cannot key): then no point can be ruled out by the grid alone
        self._anywhere = bool(self._everywhere) or int(self._fi[2]) > 0

    def may_be_near(self, x: float, y: float) -> bool:
        """False when no fence can hold (x, y): :meth:`probe` would find none.

        The grid cell and the outer bounding boxes listed there, looked up in Python: a
        vehicle far from every fence (most fixes of a fleet) then costs no compiled call.
        True means "ask :meth:`probe`" (a box holds the point, or a fence lies outside
        the grid, or the point is not finite).

        >>> fs = FenceSet([Fence("a", shapely.box(0, 0, 100, 100))], AlertSettings())
        >>> fs.may_be_near(50.0, 50.0), fs.may_be_near(-20.0, 50.0), fs.may_be_near(900, 0)
        (True, False, False)
        """
        if self._anywhere:
            return True
        try:
            key = (math.floor(x / GRID_CELL_M), math.floor(y / GRID_CELL_M))
        except (ValueError, OverflowError):  # NaN or infinite: the probe decides
            return True
        boxes = self._boxes.get(key)
        if boxes is None:
            return False
        return any(x0 <= x <= x1 and y0 <= y <= y1 for _, x0, y0, x1, y1 in boxes)

    def probe(self, x: float, y: float) -> tuple[list[int], list[bool]]:
        """The fences whose outer polygon holds (x, y), and whether each inner one does.

        Both boundary included; the fences sorted. One compiled call
        (:func:`~livematch.core.monitors._fence_kernel.fence_probe`); shapely decides the
        rare point the compiled test cannot be sure of (on or within rounding of an edge).
        The same answers as :meth:`near_shapely` and :meth:`inside_inner_many`
        (tests/test_monitors.py compares them).

        >>> fs = FenceSet([Fence("a", shapely.box(0, 0, 100, 100))], AlertSettings())
        >>> fs.probe(10.0, 50.0), fs.probe(20.0, 50.0), fs.probe(100.0, 50.0)
        (([0], [False]), ([0], [True]), ([0], [False]))
        >>> fs.probe(-20.0, 50.0)   # beyond the outer margin
        ([], [])
        """
        n = _CALLS.fence_probe(x, y, GRID_CELL_M, self._fi, self._ff, self._out)
        if n == 0:
            return [], []
        if n > 0:  # every answer certain
            rows: list[int] = self._out[:3 * n].tolist()
            return rows[0::3], [code == _fk.INSIDE for code in rows[2::3]]
        rows = self._out[:-3 * n].tolist()
        n = -n
        near: list[int] = []
        inner: list[bool] = []
        for j in range(0, 3 * n, 3):
            i, outer, inside = rows[j], rows[j + 1], rows[j + 2]
            if outer == _fk.UNDECIDED and not shapely.intersects_xy(self.outer[i], x, y):
                continue
            if inside == _fk.UNDECIDED:
                inside = 1 if shapely.intersects_xy(self.inner[i], x, y) else 0
            near.append(i)
            inner.append(inside == _fk.INSIDE)
        return near, inner

    def probe_clear(self, x: float, y: float, clear: bool = True,
                    ) -> tuple[tuple[list[int], list[bool]], float]:
        """:meth:`probe` and the squared metres (x, y) can move without it changing.

        The second value is the square of
        :func:`~livematch.core.monitors._fence_kernel.fence_clearance` (0 when unknown:
        not asked for (``clear`` false, which saves its measuring), the probe's answer
        needed shapely, or the point is not finite): a point (x', y')
        with ``(x' - x) ** 2 + (y' - y) ** 2`` below it gets the same answer, so a
        vehicle that moves less than that between fixes needs no probe
        (:meth:`~livematch.core.monitors.vehicle.VehicleAlerts.update`). One compiled
        call for both (tests/test_monitors.py checks the bound against shapely's
        distances and the answers at points inside it).

        >>> fs = FenceSet([Fence("a", shapely.box(0, 0, 100, 100))], AlertSettings())
        >>> (near, inner), r2 = fs.probe_clear(50.0, 50.0)   # 35 m from the inner edge
        >>> near, inner, round(r2 ** 0.5, 3)
        ([0], [True], 34.999)
        """
        n, r = _CALLS.fence_probe_clear(x, y, GRID_CELL_M, self._fi, self._ff, self._out,
                                        clear)
        if n == 0:
            return ([], []), r * r
        if n > 0:
            rows: list[int] = self._out[:3 * n].tolist()
            return (rows[0::3], [code == _fk.INSIDE for code in rows[2::3]]), r * r
        return self.probe(x, y), 0.0

    def near(self, x: float, y: float) -> list[int]:
        """Indices of the fences whose outer polygon holds (x, y) (boundary included).

        Sorted (:meth:`probe`'s first half).
        """
        return self.probe(x, y)[0]

    def near_shapely(self, x: float, y: float) -> list[int]:
        """:meth:`near` by shapely's own tests on the grid's candidates (the reference).

        The same set an STRtree ``intersects`` query gives (tests/test_monitors.py
        compares the two).
        """
        key = (math.floor(x / GRID_CELL_M), math.floor(y / GRID_CELL_M))
        if not self._everywhere:
            boxes = self._boxes.get(key)
            if boxes is None:
                return []
            # A point outside a polygon's bounding box (bounds are its exact coordinate
            # extremes) does not intersect it.
            ids = [i for i, x0, y0, x1, y1 in boxes if x0 <= x <= x1 and y0 <= y <= y1]
            if not ids:
                return []
            hits = shapely.intersects_xy(self._outer[ids], x, y).tolist()
            return [i for i, hit in zip(ids, hits, strict=True) if hit]
        cell = self._grid.get(key)
        listed = cell.tolist() if cell is not None else []
        cell = np.array(sorted({*listed, *self._everywhere}), dtype=np.int64)
        return cell[shapely.intersects_xy(self._outer[cell], x, y)].tolist()

    def inside_inner_many(self, fences: list[int], x: float, y: float) -> list[bool]:
        """:meth:`inside_inner` for several fences at once (one vectorised test)."""
        if not fences:
            return []
        bounds = self._inner_bounds
        boxed = [i for i in fences
                 if bounds[i][0] <= x <= bounds[i][2] and bounds[i][1] <= y <= bounds[i][3]]
        if not boxed:
            return [False] * len(fences)  # outside every inner box: outside every polygon
        if len(boxed) < len(fences):
            inside = set(compress(boxed, shapely.intersects_xy(self._inner[boxed], x, y)))
            return [i in inside for i in fences]
        return shapely.intersects_xy(self._inner[fences], x, y).tolist()

    def inside_inner(self, i: int, x: float, y: float) -> bool:
        """Whether (x, y) lies in fence ``i``'s inner polygon (boundary included)."""
        return bool(shapely.intersects_xy(self.inner[i], x, y))

    def inside_outer(self, i: int, x: float, y: float) -> bool:
        """Whether (x, y) lies in fence ``i``'s outer polygon (boundary included)."""
        return bool(shapely.intersects_xy(self.outer[i], x, y))


class FenceMonitor:
    """The fences one vehicle is in, with enter / exit / dwell alerts.

    State per fence (only fences the vehicle is inside or about to enter are kept):
    ``[inside, since_t, dwell_sent, count]`` where ``count`` is the run of consecutive
    fixes on the far side of the margin that would change ``inside``.

    Example (one fix inside with ``fence_fixes=1``: an enter, then nothing more):
        >>> fs = FenceSet([Fence("a", shapely.box(0, 0, 100, 100))],
        ...               AlertSettings(fence_fixes=1))
        >>> m = FenceMonitor()
        >>> [a.alert_kind for a in m.update(fs, Fix("v", 0.0, 0, 0, 50, 50), 50, 50, ())]
        ['fence_enter']
        >>> m.update(fs, Fix("v", 1.0, 0, 0, 50, 50), 50, 50, ())
        []
    """

    __slots__ = ("calm", "state")  # one per vehicle in or near a fence: no instance dict

    def __init__(self) -> None:
        self.state: dict[str, list[Any]] = {}
        # (probe, fence set, dwell watch) when the last update left every fence settled
        # (see update), else None; not part of the checkpoint (a restored monitor takes
        # the full path once)
        self.calm: tuple[tuple[list[int], list[bool]], FenceSet,
                         list[tuple[int, list[Any], float]]] | None = None

    def inside(self) -> list[str]:
        """Ids of the fences the vehicle is inside, sorted."""
        return sorted(k for k, v in self.state.items() if v[0])

    def update(self, fences: FenceSet, fix: Fix, x: float, y: float,
               groups: Iterable[str],
               probe: tuple[list[int], list[bool]] | None = None) -> list[Alert]:
        """Take one fix at position (x, y) (raw or matched, metres); return its alerts.

        ``probe``: ``fences.probe(x, y)`` when the caller has it already.

        Settled: when an update with a probe from the caller leaves the vehicle inside
        each fence it has state for, with no run of fixes under way (every count 0),
        every such fence near the point, and no fence entered (each whose inner polygon
        holds the point is one it is inside), on a fence set whose fences watch every
        vehicle, the next update with an equal probe answer (the same fences near, the
        same inner polygons holding the point: a vehicle moving inside one fence, most
        fixes) can only send dwell alerts: each fence's step would leave its state as it
        is. That update checks the dwell times alone, in the full path's order.
        """
        state = self.state
        calm = self.calm
        if calm is not None:
            if fences is calm[1] and probe is not None and (
                    probe is calm[0] or probe == calm[0]):
                alerts: list[Alert] = []
                t = fix.t
                for j, held, dwell in calm[2]:  # inside, dwell not sent yet, in fence order
                    if t - held[1] >= dwell:
                        held[2] = True
                        alerts.append(_alert(fences.fences[j], fix, "fence_dwell",
                                             t - held[1]))
                if alerts:
                    self.calm = None  # the dwell watch changed: the full path next time
                return alerts
            self.calm = None
        near, near_inner = probe if probe is not None else fences.probe(x, y)
        if not near and not state:
            return []  # near no fence and in none: most fixes of a fleet
        # The fences to step, each with whether the point is in its inner polygon, and
        # the fences whose outer polygon holds the point (None: every fence stepped).
        # The usual case: every fence the vehicle has state for is near the point, and
        # every fence watches every vehicle; then the probe's lists are the answer.
        todo: Iterable[tuple[int, bool]] = zip(near, near_inner, strict=True)
        outer: Collection[int] | None = None
        general = fences.filtered
        if not general and state:
            index = fences.index
            for k in state:  # _all_near, written out (it runs at nearly every fix)
                i = index.get(k)
                if i is None or i not in near:
                    general = True
                    break
        if general:
            todo, outer = _todo(state, fences, fix, x, y, groups, near, near_inner)
        alerts = []
        ids = fences.ids
        settings = fences.settings
        needed = settings.fence_fixes
        t = fix.t
        for i, entering in todo:
            # one fence's step (inline: it runs for every fence near every fix)
            fid = ids[i]
            st = state.get(fid)
            if not (st and st[0]):  # not inside
                if entering:
                    if st is None:
                        st = state[fid] = [False, t, False, 0]
                    if st[3] == 0:
                        st[1] = t
                    st[3] += 1
                    if st[3] >= needed:
                        state[fid] = [True, st[1], False, 0]
                        alerts.append(_alert(fences.fences[i], fix, "fence_enter", None))
                elif st is not None:
                    del state[fid]
                continue
            if outer is not None and i not in outer:
                st[3] += 1
                if st[3] >= needed:
                    del state[fid]
                    alerts.append(_alert(fences.fences[i], fix, "fence_exit", t - st[1]))
                continue
            st[3] = 0
            if not st[2]:
                fence = fences.fences[i]
                dwell = fence.dwell_s if fence.dwell_s is not None else settings.fence_dwell_s
                if t - st[1] >= dwell:
                    st[2] = True
                    alerts.append(_alert(fence, fix, "fence_dwell", t - st[1]))
        if probe is not None and not general:
            self.calm = _calm(state, fences, probe)
        return alerts

    def to_state(self) -> dict[str, list[Any]]:
        """JSON-ready state."""
        return {k: list(v) for k, v in self.state.items()}

    @classmethod
    def from_state(cls, state: Mapping[str, list[Any]]) -> FenceMonitor:
        """Restore a monitor written by :meth:`to_state`."""
        m = cls()
        m.state = {k: list(v) for k, v in state.items()}
        return m


def _calm(state: dict[str, list[Any]], fences: FenceSet,
          probe: tuple[list[int], list[bool]],
          ) -> tuple[tuple[list[int], list[bool]], FenceSet,
                     list[tuple[int, list[Any], float]]] | None:
    """:attr:`FenceMonitor.calm` after a full update with ``probe`` (None: not settled).

    Settled (:meth:`FenceMonitor.update`): every fence with state is one the vehicle is
    inside, with a count of 0 and near the point; every near fence whose inner polygon
    holds the point has such state; no fence filters vehicles. The
    dwell watch lists the fences inside whose dwell alert is not sent yet, in fence
    order, each with its state and dwell time.
    """
    if fences.filtered:
        return None
    near, near_inner = probe
    index = fences.index
    for k, st in state.items():
        if not st[0] or st[3] or index.get(k) not in near:
            return None
    ids = fences.ids
    listed = fences.fences
    default = fences.settings.fence_dwell_s
    watch: list[tuple[int, list[Any], float]] = []
    for i, inner in zip(near, near_inner, strict=True):
        held = state.get(ids[i])
        if held is None:
            if inner:
                return None  # an entry would start
            continue
        if not held[2]:
            dwell = listed[i].dwell_s
            watch.append((i, held, dwell if dwell is not None else default))
    return probe, fences, watch


def _todo(state: dict[str, list[Any]], fences: FenceSet, fix: Fix, x: float, y: float,
          groups: Iterable[str], near: list[int], near_inner: list[bool],
          ) -> tuple[list[tuple[int, bool]], Collection[int]]:
    """:meth:`FenceMonitor.update`'s fences to step in the general case, and the outer set.

    The fences near the point that watch the vehicle, and those the vehicle has state
    for (to see it leave them), ascending, each with whether the point lies in its inner
    polygon; and the fences whose outer polygon holds the point. Drops the state of
    fences no longer loaded.
    """
    inner = dict(zip(near, near_inner, strict=True))  # fence -> point in its inner polygon
    outer: Collection[int]
    if fences.filtered:
        groups = tuple(groups)
        near = [i for i in near if fences.fences[i].applies_to(fix.vehicle, groups)]
        outer = set(near)
    else:
        outer = inner.keys()
    todo = near
    if state:
        index = fences.index
        if not state.keys() <= index.keys():
            for k in [k for k in state if k not in index]:
                del state[k]  # a fence no longer loaded
        # Fences near the point, and those the vehicle is in (to see it leave them).
        extra = [i for k in state if (i := index[k]) not in outer]
        if extra:
            todo = sorted(near + extra)  # near: sorted already
            # Only a fence the vehicle is not inside asks for the inner polygon
            # (entering); inside one, only the outer polygon counts (leaving). Each
            # fence's state is its own, so this can be decided for all of them before
            # any is updated. The probe answered for the fences near the point (all
            # of ``todo`` but ``extra``); one being entered (a run of fixes in its
            # inner polygon under way) that the point is now outside asks shapely.
            listed = fences.fences
            rest = [i for i in extra if i not in inner
                    and not ((st := state.get(listed[i].id)) is not None and st[0])]
            if rest:
                inner = {**inner, **dict(zip(rest, fences.inside_inner_many(rest, x, y),
                                             strict=True))}
    return [(i, inner.get(i, False)) for i in todo], outer


def _alert(fence: Fence, fix: Fix, kind: str, duration_s: float | None) -> Alert:
    """A fence alert at ``fix``; exits and dwells carry the time inside (0.1 s)."""
    facts: dict[str, Any] = {"fence": fence.id, "name": fence.name,
                             "lat": fix.lat, "lon": fix.lon}
    if duration_s is not None:
        facts["duration_s"] = round(duration_s, 1)
    return Alert(fix.vehicle, fix.t, kind, facts)
