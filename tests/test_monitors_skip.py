"""The monitors' per-fix shortcuts give the answers of the full path.

The fence probe's clearance (a vehicle that stays closer to the last probed point than
any fence's edge needs no probe) is checked against shapely's distances (GEOS); the
settled fence monitor (only dwell checks while nothing else can change) against a
monitor that takes the full path at every fix.
"""

from __future__ import annotations

import math

import numpy as np
import shapely
from test_monitors import fix, odd_fences, random_fences

from livematch.core.monitors import (
    AlertSettings,
    Fence,
    FenceMonitor,
    FenceSet,
    VehicleAlerts,
)
from livematch.core.monitors import _fence_kernel as fk


def test_fence_clearance_is_below_shapely_distance_and_keeps_the_answer() -> None:
    """The clearance never exceeds the distance to any fence's outer or inner boundary,
    and every point within it gets the probe's answer of the point it was measured at.

    Reference: ``shapely.distance`` from the point to each polygon's boundary and
    ``shapely.intersects_xy`` (GEOS) at the moved points. With and without margins, with
    and without a fence too large for the grid.
    """
    rng = np.random.default_rng(8)
    base = odd_fences(rng)
    county = Fence("county", shapely.box(-40000.0, -40000.0, 40000.0, 40000.0))
    for settings, fences in ((AlertSettings(), base),
                             (AlertSettings(fence_inner_m=0.0, fence_outer_m=0.0), base),
                             (AlertSettings(), [*base, county])):
        fs = FenceSet(fences, settings)
        edges = [shapely.boundary(g) for pair in zip(fs.outer, fs.inner, strict=True)
                 for g in pair]
        points = rng.uniform(-1700.0, 1700.0, (1500, 2))
        cleared = 0
        for x, y in points.tolist():
            (near, inner), r2 = fs.probe_clear(x, y)
            assert (near, inner) == fs.probe(x, y)
            if r2 == 0.0:
                continue
            cleared += 1
            r = math.sqrt(r2)
            nearest = min(shapely.distance(e, shapely.Point(x, y)) for e in edges)
            assert r <= nearest, (x, y, r, nearest)
            for _ in range(3):  # points inside the clearance: the same answer
                a = rng.uniform(0.0, 2.0 * math.pi)
                d = r * math.sqrt(rng.uniform(0.0, 1.0)) * 0.999999
                qx, qy = x + d * math.cos(a), y + d * math.sin(a)
                want = [i for i in range(len(fences))
                        if shapely.intersects_xy(fs.outer[i], qx, qy)]
                assert want == near, (x, y, qx, qy)
                assert [bool(shapely.intersects_xy(fs.inner[i], qx, qy)) for i in near] == inner
        assert cleared > 500  # most random points have a clearance
    fs = FenceSet(base, AlertSettings())
    assert fs.probe_clear(math.nan, 0.0)[1] == 0.0
    assert fk.fence_clearance(-750.0, -750.0, 250.0, fs._fi, fs._ff) == 0.0  # in the bow tie's box


def test_fence_clearance_is_tight_for_a_disc() -> None:
    """The clearance is the distance to the nearest edge (not merely some lower bound):
    at a disc's centre it is the inner polygon's radius, at most a millimetre less.

    Reference: the polygon's own vertices (``shapely.get_coordinates``): the nearest
    boundary point of a regular polygon's centre is an edge's midpoint.
    """
    fs = FenceSet([Fence("d", shapely.Point(125.0, 125.0).buffer(60.0))], AlertSettings())
    xy = shapely.get_coordinates(fs.inner[0])
    mid = (xy[:-1] + xy[1:]) / 2.0
    want = float(np.min(np.hypot(mid[:, 0] - 125.0, mid[:, 1] - 125.0)))
    _, r2 = fs.probe_clear(125.0, 125.0)
    assert want - 1.1e-3 < math.sqrt(r2) <= want


def test_vehicle_alerts_fence_shortcuts_equal_full_path() -> None:
    """Alerts and fence state of ``VehicleAlerts`` (probe skipped within the clearance,
    settled monitors checking dwell times alone) equal those of a monitor taking the
    full path (``FenceMonitor.update`` without a probe) at every fix.

    Vehicles that stand (jitter of 1 m), creep and drive through and around fences
    with short dwell times (so dwell alerts fire), two fences overlapping. Also checks
    that the shortcuts ran.
    """
    rng = np.random.default_rng(13)
    fences = [Fence("a", shapely.box(0.0, 0.0, 300.0, 300.0), dwell_s=20.0),
              Fence("b", shapely.Point(320.0, 150.0).buffer(90.0), dwell_s=7.5),
              Fence("c", shapely.Point(900.0, 900.0).buffer(120.0)),
              *random_fences(rng, 10, 1200.0, (40.0, 200.0), (40.0, 250.0))]
    settings = AlertSettings(fence_dwell_s=30.0)
    fs = FenceSet(fences, settings)
    skipped = calm = 0
    kinds: set[str] = set()
    for trip in range(12):
        a = VehicleAlerts()
        kept = FenceMonitor()
        x, y = rng.uniform(-200.0, 1000.0, 2).tolist()
        t = 0.0
        for _ in range(400):
            mode = rng.integers(3)
            for _ in range(int(rng.integers(5, 40))):
                if mode == 0:  # standing: jitter only
                    px, py = x + rng.normal(0.0, 1.0), y + rng.normal(0.0, 1.0)
                else:
                    step = 1.5 if mode == 1 else 12.0
                    x += rng.normal(0.0, step)
                    y += rng.normal(0.0, step)
                    px, py = x, y
                t += 1.0
                f = fix(t, px, py)
                memo = a.fence_memo
                before = a.fences.calm if a.fences is not None else None
                got = a.update(f, None, True, fs, (), settings)
                want = kept.update(fs, f, f.x, f.y, ())
                assert got == want, (trip, t)
                kinds.update(w.alert_kind for w in want)
                assert (a.fences.state if a.fences is not None else {}) == kept.state
                skipped += memo is not None and a.fence_memo is memo
                calm += before is not None and a.fences is not None and a.fences.calm is before
    assert skipped > 2000 and calm > 1000
    assert kinds == {"fence_enter", "fence_exit", "fence_dwell"}


def test_vehicle_alerts_fence_shortcuts_send_dwell_alerts_in_order() -> None:
    """Two overlapping fences with dwell times: the settled monitor sends each dwell
    alert at the fix the full path sends it, in fence order, once.

    Reference: a ``FenceMonitor`` taking the full path at every fix (no probe given).
    """
    fences = [Fence("a", shapely.box(0.0, 0.0, 300.0, 300.0), dwell_s=10.0),
              Fence("b", shapely.box(100.0, 100.0, 400.0, 400.0), dwell_s=10.0),
              Fence("c", shapely.box(150.0, 150.0, 380.0, 380.0))]
    settings = AlertSettings(fence_dwell_s=25.0)
    fs = FenceSet(fences, settings)
    a = VehicleAlerts()
    kept = FenceMonitor()
    got, want = [], []
    for t in range(60):
        f = fix(t, 200.0 + 0.3 * (t % 3), 200.0)  # standing in all three
        got.extend(a.update(f, None, True, fs, (), settings))
        want.extend(kept.update(fs, f, f.x, f.y, ()))
    assert got == want
    assert [(w.alert_kind, w.facts["fence"], w.t) for w in want] == [
        ("fence_enter", "a", 1.0), ("fence_enter", "b", 1.0), ("fence_enter", "c", 1.0),
        ("fence_dwell", "a", 10.0), ("fence_dwell", "b", 10.0), ("fence_dwell", "c", 25.0)]
    assert a.fences is not None and a.fences.calm is not None  # settled at the end


def test_route_monitor_windows_equal_python_reference() -> None:
    """Both windows of a ``RouteMonitor`` (one compiled call per fix on the packed chain
    records, the usual step taken inline) hold, after every fix, the states the pure-
    Python reference gives, and report its best candidate and followed metres.

    Reference: ``_route_kernel.reference_advance`` (livematch.core.sweep.sweep_step and
    fresh_start on nodes, pure Python) for the forward and the reversed chain, fed the
    same fixes. A zig-zag route driven along, back (the forward window dies and the
    reversed one follows), far away and along again, with GPS-like noise.
    """
    from test_monitors import chain

    from livematch.core.monitors import RouteMonitor
    from livematch.core.monitors import _route_kernel as rk
    from livematch.core.sweep import StepContext

    pts = [(0.0, 0.0)] + [(20.0 * i, 15.0 * (i % 2)) for i in range(1, 40)]
    rng = np.random.default_rng(4)
    trace = [(x + rng.normal(0, 6), y + rng.normal(0, 6)) for x, y in pts[::2]]
    trace += [*trace[::-1], (5000.0, 5000.0), *trace]
    ch = chain(pts)
    assert ch.forward_arrays.netf.base is ch.chainf  # views of the packed records
    settings = AlertSettings()
    m = RouteMonitor("r", ch, settings)
    eps = settings.eps_route_m
    rows: dict[bool, list[list[float]]] = {False: [], True: []}
    swept = fresh = 0
    for seq, (x, y) in enumerate(trace, start=1):
        x0, y0 = trace[seq - 2] if seq > 1 else (x, y)
        m.update(fix(float(seq), x, y))
        for backward in (False, True):
            net, view = ((ch.backward, ch.backward_view) if backward
                         else (ch.forward, ch.forward_view))
            ctx = StepContext(view, eps, x0, y0, x, y, seq, float(seq),
                              math.hypot(x - x0, y - y0), *rk.WINDOW_WEIGHTS[:3])
            rows[backward], started = rk.reference_advance(net, view, ctx, rows[backward])
            window = m.rev if backward else m.fwd
            assert window.rows() == rows[backward], (seq, backward)
            j = rk.best_row(rows[backward])
            assert window.best() == ((int(rows[backward][j][0]), rows[backward][j][2])
                                     if rows[backward] else None)
            assert window.followed() == max((r[6] for r in rows[backward]), default=0.0)
            fresh += started
            swept += not started
    assert fresh > 10 and swept > 50
