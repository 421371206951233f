"""Clock skew and per-vehicle rate limits in the pipeline (shared by replay and daemon)."""

from __future__ import annotations

import json

from catalogue import straight_road

from livematch.core.settings import MatchSettings
from livematch.feed.decode import REASONS, FeedLimits
from livematch.pipeline import Pipeline

T0 = 1_764_576_000.0
ROAD = straight_road(2000.0, 50.0)


def message(t: float, x: float) -> bytes:
    """A position message at x metres along the test road, time t."""
    lon, lat = ROAD.projection.to_lonlat(x, 0.0)
    return json.dumps({"time": t, "lat": float(lat), "lon": float(lon)}).encode()


def test_pipeline_future_fix_rejected_and_later_fixes_kept():
    """One fix from a broken clock (a day ahead) is rejected; later real fixes still match."""
    p = Pipeline(ROAD, MatchSettings())
    topic = "fleet/bus1/position"
    out = []
    for i in range(5):
        out += p.handle(topic, message(T0 + 2 * i, 20.0 + 20 * i), at=T0 + 2 * i + 0.5)
    bad = p.handle(topic, message(T0 + 86_400.0, 120.0), at=T0 + 10.5)
    assert [(o.kind, o.record["reason"]) for o in bad] == [("reject", "future_time")]
    for i in range(5, 15):
        out += p.handle(topic, message(T0 + 2 * i, 20.0 + 20 * i), at=T0 + 2 * i + 0.5)
    out += p.flush()
    assert p.counters["filtered:out_of_order"] == 0
    assert p.counters["fixes"] == 15
    assert p.counters["reject:future_time"] == 1
    assigned = sorted(o.record["time"] for o in out if o.kind == "assignment")
    assert assigned == [T0 + 2 * i for i in range(15)]


def test_pipeline_future_fix_without_limit_blocks_later_fixes():
    """Control: with max_future_s = 0 the same broken fix makes later real fixes out of order."""
    p = Pipeline(ROAD, MatchSettings(), limits=FeedLimits(max_future_s=0))
    topic = "fleet/bus1/position"
    for i in range(5):
        p.handle(topic, message(T0 + 2 * i, 20.0 + 20 * i), at=T0 + 2 * i + 0.5)
    p.handle(topic, message(T0 + 86_400.0, 120.0), at=T0 + 10.5)
    for i in range(5, 15):
        p.handle(topic, message(T0 + 2 * i, 20.0 + 20 * i), at=T0 + 2 * i + 0.5)
    assert p.counters["filtered:out_of_order"] == 10


def test_pipeline_future_limit_boundary():
    """Exactly max_future_s ahead is accepted; one second more is rejected."""
    p = Pipeline(ROAD, MatchSettings(), limits=FeedLimits(max_future_s=300))
    p.handle("fleet/a/position", message(T0 + 300.0, 20.0), at=T0)
    assert p.counters["fixes"] == 1
    out = p.handle("fleet/b/position", message(T0 + 301.0, 20.0), at=T0)
    assert [o.record["reason"] for o in out] == ["future_time"]


def test_pipeline_late_fix_accepted_and_counted():
    """A fix two hours behind its receive time is matched and counted as late."""
    p = Pipeline(ROAD, MatchSettings(), limits=FeedLimits(max_age_s=3600))
    p.handle("fleet/a/position", message(T0, 20.0), at=T0 + 7200.0)
    p.handle("fleet/a/position", message(T0 + 2, 40.0), at=T0 + 3000.0)
    assert p.counters["fixes"] == 2
    assert p.counters["late"] == 1
    assert not any(k.startswith("reject:") for k in p.counters)


def test_pipeline_rate_limit_rejects_flood():
    """25 fixes of one vehicle within 25 ms at 10 Hz: 10 taken, 15 rate_limited."""
    p = Pipeline(ROAD, MatchSettings(), limits=FeedLimits(max_rate_hz=10))
    outs = []
    for i in range(25):  # fix times 1 ms apart, all received at T0: 0.024 s of refill
        outs += p.handle("fleet/a/position", message(T0 + i * 0.001, 20.0 + i * 0.1),
                         at=T0)
    assert p.counters["fixes"] == 10
    assert p.counters["reject:rate_limited"] == 15
    assert sum(1 for o in outs if o.kind == "reject") == 15
    # another vehicle is not affected
    p.handle("fleet/b/position", message(T0, 20.0), at=T0 + 0.3)
    assert p.counters["fixes"] == 11
    # a second later the bucket has refilled
    p.handle("fleet/a/position", message(T0 + 1.5, 40.0), at=T0 + 1.5)
    assert p.counters["fixes"] == 12


def test_pipeline_rate_limit_passes_backlog_burst():
    """A broker backlog (60 fixes 1 s apart, all received at once) passes the rate limit."""
    p = Pipeline(ROAD, MatchSettings(), limits=FeedLimits(max_rate_hz=10))
    for i in range(60):
        p.handle("fleet/a/position", message(T0 + i, 20.0 + 10 * i), at=T0 + 100.0)
    assert p.counters["fixes"] == 60
    assert p.counters["reject:rate_limited"] == 0


def test_feed_reasons_include_new_codes():
    """The stable reason list names the clock and rate codes."""
    assert "future_time" in REASONS and "rate_limited" in REASONS
