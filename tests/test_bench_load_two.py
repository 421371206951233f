"""bench/load.py: a worker's ``Pipeline.handle`` calls summed, and the two-worker ratio
read from schedstat run time beside clock ticks (session 27).

The outside reference: the means and medians are Python's ``statistics`` over the same
calls picked out here by hand (which call starts within 1 ms of the previous one's end),
and the ratio is the bench's own definition, c1 / max(w0, w1), computed here from the
step records' fields.
"""

from __future__ import annotations

import statistics
from pathlib import Path
from typing import Any

from paho.mqtt.client import topic_matches_sub

from livematch.config import load_config
from livematch.service.shards import shard_of
from tests.catalogue import bench_module


def test_handle_stats_split_by_gap() -> None:
    """Calls are (end epoch s, wall ms, CPU ms); a call starts at end - wall. The second
    call starts 0.5 ms after the first ends (soon), the third 5 ms after the second
    (after a gap), the fourth 0.2 ms after the third (soon); the fifth ends outside the
    window and is left out."""
    load = bench_module("load")
    rec = {"handle": [
        (100.0100, 0.1, 0.08),   # starts 100.0099
        (100.0107, 0.2, 0.12),   # starts 100.0105: 0.5 ms after 100.0100
        (100.0160, 0.3, 0.30),   # starts 100.0157: 5 ms after 100.0107
        (100.0164, 0.2, 0.10),   # starts 100.0162: 0.2 ms after 100.0160
        (200.0, 0.1, 9.99),      # outside [100, 101]
    ]}
    got = load.handle_stats(rec, 100.0, 101.0)
    every = [80.0, 120.0, 300.0, 100.0]
    assert got["calls"] == 4
    assert abs(got["ms"] - sum(every) / 1000) < 0.006
    assert abs(got["mean"] - statistics.fmean(every)) < 0.06
    assert abs(got["median"] - statistics.median(every)) < 0.06
    assert got["soon"][0] == 2 and abs(got["soon"][1] - statistics.fmean([120.0, 100.0])) < 0.06
    assert got["after_gap"][0] == 1 and abs(got["after_gap"][1] - 300.0) < 0.06


def _row(system: str, repeat: int, ticks: list[float], run: list[float]) -> dict[str, Any]:
    return {"system": system, "repeat": repeat, "ms_per_fix": {"system": sum(ticks)},
            "worker_ms_per_fix": ticks, "worker_run_ms_per_fix": run}


def test_two_worker_ratio_from_both_clocks() -> None:
    """Both ratios are printed, per round and as a median, against each single-worker
    system of the run (livematch-1 probed, livematch-1n not), and a ``*2`` system pairs
    like its base."""
    load = bench_module("load")
    steps = [
        _row("livematch-1", 1, [0.200], [0.2004]),
        _row("livematch-1n", 1, [0.180], [0.1802]),
        _row("livematch-2sc", 1, [0.130, 0.120], [0.1301, 0.1203]),
        _row("livematch-2sc*2", 1, [0.090, 0.088], [0.0902, 0.0881]),
    ]
    text = "\n".join(load._two_worker_lines({
        "steps": steps, "repeat": 1,
        "systems": ["livematch-1", "livematch-1n", "livematch-2sc", "livematch-2sc*2"]}))
    assert f"{0.2004 / 0.1301:.3f}" in text       # schedstat, against livematch-1
    assert f"{0.1802 / 0.1301:.3f}" in text       # schedstat, against livematch-1n
    assert f"{0.200 / 0.130:.2f}" in text         # clock ticks, against livematch-1
    assert f"{0.1802 / 0.0902:.3f}" in text       # the group at twice the rate
    assert text.count("schedstat") == 4           # two groups x two single workers


def test_pair_is_two_lone_workers_each_fed_its_own_vehicles(tmp_path: Path) -> None:
    """``livematch-1p`` starts two workers without a group on the memory store (session
    27's ran them as a group on Redis, whose leases then went to the worker not fed the
    vehicles), and every vehicle's topic reaches exactly one of them: w1's those of the
    shards w1 of a group holds, w0's the others.

    The outside reference for "reaches": paho-mqtt's ``topic_matches_sub`` (MQTT 3.1.1
    section 4.7 topic filter matching) against each worker's ``mqtt.topic`` as
    livematch's own config loader reads it from the file the bench writes."""
    load = bench_module("load")
    assert load.worker_layout("livematch-1p") == (2, False, "")
    for system in ("livematch-2", "livematch-2s", "livematch-2sc", "livematch-2s0"):
        assert load.worker_layout(system) == (2, True, "load")
    assert load.worker_layout("livematch-1g") == (1, True, "load")
    assert load.worker_layout("livematch-1r") == (1, True, "")
    for system in ("livematch-1", "livematch-1n", "livematch-1h"):
        assert load.worker_layout(system) == (1, False, "")
    split = frozenset(load.shards_held("w1", ["w0", "w1"], load.GROUP_SHARDS))
    configs = [load_config(load.daemon_config(tmp_path, 1883, "memory://", f"w{w}", "",
                                              load.SPLIT_TOPIC if w else load.IN_TOPIC),
                           env={}) for w in range(2)]
    assert [c.group.name for c in configs] == ["", ""]
    assert [c.store.url for c in configs] == ["memory://", "memory://"]
    assert configs[0].mqtt.client_id != configs[1].mqtt.client_id
    to_w1 = 0
    for vehicle in [f"v{i}" for i in range(500)] + [f"probe{p}" for p in range(load.PROBES)]:
        topic = load.feed_topic(vehicle, 0, split)
        reached = [w for w, c in enumerate(configs) if topic_matches_sub(c.mqtt.topic, topic)]
        in_split = shard_of(vehicle, load.GROUP_SHARDS) in split
        assert reached == ([1] if in_split else [0]), (vehicle, topic)
        to_w1 += in_split and vehicle.startswith("v")
    assert 0 < to_w1 < 500
