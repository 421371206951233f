"""The daemon's Prometheus metrics, in a registry of its own (no global state).

Names follow Prometheus conventions: a ``livematch_`` prefix, base units (seconds,
bytes) in the name, ``_total`` on counters. Every metric the daemon exports:

====================================================  =======================================
livematch_messages_received_total                      MQTT messages taken from the feed
livematch_messages_rejected_total{reason}             messages sent to the dead-letter topic
livematch_fixes_processed_total                       fixes that reached a tracker
livematch_fixes_filtered_total{reason}                fixes the matcher refused (duplicate...)
livematch_published_total{kind}                       outputs acknowledged by the broker
livematch_assignments_throttled_total                 assignments held back by [publish] throttle
livematch_publish_dropped_total                       outputs never sent (broker down at exit)
livematch_processing_seconds                          time to handle one message (histogram)
livematch_fix_to_publish_lag_seconds                  fix time to broker acknowledgement
livematch_vehicles_live                               vehicles with state in memory
livematch_vehicles_parked                             of them, parked ([store] park_after_s)
livematch_vehicle_parks_total                         vehicles parked (kept as their bytes)
livematch_vehicle_unparks_total                       parked vehicles restored
livematch_eps_level_assignments_total{eps_m}          assignments per eps level of the ladder
livematch_store_errors_total                          failed state-store operations
livematch_broker_reconnects_total                     lost broker connections
livematch_publish_queue_depth                         outputs waiting for the broker
livematch_checkpoints_total                           vehicle checkpoints written
livematch_shards_held                                 shards this worker holds (worker group)
livematch_lease_renew_failures_total                  lease rounds that could not reach Redis
livematch_shard_takeovers_total                       shards acquired (restored and replayed)
livematch_shards_lost_total{why}                      shards lost (expired, taken, fenced, ...)
livematch_load_snapshots_total                        load snapshots written (group.balance_load)
livematch_checkpoints_fenced_total                    checkpoint writes refused by fencing
livematch_shard_buffered_total                        fixes kept for a replay after a takeover
livematch_shard_buffer_dropped_total                  kept fixes dropped (buffer full)
livematch_shard_replayed_total                        kept fixes replayed after a takeover
livematch_shard_buffer_messages                       fixes currently kept for replays
livematch_fixes_late_total                            fixes matched more than feed.max_age_s late
livematch_fixes_shed_total                            messages dropped from a full intake queue
livematch_intake_queue_depth                          messages waiting to be matched now
livematch_intake_queue_peak                           messages waiting to be matched at most
livematch_rejects_suppressed_total{why}               rejects counted but not published
livematch_resident_memory_bytes                       resident set size of the process (Linux)
livematch_gc_pause_seconds{generation}                garbage collections (histogram)
livematch_start_seconds{stage}                        wall time of each start stage
livematch_build_info{version,modules,kernels,...}     how this worker runs (compiled, kernels)
====================================================  =======================================

Example:
    >>> m = Metrics()
    >>> m.received.inc()
    >>> b"livematch_messages_received_total 1.0" in m.render()
    True
"""

from __future__ import annotations

import time
from bisect import bisect_left
from collections.abc import Iterator, Sequence

from prometheus_client import (
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    Info,
    generate_latest,
)
from prometheus_client.core import HistogramMetricFamily, Metric
from prometheus_client.registry import Collector
from prometheus_client.utils import floatToGoString

# Handling one message is sub-millisecond when things are well (common practice: cover
# three decades around the expected value).
_PROCESSING_BUCKETS = (0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025,
                       0.05, 0.1, 0.25, 1.0)
# Fix to publish includes the device's own send delay and any broker outage.
_LAG_BUCKETS = (0.05, 0.1, 0.25, 0.5, 1.0, 2.0, 5.0, 10.0, 30.0, 60.0, 300.0, 3600.0)


class Metrics:
    """Every metric of one daemon, registered in ``self.registry``."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        r = self.registry
        self.received = Counter("livematch_messages_received",
                                "MQTT messages taken from the feed.", registry=r)
        self.rejected = Counter("livematch_messages_rejected",
                                "Messages sent to the dead-letter topic, by reason.",
                                ["reason"], registry=r)
        self.fixes = Counter("livematch_fixes_processed",
                             "Fixes that reached a per-vehicle tracker.", registry=r)
        self.filtered = Counter("livematch_fixes_filtered",
                                "Fixes the matcher refused before the sweep, by reason.",
                                ["reason"], registry=r)
        self.late = Counter("livematch_fixes_late",
                            "Fixes matched although more than feed.max_age_s behind their "
                            "receive time.", registry=r)
        self.shed = Counter("livematch_fixes_shed",
                            "Queued messages dropped (and acknowledged) because the intake "
                            "queue was over intake.queue_max; a newer one of the same "
                            "vehicle was kept where there was one.", registry=r)
        self.intake_depth = Gauge("livematch_intake_queue_depth",
                                  "Messages received and waiting to be matched.", registry=r)
        self.intake_peak = Gauge("livematch_intake_queue_peak",
                                 "Largest intake queue depth since start.", registry=r)
        self.published = Counter("livematch_published",
                                 "Outputs acknowledged by the broker, by kind.",
                                 ["kind"], registry=r)
        self.throttled = Counter("livematch_assignments_throttled",
                                 "Assignments not published because of [publish] throttle_s.",
                                 registry=r)
        self.dropped = Counter("livematch_publish_dropped",
                               "Outputs never sent because the broker was away at shutdown.",
                               registry=r)
        # Observed once per message and once per assignment: counted without a lock
        # (PlainHistogram), the daemon observes and renders in its event loop only.
        self.processing = PlainHistogram("livematch_processing_seconds",
                                         "Time to decode, validate and match one message.",
                                         _PROCESSING_BUCKETS, registry=r)
        self.lag = PlainHistogram("livematch_fix_to_publish_lag_seconds",
                                  "Wall time from a fix's own time to the broker's "
                                  "acknowledgement of its assignment.", _LAG_BUCKETS,
                                  registry=r)
        self.vehicles = Gauge("livematch_vehicles_live",
                              "Vehicles whose matcher state is held in memory.", registry=r)
        self.parked = Gauge("livematch_vehicles_parked",
                            "Vehicles held as their checkpoint bytes until their next fix "
                            "([store] park_after_s); counted in livematch_vehicles_live too.",
                            registry=r)
        self.parks = Counter("livematch_vehicle_parks",
                             "Vehicles parked: kept as their checkpoint bytes after "
                             "[store] park_after_s without a message.", registry=r)
        self.unparks = Counter("livematch_vehicle_unparks",
                               "Parked vehicles restored (a fix came, a stale check, "
                               "eviction).", registry=r)
        self.eps_level = Counter("livematch_eps_level_assignments",
                                 "Assignments by the eps level (metres) that certified them.",
                                 ["eps_m"], registry=r)
        self.store_errors = Counter("livematch_store_errors",
                                    "State-store operations that failed.", registry=r)
        self.reconnects = Counter("livematch_broker_reconnects",
                                  "Broker connections lost (each one is retried).", registry=r)
        self.queue_depth = Gauge("livematch_publish_queue_depth",
                                 "Outputs waiting to be published.", registry=r)
        self.checkpoints = Counter("livematch_checkpoints",
                                   "Vehicle checkpoints written to the state store.", registry=r)

        self.shards_held = Gauge("livematch_shards_held",
                                 "Shards this worker holds by lease (worker group).", registry=r)
        self.lease_failures = Counter("livematch_lease_renew_failures",
                                      "Lease rounds (renew, acquire, release) that failed.",
                                      registry=r)
        self.takeovers = Counter("livematch_shard_takeovers",
                                 "Shards acquired: vehicles restored, kept fixes replayed.",
                                 registry=r)
        self.load_snapshots = Counter("livematch_load_snapshots",
                                      "Load snapshots this worker wrote for the group "
                                      "(group.balance_load).", registry=r)
        self.shards_lost = Counter("livematch_shards_lost",
                                   "Shards lost without a hand-over, by why.", ["why"],
                                   registry=r)
        self.fenced = Counter("livematch_checkpoints_fenced",
                              "Checkpoint writes refused: another worker holds the shard.",
                              registry=r)
        self.buffered = Counter("livematch_shard_buffered",
                                "Fixes kept for a replay after a takeover (worker group).",
                                registry=r)
        self.buffer_dropped = Counter("livematch_shard_buffer_dropped",
                                      "Kept fixes dropped because a shard's buffer was full.",
                                      registry=r)
        self.replayed = Counter("livematch_shard_replayed",
                                "Kept fixes replayed after taking a shard over.", registry=r)
        self.buffer_depth = Gauge("livematch_shard_buffer_messages",
                                  "Fixes currently kept for replays (worker group).",
                                  registry=r)
        self.rejects_suppressed = Counter(
            "livematch_rejects_suppressed",
            "Reject records counted but not published, by why (queue_full: "
            "publish.reject_queue_max were waiting).",
            ["why"], registry=r)
        self.memory = Gauge("livematch_resident_memory_bytes",
                            "Resident set size of this process (Linux), bytes.", registry=r)
        self.gc_pause = Histogram("livematch_gc_pause_seconds",
                                  "Python garbage collections (they stop the event loop), "
                                  "by how long they took.", ["generation"],
                                  buckets=(0.001, 0.01, 0.05, 0.1, 0.25, 0.5, 1.0, 2.0, 5.0),
                                  registry=r)

        self.start_seconds = Gauge("livematch_start_seconds",
                                   "Wall time of each stage of the start (compiling: the "
                                   "matcher's kernels, network: road map, routes, fences), "
                                   "seconds.", ["stage"], registry=r)

        self.build = Info("livematch_build",
                          "How this worker runs livematch (livematch.native.build_info): "
                          "compiled modules or pure Python, stale compiled modules, the "
                          "kernels ahead of time (aot) or under numba's JIT, and why.",
                          registry=r)

    def render(self) -> bytes:
        """The registry in the Prometheus text exposition format."""
        return generate_latest(self.registry)


class PlainHistogram(Collector):
    """A histogram without labels, counted in plain Python, for one thread only.

    prometheus_client's ``Histogram.observe`` takes a lock twice (the sum and the
    bucket) and walks the bounds in Python: about 1.3 µs, paid once per message and once
    per assignment. Here a value is placed with ``bisect`` into a list of counts (a
    value equal to a bound goes into that bound's bucket, as there) and the metric is
    built when the registry is collected, with the same samples: ``_bucket`` per bound
    (cumulative) and ``+Inf``, ``_count``, ``_sum`` and ``_created`` (the test compares
    the rendered text with a ``Histogram`` fed the same values). Not thread-safe: the
    daemon observes and renders in its event loop.

    Example (one value on a bound, one above every bound)::

        >>> r = CollectorRegistry()
        >>> h = PlainHistogram("x_seconds", "Example.", (0.5, 1.0), registry=r)
        >>> h.observe(0.5); h.observe(7.0)
        >>> [(s.name, s.labels.get("le"), s.value) for s in list(r.collect())[0].samples][:5]
        [('x_seconds_bucket', '0.5', 1.0), ('x_seconds_bucket', '1.0', 1.0), \
('x_seconds_bucket', '+Inf', 2.0), ('x_seconds_count', None, 2.0), ('x_seconds_sum', None, 7.5)]
    """

    def __init__(self, name: str, documentation: str, buckets: Sequence[float], *,
                 registry: CollectorRegistry) -> None:
        self.name = name
        self.documentation = documentation
        self._bounds = tuple(float(b) for b in buckets)
        self._le = [floatToGoString(b) for b in self._bounds] + ["+Inf"]
        self._counts = [0] * (len(self._bounds) + 1)
        self._sum = 0.0
        self._created = time.time()
        registry.register(self)

    def observe(self, amount: float) -> None:
        """Count one value (seconds)."""
        self._counts[bisect_left(self._bounds, amount)] += 1
        self._sum += amount

    def collect(self) -> Iterator[Metric]:
        """The histogram as prometheus_client's ``Histogram`` renders it."""
        family = HistogramMetricFamily(self.name, self.documentation)
        total = 0
        for le, count in zip(self._le, self._counts, strict=True):
            total += count
            family.add_sample(f"{self.name}_bucket", {"le": le}, float(total))
        family.add_sample(f"{self.name}_count", {}, float(total))
        family.add_sample(f"{self.name}_sum", {}, self._sum)
        family.add_sample(f"{self.name}_created", {}, self._created)
        yield family
