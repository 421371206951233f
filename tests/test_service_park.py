"""The daemon with parking on (``[store] park_after_s``), against a real mosquitto."""

from __future__ import annotations

import asyncio
import time
from pathlib import Path

from prometheus_client.parser import text_string_to_metric_families
from services import Collector, Mosquitto, http_get, publisher
from test_service_daemon import (
    publish_control,
    routes_fences_config,
    routes_fences_feed,
    running,
)

from livematch.commands.run import build_daemon
from livematch.config import load_config

pytest_plugins = ("fixtures_services",)


async def test_daemon_parking_publishes_what_a_live_pipeline_gives(
        mosquitto: Mosquitto, prefix: str, tmp_path: Path) -> None:
    """Routes, a fence and a retained route control message, fixes of two vehicles 60 ms
    apart each with park_after_s 0.03: the daemon parks and restores the vehicles
    between fixes (counted in its metrics) and publishes the same assignments, commits
    and alerts as a pipeline that keeps them live."""
    cfg = routes_fences_config(tmp_path, prefix, mosquitto.url)
    cfg.write_text(cfg.read_text().replace("[store]\n", "[store]\npark_after_s = 0.03\n"))
    config = load_config(cfg, env={})
    assert config.store.park_after_s == 0.03
    control, fixes = routes_fences_feed(prefix)
    live = build_daemon(config).pipeline
    live.park_after_s = 0.0  # the reference keeps every vehicle live
    want = [o for topic, payload in [control, *fixes]
            for o in live.handle(topic, payload, at=time.time())]
    kinds = {o.record["kind"] for o in want if o.kind == "alert"}
    assert {"off_route", "fence_enter", "fence_exit"} <= kinds  # the scenario is meaningful
    daemon = build_daemon(config)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/#") as col, \
            running(daemon), publisher(mosquitto.port) as pub:
        await publish_control(pub, daemon, control)
        for topic, payload in fixes:
            await pub.publish(topic, payload, qos=1)
            await asyncio.sleep(0.03)
        await col.wait_for("/out/match/", sum(o.kind == "assignment" for o in want))
        await col.wait_for("/out/alert/", sum(o.kind == "alert" for o in want))
        await col.wait_for("/out/commit/", sum(o.kind == "commit" for o in want))
        await asyncio.sleep(0.3)  # nothing more may come
        await pub.publish(control[0], b"", qos=1, retain=True)  # clear the retained message
        status, page = await http_get(daemon.http.port, "/metrics")  # type: ignore[union-attr]
    assert status == 200
    for vehicle in ("bus-1", "bus-2"):
        for kind, part in (("assignment", "match"), ("commit", "commit"), ("alert", "alert")):
            assert col.records(f"/out/{part}/{vehicle}") == [
                o.record for o in want if o.kind == kind and o.vehicle == vehicle]
    values = {s.name: s.value for f in text_string_to_metric_families(page)
              for s in f.samples}
    parks = daemon.pipeline.counters["vehicle:parked"]
    assert parks > 20  # parked between most of its fixes
    assert values["livematch_vehicle_parks_total"] == parks
    assert values["livematch_vehicle_unparks_total"] == daemon.pipeline.counters[
        "vehicle:unparked"]
    assert values["livematch_vehicles_live"] == 2
