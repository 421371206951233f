"""Bounded intake: the daemon sheds old queued fixes of a vehicle when it falls behind."""

from __future__ import annotations

import asyncio
import time
from pathlib import Path

import paho.mqtt.client as mqtt
from prometheus_client.parser import text_string_to_metric_families
from services import Collector, Mosquitto, drive, town, write_config
from test_service_daemon import running

from livematch.config import load_config
from livematch.pipeline import Output, Pipeline
from livematch.service.daemon import Daemon

pytest_plugins = ("fixtures_services",)


class SlowPipeline(Pipeline):
    """The real pipeline, made slower than the feed by sleeping in every message."""

    delay_s = 0.004

    def handle(self, topic: str, payload: bytes, at: float) -> list[Output]:
        time.sleep(self.delay_s)  # blocks the event loop, as a heavy fix would
        return super().handle(topic, payload, at)


def publish_all(port: int, messages: list[tuple[str, bytes]]) -> None:
    """Publish with QoS 1 as fast as the broker takes them (a plain paho client)."""
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"burst-{port}")
    client.max_inflight_messages_set(1000)
    client.connect("127.0.0.1", port)
    client.loop_start()
    try:
        infos = [client.publish(topic, payload, qos=1) for topic, payload in messages]
        for info in infos:
            info.wait_for_publish(timeout=30)
            assert info.is_published()
    finally:
        client.disconnect()
        client.loop_stop()


def samples(text: str) -> dict[str, float]:
    """Unlabelled samples of a /metrics page by name."""
    return {s.name: s.value for f in text_string_to_metric_families(text) for s in f.samples
            if not s.labels}


async def test_daemon_sheds_old_fixes_and_keeps_newest(mosquitto: Mosquitto, prefix: str,
                                                       tmp_path: Path) -> None:
    """A burst of 1,000 QoS 1 fixes into a slowed daemon with intake_max 10: depth stays
    within the bound, every vehicle's newest fix is matched, sheds are counted and
    acknowledged (a new session of the same client gets nothing redelivered)."""
    bound = 10
    cfg = write_config(tmp_path, prefix, broker=mosquitto.url)
    # write_config already has an [mqtt] table: add the key to it
    text = cfg.read_text().replace("reconnect_max_s = 0.5\n",
                                   f"reconnect_max_s = 0.5\nintake_max = {bound}\n")
    cfg.write_text(text)
    config = load_config(cfg, env={})
    assert config.mqtt.intake_max == bound
    vehicles = [f"bp{i}" for i in range(5)]
    fixes = {v: drive(v, 200) for v in vehicles}
    pipeline = SlowPipeline(town(), config.matcher, limits=config.feed)
    daemon = Daemon(config, pipeline)
    async with Collector("127.0.0.1", mosquitto.port, f"{prefix}/out/match/#") as col, \
            running(daemon):
        burst = [(f"{prefix}/fleet/{v}/position", fixes[v][i][1])
                 for i in range(200) for v in vehicles]
        # From another thread: the slowed daemon blocks this event loop on purpose.
        await asyncio.to_thread(publish_all, mosquitto.port, burst)
        published = len(burst)
        deadline = time.monotonic() + 60
        while pipeline.counters["messages"] + daemon.metrics.shed._value.get() < published:
            assert time.monotonic() < deadline, "daemon did not get through the burst"
            await asyncio.sleep(0.05)
        newest = {v: fixes[v][-1][0] for v in vehicles}
        await col.wait_for("/out/match/", pipeline.counters["fixes"])
        page = daemon._render_metrics().decode()
    values = samples(page)
    shed = values["livematch_fixes_shed_total"]
    handled = pipeline.counters["messages"]
    print(f"\nburst {published}: matched {handled}, shed {shed:.0f}, "
          f"peak depth {values['livematch_intake_queue_peak']:.0f} (bound {bound})")
    assert shed > 0  # the burst really outran the daemon
    assert handled + shed == published
    assert pipeline.counters["fixes"] == handled  # none rejected, none a duplicate
    assert 1 <= values["livematch_intake_queue_peak"] <= bound
    matched = col.records("/out/match/")
    assert len(matched) == handled
    for v in vehicles:
        times = [a["time"] for a in matched if a["vehicle"] == v]
        assert newest[v] in times, f"newest fix of {v} was not matched"
        assert times == sorted(times)
    # Every shed QoS 1 fix was acknowledged: the same session now delivers nothing.
    again = SlowPipeline(town(), config.matcher, limits=config.feed)
    async with running(Daemon(config, again)):
        await asyncio.sleep(1.0)
    assert again.counters["messages"] == 0
